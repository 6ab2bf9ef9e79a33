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


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """One ``benchrun demo --characterize`` run for the tests of this module: (out, stdout)."""
    # in a child process: a stalled simulator thread must not outlive the test and load the
    # rest of the session
    out = tmp_path_factory.mktemp("chardemo") / "demo"
    done = subprocess.run([sys.executable, "-m", "benchrun.cli", "demo", "--characterize",
                           "--out", str(out), "--no-progress"], capture_output=True, text=True,
                          timeout=900)
    assert done.returncode == 0, done.stderr[-2000:]
    return out, done.stdout


@pytest.mark.slow
def test_characterize_demo_writes_signed_report_and_curves(demo):
    out, text = demo
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


@pytest.mark.slow
def test_characterize_report_shows_the_qualification_verdicts(demo):
    # The worst-case snappiness step and the nominal verdicts on the signed report and in the
    # printed summary, each consistent with the grading computed here from the run's results:
    # grade_worst_case on the marked point's shots (validity by the limits' tolerances at its
    # condition, Ls the bench file's fixture stray inductance) and grade_lot on the shots of
    # the sequence's point labelled "nominal" plus the marked point.  The expected VRM is
    # VR + Ls·di/dt (Kirchhoff's voltage law round the commutation loop).  No particular
    # verdict is asserted until the end, where the shipped sweep's outcome is checked.
    from benchrun.config.bench import load_bench
    from benchrun.config.limits import load_limits
    from benchrun.grading.decision import worst
    from benchrun.grading.grade import grade_lot, shot_problems
    from benchrun.grading.worst_case import grade_worst_case
    from benchrun.report.sign import read_attachment
    from benchrun.store.rundata import load_run
    from benchrun.units import format_si

    out, stdout = demo
    run_dir = sorted((out / "runs").iterdir())[0]
    run = load_run(run_dir)
    limits = load_limits(run_dir / "limits.yaml")
    bench = load_bench(run_dir / "bench.yaml")
    stray = bench.fixture.stray_inductance
    spec = limits.worst_case
    serials = sorted({s.serial for s in run.shots})

    marked = [s for s in run.shots if s.point.qualification == "worst_case_snappiness"]
    (point,) = {s.point for s in marked}
    condition = limits.condition(spec.condition)
    valid = {id(s): not shot_problems(s, condition, limits.tolerances) for s in marked}
    steps = {g.serial: g for g in grade_worst_case(
        marked, spec, {spec.condition: point}, stray_inductance_H=stray, valid=valid)}
    assert sorted(steps) == serials

    nominal = [s for s in run.shots if s.point.label.split(" @ ")[0] == "nominal"]
    assert len({s.point for s in nominal}) == 1
    lot = grade_lot(nominal + marked, limits, bench=bench,
                    analysis_options=run.manifest.get("analysis_options"))
    at_nominal = {d.serial: worst([g.outcome for g in d.grades if g.condition == "nominal"])
                  for d in lot.devices}

    pdf = run_dir / "characterization.pdf"
    data = read_attachment(pdf.read_bytes())["qualification"]
    devices = {d["serial"]: d for d in data["devices"]}
    words = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True,
                           text=True, check=True).stdout
    flat = " ".join(words.split())
    assert "Qualification verdicts" in flat and "Worst-case snappiness step" in flat
    assert f"Ls = {format_si(stray, 'H')}" in flat
    # the graded points are named: the labelled nominal point and the marked point
    assert "the sequence's point labelled 'nominal'" in flat
    assert "marked qualification: worst_case_snappiness" in flat
    lines = words.splitlines()
    outcome = next(x for x in lines if x.strip().startswith("outcome"))
    assert outcome.split()[1:] == [steps[s].outcome for s in serials]
    verdicts = next(x for x in lines if x.strip().startswith("verdict at nominal"))
    assert verdicts.split()[3:] == [at_nominal[s] for s in serials]
    for serial in serials:
        step = steps[serial]
        attached = devices[serial]["worst_case"]
        assert (attached["outcome"], attached["shot"]) == (step.outcome, step.shot)
        assert step.reason in flat
        # the expected peak the report states is VR + Ls·di/dt of the graded shot's metrics
        shot = next(s for s in marked if s.serial == serial
                    and f"repeat {s.repeat} attempt {s.attempt}" == step.shot)
        expected = shot.metrics["vr_V"] + stray * abs(shot.metrics["didt_A_per_s"])
        assert attached["assessment"]["vrm_expected_V"] == pytest.approx(expected)
        assert format_si(expected, "V") in flat
        conditions = {c["condition"]: c for c in devices[serial]["conditions"]}
        assert conditions["nominal"]["outcome"] == at_nominal[serial]
        # the printed summary: one line per device with both verdicts
        (line,) = [x for x in stdout.splitlines() if x.strip().startswith(serial)]
        assert f"nominal: {at_nominal[serial]}" in line
        assert f"worst-case snappiness: {step.outcome}" in line
        # the shipped sweep's outcome (issue 16's done-when): the simulated snappy part
        # (plasma-extent law, benchrun.simulator.diode_models; checked against ngspice in
        # tests/test_sim_plasma_ngspice.py) snaps at its worst-case point, on its worst shot,
        # and meets every limit at the nominal one
        assert step.outcome == "non-conforming" and step.assessment.snap, step.reason
        assert at_nominal[serial] == "conforming"
    nominal_rows = [s for s in nominal if "snap" in s.flags]
    assert nominal_rows == []


