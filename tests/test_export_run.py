"""A simulated run as other tools see it: its raw record through the HDF5 project's
command-line tools, its results exported as CSV/Parquet, one shot's waveform exported and
re-analysed by ``benchrun analyze``, and its record compacted and still verified."""

from __future__ import annotations

import json
import shutil

import h5py
import numpy as np
import pandas as pd
import pytest
from report_helpers import make_signer
from test_runner_run import run_sim
from test_runner_support import write_sequence
from test_store_raw_views import h5dump_values, h5ls_paths, needs_tools

from benchrun.cli import main
from benchrun.store.digests import file_sha256
from benchrun.store.raw import RawRecord
from benchrun.store.rundata import load_run, read_manifest

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def sim_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("export-run")
    outcome, _ = run_sim(write_sequence(folder), folder / "out")
    assert outcome.status == "complete"
    return outcome.run_dir


def _cli(capsys, *argv) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


@needs_tools
def test_h5ls_lists_every_shot_of_the_run_and_its_refs_name_existing_paths(sim_run):
    run = load_run(sim_run)
    listed = h5ls_paths(sim_run / "raw.h5")
    with RawRecord(sim_run / "raw.h5", "r") as raw:
        assert sorted(raw.keys()) == sorted(s.raw_ref.split("/", 1)[1] for s in run.shots)
        for shot in run.shots:
            # the reference the report cites is a path in the file
            assert listed[f"/{shot.raw_ref}"] == "Group"
            stored = raw.read_shot(shot.raw_ref)
            for name in ("diode_voltage", "diode_current", "switch_voltage"):
                assert f"/{shot.raw_ref}/{name}" in listed
        first = run.shots[0].raw_ref
        np.testing.assert_array_equal(
            h5dump_values(sim_run / "raw.h5", f"/{first}/diode_current"),
            raw.read_shot(first).channels["diode_current"].codes)
    with h5py.File(sim_run / "raw.h5", "r") as f:
        table = f["shot_table"][()]
    assert sorted(k.decode() for k in table["key"]) == sorted(raw_keys(run))
    assert set(table["serial"]) == {b"SN0117-001", b"SN0117-004"}
    assert stored is not None


def raw_keys(run):
    return [s.raw_ref.split("/", 1)[1] for s in run.shots]


def test_export_tables_as_csv_and_parquet(sim_run, tmp_path, capsys):
    out = tmp_path / "tables"
    printed = _cli(capsys, "export", str(sim_run), "--out", str(out))
    run = load_run(sim_run)
    for name in ("shots", "devices", "lot"):
        assert str(out / f"{name}.csv") in printed
        csv = pd.read_csv(out / f"{name}.csv")
        parquet = pd.read_parquet(out / f"{name}.parquet", engine="pyarrow")
        assert list(csv.columns) == list(parquet.columns) and len(csv) == len(parquet)
    shots = pd.read_csv(out / "shots.csv")
    assert sorted(shots["key"]) == sorted(raw_keys(run))
    by_key = {s.raw_ref.split("/", 1)[1]: s for s in run.shots}
    for _, row in shots.iterrows():
        stored = by_key[row["key"]]
        assert row["serial"] == stored.serial and row["point"] == stored.point.index
        for metric in ("irrm_A", "qrr_C", "trr_s"):
            assert row[metric] == pytest.approx(stored.metrics[metric], rel=1e-15)
        assert row["condition_temperature_K"] == pytest.approx(
            stored.conditions["temperature_K"], rel=1e-15)
    devices = pd.read_csv(out / "devices.csv")
    assert sorted(devices["serial"]) == ["SN0117-001", "SN0117-004"]
    assert set(devices["verdict"]) <= {"conforming", "non-conforming", "indeterminate",
                                       "invalid"}
    lot = pd.read_csv(out / "lot.csv")
    assert len(lot) == 1 and lot.loc[0, "count"] == 2
    assert lot.loc[0, "disposition"] in ("accept", "reject")
    # a folder of runs gives the same shots
    shutil.copytree(sim_run, tmp_path / "runs" / sim_run.name)
    _cli(capsys, "export", str(tmp_path / "runs"), "--out", str(tmp_path / "all"))
    assert sorted(pd.read_csv(tmp_path / "all" / "shots.csv")["key"]) == sorted(raw_keys(run))
    # and so does the run's database, named by URL
    _cli(capsys, "export", f"sqlite:///{sim_run / 'results.db'}", "--out", str(tmp_path / "db"))
    from_db = pd.read_csv(tmp_path / "db" / "shots.csv")
    assert sorted(from_db["key"]) == sorted(raw_keys(run))
    assert len(pd.read_csv(tmp_path / "db" / "devices.csv")) == 2


