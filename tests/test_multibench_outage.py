"""Riding through a results-database outage: rows wait in the run folder's journal and are
written exactly once when the database is back; past the bound the run stops safely and
``--resume`` continues. The PostgreSQL tests stop and restart the suite's real throwaway
server (tests/pg_fixture.py)."""

from __future__ import annotations

import time

import pytest
from sqlalchemy import create_engine, text
from store_helpers import make_shot
from test_runner_support import BENCH, LIMITS, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.config.limits import load_limits
from benchrun.errors import StoreError, StoreUnavailable
from benchrun.grading.grade import grade_lot
from benchrun.records import FLAG_ANALYSIS_PENDING
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.journal import JOURNAL_FILE, DatabaseOutage, JournaledStore
from benchrun.runner.simbench import simulated_bench
from benchrun.store.raw import RawRecord
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import RAW_FILE, load_run


class FlakyStore:
    """A store whose server can be switched off: writes raise StoreUnavailable while down;
    every row written is kept, keyed by shot identity (like the unique constraint)."""

    public_url = "postgresql+psycopg://bench@db.example/results"

    def __init__(self):
        self.down = False
        self.rows: dict[tuple, tuple[str, object]] = {}
        self.calls = 0

    def _key(self, shot):
        return (shot.run_id, shot.serial, shot.point.index, shot.repeat, shot.attempt)

    def _check(self):
        self.calls += 1
        if self.down:
            raise StoreUnavailable("cannot store: the database server cannot be reached")

    def record_pending(self, shot):
        self._check()
        if self._key(shot) in self.rows and self.rows[self._key(shot)][0] == "done":
            raise StoreError("an analysed shot is stored under it")
        self.rows[self._key(shot)] = ("pending", shot)

    def complete_shot(self, shot):
        self._check()
        if self._key(shot) not in self.rows:
            raise StoreError("it is not stored")
        self.rows[self._key(shot)] = ("done", shot)
        return True

    def add_shot(self, shot):
        self._check()
        self.rows[self._key(shot)] = ("done", shot)
        return True


class Clock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


def test_rows_wait_in_the_journal_and_are_written_once_in_order(tmp_path):
    store, clock = FlakyStore(), Clock()
    rows = JournaledStore(store, tmp_path / JOURNAL_FILE, outage_limit_s=60,
                          backoff_initial_s=1.0, backoff_max_s=4.0, clock=clock)
    shots = [make_shot("R1", f"S{i}") for i in range(4)]
    rows.record_pending(shots[0])
    rows.complete_shot(shots[0])
    store.down = True
    rows.record_pending(shots[1])  # fails: the outage starts, next try after 1 s
    calls = store.calls
    clock.t = 0.5
    rows.complete_shot(shots[1])   # before the backoff ran out: not even tried
    rows.record_pending(shots[2])
    assert store.calls == calls
    assert rows.backlog == 3 and (tmp_path / JOURNAL_FILE).is_file()
    assert len((tmp_path / JOURNAL_FILE).read_text().splitlines()) == 3
    clock.t = 1.5  # tried again, still down: next wait doubles (2 s)
    rows.complete_shot(shots[2])
    assert store.calls == calls + 1 and rows.backlog == 4
    store.down = False
    clock.t = 3.0  # before 1.5 + 2 s: still journaled
    rows.record_pending(shots[3])
    assert rows.backlog == 5
    clock.t = 4.0
    rows.complete_shot(shots[3])  # the journal first, in order, then this row
    assert rows.backlog == 0 and not (tmp_path / JOURNAL_FILE).exists()
    assert {k[1]: v[0] for k, v in store.rows.items()} == {
        "S0": "done", "S1": "done", "S2": "done", "S3": "done"}
    assert rows.outages == [4.0 - 0.0]


def test_past_the_bound_the_next_row_raises_a_clear_error(tmp_path):
    store, clock = FlakyStore(), Clock()
    rows = JournaledStore(store, tmp_path / JOURNAL_FILE, outage_limit_s=10, clock=clock)
    store.down = True
    rows.record_pending(make_shot("R1", "S0"))
    clock.t = 10.5
    with pytest.raises(DatabaseOutage) as caught:
        rows.record_pending(make_shot("R1", "S1"))
    message = str(caught.value)
    assert "unreachable for 10 s" in message and "--resume" in message
    assert "Background on this error" not in message
    # the journal stays for --resume, which writes it first (the server is back)
    store.down = False
    again = JournaledStore(store, tmp_path / JOURNAL_FILE, outage_limit_s=10, clock=clock)
    assert again.backlog == 0 and ("R1", "S0", 0, 0, 0) in store.rows


def test_an_analysed_row_already_there_is_not_replaced_by_a_replayed_pending_row(tmp_path):
    store, clock = FlakyStore(), Clock()
    rows = JournaledStore(store, tmp_path / JOURNAL_FILE, clock=clock)
    shot = make_shot("R1", "S0")
    store.down = True
    rows.record_pending(shot)
    store.down = False
    store.add_shot(shot)  # --resume rebuilt the analysed row from the raw record
    JournaledStore(store, tmp_path / JOURNAL_FILE, clock=clock)
    assert store.rows[("R1", "S0", 0, 0, 0)][0] == "done"


def test_unreachable_server_is_store_unavailable_without_sqlalchemy_link():
    store = ResultsStore("postgresql+psycopg://bench@127.0.0.1:1/db", create=False)
    with pytest.raises(StoreUnavailable) as caught:
        store.get_run("R1")
    assert "Background on this error" not in str(caught.value)
    assert "cannot be reached" in str(caught.value)


