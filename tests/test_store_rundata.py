"""Run folders: atomic manifest, loading a run from a folder, a SQLite file or a database URL."""

from __future__ import annotations

import json

import pytest
from store_helpers import make_channels, make_probes, make_shot

from benchrun.errors import StoreError
from benchrun.store import (
    RawRecord,
    ResultsStore,
    default_store_url,
    file_sha256,
    hash_run_files,
    load_run,
    read_manifest,
    store_url_for,
    write_manifest,
)


def _make_run_folder(run_dir, store_url=None, run_id="R-0001", n=3):
    run_dir.mkdir(parents=True, exist_ok=True)
    manifest = {"run_id": run_id, "part": "DX-4417", "lot": "LT-0117", "run_dir": str(run_dir)}
    if store_url is not None:
        manifest["store_url"] = store_url
    url = store_url_for(run_dir, manifest)
    shots = []
    with RawRecord(run_dir / "raw.h5") as raw, ResultsStore(url) as store:
        store.create_run(run_id, "DX-4417", "LT-0117", manifest)
        for i in range(n):
            ref = raw.append_shot(raw.next_key(), 0.0, 1e-9, make_channels(i), make_probes(), {})
            shot = make_shot(run_id=run_id, serial=f"S{i}", raw_ref=ref)
            store.add_shot(shot)
            shots.append(shot)
    for name in ("sequence.yaml", "bench.yaml", "limits.yaml"):
        (run_dir / name).write_text(f"# {name}\n")
    write_manifest(run_dir, manifest)
    return manifest, shots


def test_write_manifest_is_atomic_and_round_trips(tmp_path):
    manifest = {"run_id": "R-1", "values": [0.1 + 0.2, 1e-300], "nested": {"b": 1, "a": None}}
    path = write_manifest(tmp_path, manifest)
    assert path == tmp_path / "run.json"
    assert read_manifest(tmp_path) == manifest
    write_manifest(tmp_path, {"run_id": "R-1", "status": "complete"})
    assert read_manifest(tmp_path) == {"run_id": "R-1", "status": "complete"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.json"]  # no temp file left
    with pytest.raises(StoreError, match="JSON"):
        write_manifest(tmp_path, {"bad": object()})
    assert read_manifest(tmp_path)["status"] == "complete"  # old manifest kept


def test_read_manifest_errors(tmp_path):
    with pytest.raises(StoreError, match="not a run folder"):
        read_manifest(tmp_path)
    (tmp_path / "run.json").write_text("{broken")
    with pytest.raises(StoreError, match="cannot read"):
        read_manifest(tmp_path)
    (tmp_path / "run.json").write_text("[1, 2]")
    with pytest.raises(StoreError, match="JSON object"):
        read_manifest(tmp_path)


def test_load_run_from_folder(tmp_path):
    run_dir = tmp_path / "R-0001"
    manifest, shots = _make_run_folder(run_dir)
    run = load_run(run_dir)
    assert run.run_id == "R-0001"
    assert run.manifest == manifest
    assert run.shots == shots
    assert run.run_dir == run_dir.resolve()
    assert run.store_url == default_store_url(run_dir)
    assert run.raw_path == run_dir.resolve() / "raw.h5"
    assert run.sequence_path.name == "sequence.yaml"
    assert run.bench_path.name == "bench.yaml"
    assert run.limits_path.name == "limits.yaml"
    assert run.report_path.name == "report.pdf"
    assert run.log_path.name == "run.log"
    assert run.run is not None and run.run.status == "running"
    with run.open_raw() as raw:
        for shot in run.shots:
            raw.read_shot(shot.raw_ref)
    assert load_run(str(run_dir), run_id="R-0001").shots == shots
    with pytest.raises(StoreError, match="holds run"):
        load_run(run_dir, run_id="R-other")


def test_copied_folder_with_relative_sqlite_url_still_loads(tmp_path):
    run_dir = tmp_path / "a" / "R-0001"
    _, shots = _make_run_folder(run_dir, store_url="sqlite:///results.db")
    moved = tmp_path / "archive" / "R-0001"
    moved.parent.mkdir()
    run_dir.rename(moved)
    run = load_run(moved)
    assert run.shots == shots
    assert run.store_url == default_store_url(moved)


def test_load_run_from_database_url_and_file(tmp_path):
    run_dir = tmp_path / "R-0001"
    manifest, shots = _make_run_folder(run_dir)
    db = run_dir / "results.db"
    for source in (f"sqlite:///{db}", db, str(db)):
        run = load_run(source)
        assert run.run_id == "R-0001"
        assert run.shots == shots
        assert run.manifest == manifest  # the copy kept in the runs table
        assert run.run_dir == run_dir  # from the manifest's run_dir
    with ResultsStore(f"sqlite:///{db}") as store:
        store.create_run("R-0002", "DX-4417", "LT-0118", {})
    with pytest.raises(StoreError, match="2 runs"):
        load_run(f"sqlite:///{db}")
    other = load_run(f"sqlite:///{db}", run_id="R-0002")
    assert other.shots == [] and other.run_dir is None and other.raw_path is None
    with pytest.raises(StoreError, match="without its run folder"):
        other.open_raw()
    with pytest.raises(StoreError, match="no run"):
        load_run(f"sqlite:///{db}", run_id="R-0404")


def test_load_run_errors(tmp_path):
    with pytest.raises(StoreError, match="neither"):
        load_run(tmp_path / "nothing-here")
    with pytest.raises(StoreError, match="does not exist"):
        load_run(f"sqlite:///{tmp_path / 'missing.db'}")
    assert not (tmp_path / "missing.db").exists()  # loading never creates a database
    (tmp_path / "run.json").write_text(json.dumps({"part": "x"}))
    with pytest.raises(StoreError, match="run_id"):
        load_run(tmp_path)


@pytest.mark.postgres
def test_load_run_folder_with_postgresql_store(tmp_path, postgres_url):
    run_dir = tmp_path / "R-0001"
    _, shots = _make_run_folder(run_dir, store_url=postgres_url)
    assert not (run_dir / "results.db").exists()
    run = load_run(run_dir)
    assert run.shots == shots
    assert run.store_url == postgres_url
    assert load_run(postgres_url).shots == shots


def test_hash_run_files(tmp_path):
    run_dir = tmp_path / "R-0001"
    _make_run_folder(run_dir)
    hashes = hash_run_files(run_dir)
    assert set(hashes) == {"raw.h5", "sequence.yaml", "bench.yaml", "limits.yaml"}
    assert hashes["raw.h5"] == file_sha256(run_dir / "raw.h5")
    (run_dir / "limits.yaml").write_text("# changed\n")
    assert hash_run_files(run_dir)["limits.yaml"] != hashes["limits.yaml"]
    (run_dir / "bench.yaml").unlink()
    assert "bench.yaml" not in hash_run_files(run_dir)