def test_exported_waveform_reanalysed_reproduces_the_stored_metrics(sim_run, tmp_path,
                                                                    capsys):
    run = load_run(sim_run)
    checked = 0
    for shot in [s for s in run.shots if s.valid]:
        key = shot.raw_ref.split("/", 1)[1]
        target = tmp_path / f"{key}.csv"
        _cli(capsys, "export", str(sim_run), "--shot", key, "--out", str(target))
        assert target.read_text().splitlines()[0] == "t (s),v (V),i (A)"
        metrics = json.loads(_cli(capsys, "analyze", str(target), "--json"))
        # the round trip the export promises: within 0.1 % (issue requirement)
        for name in ("irrm_A", "qrr_C", "trr_s"):
            assert metrics[name] == pytest.approx(shot.metrics[name], rel=1e-3), name
        checked += 1
    assert checked >= 4


def test_unknown_shot_is_one_clear_error(sim_run, tmp_path, capsys):
    assert main(["export", str(sim_run), "--shot", "p999-nobody-r00-a0",
                 "--out", str(tmp_path / "x.csv")]) == 2
    assert "no shot 'p999-nobody-r00-a0'" in capsys.readouterr().err


def test_compacted_record_is_smaller_verifies_and_reports(sim_run, tmp_path, capsys):
    from benchrun.grading import grade_lot, load_limits, run_bench
    from benchrun.report.render import render_report
    from benchrun.report.verify import verify_report

    run_dir = tmp_path / sim_run.name
    shutil.copytree(sim_run, run_dir)
    with RawRecord(run_dir / "raw.h5", "r") as raw:
        digests = {k: raw.read_shot(k).digest() for k in raw}
    before = (run_dir / "raw.h5").stat().st_size
    printed = _cli(capsys, "compact", str(run_dir))
    assert "every shot matches its SHA-256" in printed
    after = (run_dir / "raw.h5").stat().st_size
    assert before / after >= 2.0
    with RawRecord(run_dir / "raw.h5", "r") as raw:
        assert {k: raw.read_shot(k, verify=True).digest() for k in raw} == digests
    manifest = read_manifest(run_dir)
    assert manifest["files"]["raw.h5"] == file_sha256(run_dir / "raw.h5")
    listed = h5ls_paths(run_dir / "raw.h5") if shutil.which("h5ls") else None
    if listed is not None:
        assert all(f"/shots/{k}/diode_current" in listed for k in digests)
    # a report made from the compacted record verifies, re-analysis included
    files, signer = make_signer(tmp_path)
    run = load_run(run_dir)
    lot = grade_lot(run.shots, load_limits(run.limits_path), bench=run_bench(run))
    pdf = render_report(run, lot, run_dir / "report.pdf", signer=signer)
    result = verify_report(pdf, files.cert_path, run_dir)
    assert result.ok, [c for c in result.checks if not c.ok]
    # and now the record is reported on: compacting again is refused
    assert main(["compact", str(run_dir)]) == 2
    assert "already has a report" in capsys.readouterr().err


def test_compact_refuses_a_running_run(sim_run, tmp_path, capsys):
    from benchrun.store.rundata import write_manifest

    run_dir = tmp_path / sim_run.name
    shutil.copytree(sim_run, run_dir)
    manifest = read_manifest(run_dir)
    manifest["status"] = "running"
    write_manifest(run_dir, manifest)
    before = file_sha256(run_dir / "raw.h5")
    assert main(["compact", str(run_dir)]) == 2
    assert "never during it" in capsys.readouterr().err
    assert file_sha256(run_dir / "raw.h5") == before