# -- real PostgreSQL server, stopped and started ------------------------------------------

DEVICES = "[SN0117-001, SN0117-002, SN0117-003, SN0117-004]"


def _options(sim, out, db, **kwargs):
    return RunOptions(out_dir=out, db_url=db, sim_resources=sim.resources, clock=sim.clock,
                      ratings_lookup=sim.ratings, show_progress=False, **kwargs)


def _check_rows(db: str, run_dir) -> list:
    """Every raw-record shot has exactly one analysed row, and no row is pending."""
    run = load_run(db, load_run(run_dir).run_id)
    assert not run.pending
    keys = [(s.serial, s.point.index, s.repeat, s.attempt) for s in run.shots]
    assert len(keys) == len(set(keys))
    with RawRecord(run_dir / RAW_FILE, "r") as raw:
        assert sorted(raw.keys()) == sorted(s.raw_ref.split("/", 1)[1] for s in run.shots)
    assert not (run_dir / JOURNAL_FILE).exists()
    return run.shots


def _comparable(shots):
    """The rows with what differs between two runs of one simulated lot left out."""
    return sorted((s.serial, s.point.index, s.repeat, s.attempt, s.valid,
                   tuple(sorted((k, v) for k, v in s.metrics.items())), s.flags)
                  for s in shots)


class Outage:
    """An ``on_stored`` hook: stops the server after ``after`` shots and starts it again
    ``seconds`` later; while it is down each shot takes ``pace`` s more (a real bench's
    pace, so the bench keeps testing through the outage)."""

    def __init__(self, cluster, after: int, seconds: float, pace: float):
        self.cluster, self.after, self.seconds, self.pace = cluster, after, seconds, pace
        self.stored = 0
        self.stopped_at: float | None = None
        self.restarted = False
        self.during = 0

    def __call__(self, _shot):
        self.stored += 1
        if self.stored == self.after:
            self.cluster.stop()
            self.stopped_at = time.monotonic()
        elif self.stopped_at is not None and not self.restarted:
            self.during += 1
            if time.monotonic() - self.stopped_at >= self.seconds:
                self.cluster.start()
                self.restarted = True
            else:
                time.sleep(self.pace)

    def ensure_started(self):
        if self.stopped_at is not None and not self.restarted:
            self.cluster.start()
            self.restarted = True


@pytest.mark.postgres
def test_a_30_second_outage_is_ridden_through(tmp_path, pg_cluster, postgres_url):
    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=12)
    outage = Outage(pg_cluster, after=4, seconds=30.0, pace=1.0)
    try:
        with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
            outcome = run_sequence(seq, BENCH, _options(
                sim, tmp_path / "through", postgres_url, on_stored=outage,
                db_outage_limit_s=90.0, db_backoff_s=(0.5, 2.0)))
    finally:
        outage.ensure_started()
    assert outcome.status == "complete", outcome.error
    assert outage.restarted and outage.during >= 20  # the bench kept testing while down
    shots = _check_rows(postgres_url, outcome.run_dir)
    assert len(shots) >= 48
    # the same lot tested without an outage: the same rows and grades
    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        calm = run_sequence(seq, BENCH, _options(sim, tmp_path / "calm", postgres_url))
    calm_shots = _check_rows(postgres_url, calm.run_dir)
    assert _comparable(shots) == _comparable(calm_shots)
    log_text = (outcome.run_dir / "run.log").read_text()
    assert "results database unreachable" in log_text
    assert "reachable again after" in log_text
    # the same grades (run ids aside): nothing lost, nothing counted twice
    limits, bench = load_limits(LIMITS), load_bench(BENCH)
    graded = [grade_lot(s, limits, bench=bench).to_dict() for s in (shots, calm_shots)]
    for item in graded:
        item.pop("run_ids")
    assert graded[0] == graded[1]


@pytest.mark.postgres
def test_an_outage_past_the_bound_stops_safely_and_resume_completes(tmp_path, pg_cluster,
                                                                    postgres_url):
    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=3)
    outage = Outage(pg_cluster, after=3, seconds=1e9, pace=0.5)
    out = tmp_path / "runs"
    try:
        with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
            with pytest.raises(DatabaseOutage) as caught:
                run_sequence(seq, BENCH, _options(sim, out, postgres_url, on_stored=outage,
                                                  db_outage_limit_s=3.0,
                                                  db_backoff_s=(0.2, 1.0)))
            assert not sim.bench.supply.output_on  # the safe state
    finally:
        outage.ensure_started()
    assert "Background on this error" not in str(caught.value)
    assert "--resume" in str(caught.value)
    run_dir = next(out.iterdir())
    assert (run_dir / JOURNAL_FILE).is_file()  # rows waiting for the database
    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        resumed = run_sequence(seq, BENCH, _options(sim, out, postgres_url, resume=True))
    assert resumed.status == "complete"
    shots = _check_rows(postgres_url, run_dir)
    assert {(s.serial, s.repeat) for s in shots if s.valid} == {
        (f"SN0117-00{d}", r) for d in range(1, 5) for r in range(3)}
    assert FLAG_ANALYSIS_PENDING not in {f for s in shots for f in s.flags}
    engine = create_engine(postgres_url)
    with engine.connect() as conn:
        count = conn.execute(text("SELECT count(*) FROM shots")).scalar()
    engine.dispose()
    assert count == len(shots)
