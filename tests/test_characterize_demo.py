"""`benchrun demo --characterize`: the shipped DX-4425 sweep on the simulated bench, its
curves.csv and its signed characterization.pdf; di/dt within tolerance at every point."""

from __future__ import annotations

import asyncio
import csv
import json
import re
import subprocess
import sys

import pytest

from benchrun.analysis.metrics_meta import METRICS


@pytest.mark.slow
def test_characterize_demo_writes_signed_report_and_curves(tmp_path):
    # in a child process: a stalled simulator thread must not outlive the test and load the
    # rest of the session
    out = tmp_path / "demo"
    done = subprocess.run([sys.executable, "-m", "benchrun.cli", "demo", "--characterize",
                           "--out", str(out), "--no-progress"], capture_output=True, text=True,
                          timeout=900)
    assert done.returncode == 0, done.stderr[-2000:]
    text = done.stdout
    runs = sorted((out / "runs").iterdir())
    assert len(runs) == 1 and runs[0].name.startswith("LT-0140")
    run_dir = runs[0]
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == "complete" and manifest["safe_state"]["reached"]
    assert not manifest.get("points_invalid"), manifest.get("points_invalid")
    assert "not fired" not in text

    from benchrun.config.sequence import load_sequence
    from benchrun.runner.plan import expand_points

    sequence = load_sequence(run_dir / "sequence.yaml")
    points = {p.index: p for p in expand_points(sequence)}
    tolerance = sequence.tolerances.didt

    # curves.csv: one row per measured shot, conditions, every metric key, flags
    with (run_dir / "curves.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    from benchrun.store.rundata import load_run

    run = load_run(run_dir)
    assert len(rows) == len(run.shots)
    header = set(rows[0])
    assert set(METRICS) <= header
    assert {"flags", "valid", "temperature_K", "bus_voltage_V", "forward_current_A",
            "didt_target_A_per_s", "measured_didt_A_per_s", "gate_resistance_used_ohm"} <= header

    # di/dt lands within tolerance at every point: each point has valid shots, and every
    # valid shot's di/dt (the stated definition) is within the sequence's tolerance
    by_point: dict[int, list[dict]] = {}
    for row in rows:
        by_point.setdefault(int(row["point"]), []).append(row)
    assert set(by_point) == set(points)
    for index, group in by_point.items():
        target = points[index].didt_A_per_s
        valid = [r for r in group if r["valid"] == "True"]
        assert valid, points[index].label
        for r in valid:
            assert abs(float(r["measured_didt_A_per_s"]) / target - 1) <= tolerance
            assert r["gate_resistance_used_ohm"]

    # the nominal and the worst-case snappiness points are in the sweep, with their flags
    labels = {r["label"] for r in rows}
    assert any(label.startswith("nominal") for label in labels)
    worst = [r for r in rows if r["label"].startswith("worst-case snappiness")]
    assert worst and all("flags" in r for r in worst)
    assert float(worst[0]["forward_current_A"]) <= 0.1 * sequence.ratings.if_max

    assert (run_dir / "fits.csv").is_file()

    # the report: signed (pyHanko validation, as benchrun verify does), fits attached
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify_signature import signature_checks

    pdf = (run_dir / "characterization.pdf").read_bytes()
    cert = next((out / "keys").glob("*.cert.pem"))
    integrity, trust, _ = asyncio.run(signature_checks(pdf, cert))
    assert integrity.ok and trust.ok
    data = read_attachment(pdf)
    assert data["kind"] == "characterization"
    axes = {(t["metric"], t["axis"]) for t in data["trends"]}
    for metric in ("qrr_C", "irrm_A", "trr_s", "err_J", "softness"):
        for axis in ("forward_current_A", "didt_A_per_s", "temperature_K"):
            assert (metric, axis) in axes, (metric, axis)
    words = subprocess.run(["pdftotext", "-layout", str(run_dir / "characterization.pdf"), "-"],
                           capture_output=True, text=True, check=True).stdout
    assert "kill" in words and "Test points and di/dt" in words
    assert re.search(r"worst-case snappiness", words)