# --- benchrun verify on the characterisation report -------------------------------------
# Outside references as in tests/test_verify.py: SHA-256 (FIPS 180-4, hashlib) for the
# manifest, and ``sqlite3`` (Python standard library) editing a row behind the store's back.

def _char_run(demo, tmp_path=None):
    """The demo's run folder, or a private copy of it to tamper with; and the certificate."""
    import shutil

    out, _ = demo
    run_dir = sorted((out / "runs").iterdir())[0]
    if tmp_path is not None:
        run_dir = shutil.copytree(run_dir, tmp_path / run_dir.name)
    return run_dir, next((out / "keys").glob("*.cert.pem"))


@pytest.mark.slow
def test_verify_passes_every_applicable_check_of_a_fresh_characterisation_report(
        demo, capsys, tmp_path):
    from benchrun.cli import main
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify import (
        CHECK_MANIFEST,
        CHECK_REANALYSIS,
        CHECK_REGISTRATION,
        CHECK_SIGNATURE,
        CHECK_TRUST,
        verify_report,
    )
    from benchrun.store.rundata import load_run

    run_dir, cert = _char_run(demo)
    pdf = run_dir / "characterization.pdf"
    result = verify_report(pdf, cert=cert)
    assert result.ok, [c.to_dict() for c in result.checks]
    assert [c.name for c in result.checks] == [CHECK_SIGNATURE, CHECK_TRUST, CHECK_MANIFEST,
                                               CHECK_REANALYSIS, CHECK_REGISTRATION]
    assert [c.applicable for c in result.checks] == [True, True, True, True, False]
    assert result.check(CHECK_REGISTRATION).reason.startswith("not applicable: ")
    # every run file the acceptance report hashes, the result rows and the runs-table row
    data = read_attachment(pdf.read_bytes())
    names = {m["name"] for m in data["manifest"]}
    assert {"raw.h5", "sequence.yaml", "bench.yaml", "limits.yaml", "run.json"} <= names
    assert {m["kind"] for m in data["manifest"]} == {"file", "rows", "run-row"}
    run = load_run(run_dir)
    assert f"all {len(data['manifest'])} hashes match" in result.check(CHECK_MANIFEST).reason
    # every shot the report rests on is listed and re-analysed
    assert len(data["shots"]) == len(run.shots)
    assert f"{len(run.shots)} shots re-analysed" in result.check(CHECK_REANALYSIS).reason
    # the CLI: one line per check, exit 0
    assert main(["verify", str(pdf), "--cert", str(cert)]) == 0
    out = capsys.readouterr().out
    lines = [x.strip() for x in out.splitlines()]
    for check in result.checks:
        assert sum(x.split("  ", 1)[-1].startswith(check.name + ":") for x in lines) == 1
    assert any(x.startswith("n/a  reports-table row") for x in lines)
    assert "VERIFIED: every applicable check holds." in out
    # a copy of the report away from its run folder, with --data RUN_DIR
    import shutil

    away = tmp_path / "characterization.pdf"
    shutil.copy(pdf, away)
    assert verify_report(away, cert=cert, data=run_dir).ok
    assert main(["verify", str(away), "--cert", str(cert), "--data", str(run_dir)]) == 0
    assert not verify_report(away, cert=cert).check(CHECK_MANIFEST).ok  # no run data


