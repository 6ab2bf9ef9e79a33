"""Several benches, one store: run ids unique across benches, the bench identity recorded
with every run and shot, and the additive column migration of an older database."""

from __future__ import annotations

import datetime as dt
import hashlib
import subprocess
import sys
import threading
import types
from pathlib import Path

import pytest
from sqlalchemy import Column, MetaData, Table, create_engine, insert, text
from store_helpers import make_shot
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.config.bench import BenchConfig, default_bench_id
from benchrun.errors import ConfigError
from benchrun.runner import runfolder
from benchrun.store.canonical import canonical_json
from benchrun.store.raw import RawRecord
from benchrun.store.results import ResultsStore
from benchrun.store.rows import shot_row
from benchrun.store.rundata import RAW_FILE


def bench_file(folder: Path, bench_id: str | None, name: str | None = None) -> Path:
    """The simulated bench file, with ``bench: {id: bench_id}`` when given."""
    text_ = BENCH.read_text()
    if bench_id is not None:
        text_ = f"bench: {{id: {bench_id}}}\n" + text_
    path = folder / f"bench-{name or bench_id or 'default'}.yaml"
    path.write_text(text_)
    return path


def test_bench_id_from_the_file_or_the_host_name(tmp_path):
    assert load_bench(bench_file(tmp_path, "line2-bench-a")).bench_id == "line2-bench-a"
    default = load_bench(bench_file(tmp_path, None)).bench_id
    assert default == default_bench_id()
    assert BenchConfig.model_fields["bench"] is not None
    with pytest.raises(ConfigError, match="bench"):
        load_bench(bench_file(tmp_path, '"a b/c"', "bad"))


def test_run_ids_differ_between_benches_and_within_one_second(tmp_path, monkeypatch):
    seq = load_sequence(write_sequence(tmp_path))

    class Frozen:  # every call in the same second
        @staticmethod
        def now(tz=None):
            return dt.datetime(2026, 12, 3, 10, 0, 0, tzinfo=dt.UTC)

    monkeypatch.setattr(runfolder, "_dt", types.SimpleNamespace(datetime=Frozen, UTC=dt.UTC))
    ids = [runfolder.new_run_id(seq, bench, tmp_path) for bench in ("b1", "b2", "b1", "b1")]
    assert len(set(ids)) == 4
    assert ids[0].startswith("LT-0117-20261203T100000Z-b1-")
    assert ids[1].startswith("LT-0117-20261203T100000Z-b2-")


OLD_SHOTS_DDL = """CREATE TABLE shots (id INTEGER PRIMARY KEY, run_id VARCHAR(200) NOT NULL
REFERENCES runs(run_id), part VARCHAR(200) NOT NULL, lot VARCHAR(200) NOT NULL,
serial VARCHAR(200) NOT NULL, point_index INTEGER NOT NULL, "repeat" INTEGER NOT NULL,
attempt INTEGER NOT NULL, timestamp VARCHAR(40) NOT NULL, "temperature_K" FLOAT,
"bus_voltage_V" FLOAT, "forward_current_A" FLOAT, point TEXT NOT NULL,
conditions TEXT NOT NULL, metrics TEXT NOT NULL, flags TEXT NOT NULL, valid BOOLEAN NOT NULL,
raw_ref VARCHAR(400) NOT NULL, acquisition TEXT NOT NULL, extra TEXT NOT NULL,
CONSTRAINT uq_shot UNIQUE (run_id, serial, point_index, "repeat", attempt))"""
OLD_RUNS_DDL = """CREATE TABLE runs (run_id VARCHAR(200) PRIMARY KEY, part VARCHAR(200) NOT NULL,
lot VARCHAR(200) NOT NULL, started VARCHAR(40) NOT NULL, finished VARCHAR(40),
status VARCHAR(40) NOT NULL, manifest TEXT NOT NULL)"""


def test_a_database_without_bench_columns_is_migrated_and_keeps_its_digest(tmp_path):
    url = f"sqlite:///{tmp_path / 'old.db'}"
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.execute(text(OLD_RUNS_DDL))
        conn.execute(text(OLD_SHOTS_DDL))
    engine.dispose()
    # a row as the release before bench ids wrote it, and its digest as that release
    # computed it (every column but id, canonical JSON, SHA-256)
    row = shot_row(make_shot("R-old", "SN0117-001"))
    del row["bench_id"]
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.execute(text("INSERT INTO runs VALUES ('R-old', 'DX-4417', 'LT-0117', "
                          "'2026-01-01T00:00:00+00:00', NULL, 'complete', '{}')"))
        conn.execute(insert(old_shots_table(row)), [row])
    engine.dispose()
    expected = hashlib.sha256(canonical_json({"run_id": "R-old", "shots": [row]}).encode())
    with ResultsStore(url, create=False) as store:  # migrates at the first query
        assert store.row_digest("R-old") == expected.hexdigest()
    with create_engine(url).connect() as conn:
        cols = {r[1] for r in conn.execute(text("PRAGMA table_info(shots)"))}
        assert "bench_id" in cols
    with ResultsStore(url, bench_id="bench-b") as store:
        store.create_run("R-new", "DX-4417", "LT-0117")
        store.add_shot(make_shot("R-new", "SN0117-002"))
        assert store.get_run("R-new").bench_id == "bench-b"
        assert store.get_run("R-old").bench_id is None
        assert store.row_digest("R-new") != store.row_digest("R-old")


def old_shots_table(row: dict) -> Table:
    """A lightweight table naming the old release's shot columns, for the insert."""
    return Table("shots", MetaData(), *(Column(name) for name in row))


def _cli_run(seq: Path, bench: Path, out: Path, db: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "benchrun.cli", "run", str(seq), "--bench", str(bench), "--out",
         str(out), "--db", db, "--no-progress"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.mark.postgres
def test_same_lot_on_two_benches_in_the_same_second_both_complete(tmp_path, postgres_url):
    """Two processes (two benches) start the same lot at once into one PostgreSQL store."""
    seq = write_sequence(tmp_path, temperatures="[25 degC]")
    benches = [bench_file(tmp_path, "bench-a"), bench_file(tmp_path, "bench-b")]
    gate = threading.Barrier(2)
    procs: list[subprocess.Popen] = [None, None]  # type: ignore[list-item]

    def start(i: int) -> None:
        gate.wait()
        procs[i] = _cli_run(seq, benches[i], tmp_path / f"out{i}", postgres_url)

    threads = [threading.Thread(target=start, args=(i,)) for i in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for p in procs:
        _out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
    with ResultsStore(postgres_url, create=False) as store:
        runs = store.runs(lot="LT-0117")
        assert len(runs) == 2 and all(r.status == "complete" for r in runs)
        assert sorted(r.bench_id for r in runs) == ["bench-a", "bench-b"]
        for run in runs:
            assert f"-{run.bench_id}-" in run.run_id
            assert run.manifest["bench_id"] == run.bench_id
            shots = store.shots(run.run_id)
            assert len(shots) >= 2
        engine = create_engine(postgres_url)
        with engine.connect() as conn:
            rows = conn.execute(text(
                "SELECT s.bench_id, r.bench_id FROM shots s JOIN runs r USING (run_id)")).all()
        engine.dispose()
        assert rows and all(a == b for a, b in rows)
    for i, run in enumerate(sorted(runs, key=lambda r: r.bench_id)):
        run_dir = next((tmp_path / f"out{i}").iterdir())
        with RawRecord(run_dir / RAW_FILE, "r") as raw:
            assert raw.run_attrs["bench_id"] == run.bench_id