@pytest.mark.slow
def test_verify_characterisation_report_catches_a_flipped_byte_in_the_raw_record(
        demo, tmp_path, capsys):
    from benchrun.cli import main
    from benchrun.report.verify import CHECK_MANIFEST, CHECK_REANALYSIS, verify_report

    run_dir, cert = _char_run(demo, tmp_path)
    import h5py

    raw = run_dir / "raw.h5"
    with h5py.File(raw, "r") as h5:  # one shot's stored samples, found by their bytes
        key = sorted(h5["shots"])[len(h5["shots"]) // 2]
        samples = h5["shots"][key]["diode_current"][()].tobytes()[:4096]
    data = bytearray(raw.read_bytes())
    at = data.find(samples)
    assert at > 0 and data.count(samples) == 1
    data[at + 1000] ^= 0x10
    raw.write_bytes(bytes(data))
    result = verify_report(run_dir / "characterization.pdf", cert=cert)
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and manifest.reason.startswith("raw.h5: SHA-256 differs")
    assert "\n" not in manifest.reason and "limits.yaml" not in manifest.reason
    reanalysis = result.check(CHECK_REANALYSIS)
    assert not reanalysis.ok and "\n" not in reanalysis.reason, reanalysis.reason
    assert key in reanalysis.reason  # the shot whose samples changed is named
    assert not result.ok
    assert main(["verify", str(run_dir / "characterization.pdf"), "--cert", str(cert)]) == 1
    captured = capsys.readouterr()
    assert "NO   manifest hashes match: raw.h5: SHA-256 differs" in captured.out
    assert "Traceback" not in captured.out + captured.err


@pytest.mark.slow
def test_verify_characterisation_report_catches_a_changed_database_row(demo, tmp_path):
    import sqlite3

    from benchrun.report.verify import CHECK_MANIFEST, CHECK_REANALYSIS, verify_report

    run_dir, cert = _char_run(demo, tmp_path)
    with sqlite3.connect(run_dir / "results.db") as db:
        (rowid, metrics), = db.execute(
            "SELECT id, metrics FROM shots ORDER BY id LIMIT 1").fetchall()
        values = json.loads(metrics)
        values["qrr_C"] = values["qrr_C"] * 0.5
        db.execute("UPDATE shots SET metrics = ? WHERE id = ?", (json.dumps(values), rowid))
    result = verify_report(run_dir / "characterization.pdf", cert=cert)
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and "database rows changed" in manifest.reason
    assert "raw.h5" not in manifest.reason
    # the raw waveforms still reproduce the signed report: the row, not the capture, changed
    assert result.check(CHECK_REANALYSIS).ok
    assert not result.ok


@pytest.mark.slow
def test_verify_characterisation_report_catches_a_re_signed_qualification_verdict(
        demo, tmp_path, monkeypatch):
    """An insider who turns a device's worst-case step and its verdict conforming and signs
    again passes the signature and manifest checks; regrading the re-analysed shots catches
    it."""
    from benchrun.characterize.publish import publish_characterization
    from benchrun.characterize.qualification import Qualification
    from benchrun.commands.demo import demo_signer
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify import CHECK_MANIFEST, CHECK_REANALYSIS, verify_report

    run_dir, cert = _char_run(demo, tmp_path)
    honest = Qualification.to_dict
    changed: list[str] = []

    def tampered(self):
        data = honest(self)
        device = data["devices"][0]
        assert device["worst_case"]["outcome"] == "non-conforming"
        device["worst_case"]["outcome"] = "conforming"
        device["verdict"] = "conforming"
        changed.append(device["serial"])
        return data

    monkeypatch.setattr(Qualification, "to_dict", tampered)
    signer, _, _ = demo_signer(cert.parent)
    publish_characterization(run_dir, signer)
    monkeypatch.undo()
    pdf = run_dir / "characterization.pdf"
    serial = changed[0]
    attached = read_attachment(pdf.read_bytes())["qualification"]["devices"][0]
    assert attached["serial"] == serial and attached["worst_case"]["outcome"] == "conforming"
    result = verify_report(pdf, cert=cert)
    assert all(result.check(n).ok for n in ("signature intact", "signer trusted",
                                            CHECK_MANIFEST))
    reanalysis = result.check(CHECK_REANALYSIS)
    assert not reanalysis.ok and not result.ok
    assert reanalysis.reason.startswith("shots agree; 2 qualification disagreement(s)")
    assert (f"device {serial}: verdict reported 'conforming', regrading gives "
            "'non-conforming'") in reanalysis.details
    assert (f"device {serial} worst-case snappiness step: outcome reported 'conforming', "
            "regrading gives 'non-conforming'") in reanalysis.details
