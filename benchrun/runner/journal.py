"""Riding through a results-database outage: shot rows wait in a local journal.

While the results database server cannot be reached
(:class:`~benchrun.errors.StoreUnavailable`), the bench keeps testing for a bounded time:
every shot is already durable in the raw record; its rows (the pending row at the fire, the
analysed row after the analysis) are appended to ``<run_dir>/rows-journal.jsonl`` (one JSON
object per line, flushed and ``fsync``-ed before the call returns) instead of the database.
Reconnection is tried with exponential backoff (each row written in the meantime goes
straight to the journal); once the server answers, the journal is written to the database in
order, exactly once per shot identity (the store's unique ``(run_id, serial, point_index,
repeat, attempt)``: a pending row replaces a pending row, an analysed row replaces its
pending row or is found already there), and then emptied.

Past the bound (``RunOptions.db_outage_limit_s``, ``benchrun run --db-outage-limit``) the
next row raises :class:`DatabaseOutage`: the run stops in the safe state like after any
error, the journal stays, and ``benchrun run ... --resume`` writes it and continues (the raw
record alone would also do: ``--resume`` rebuilds missing rows from it).
"""

from __future__ import annotations

import json
import logging
import os
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from benchrun.errors import StoreError, StoreUnavailable
from benchrun.records import ShotResult

log = logging.getLogger("benchrun.runner")

#: The journal's file name in the run folder.
JOURNAL_FILE = "rows-journal.jsonl"

#: Default bound of an outage the bench rides through (s).
DEFAULT_OUTAGE_LIMIT_S = 600.0
#: First wait before trying the database again, and the longest wait (s).
BACKOFF_INITIAL_S = 0.5
BACKOFF_MAX_S = 5.0


class DatabaseOutage(StoreError):
    """The results database stayed unreachable longer than the run's outage bound."""


class RowJournal:
    """An append-only JSON-lines file of shot rows waiting for the database."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    def append(self, op: str, shot: ShotResult) -> None:
        """Append one row (``op`` ``"pending"`` or ``"complete"``), synced to disk."""
        line = json.dumps({"op": op, "shot": shot.to_dict()}, sort_keys=True,
                          allow_nan=True) + "\n"
        try:
            with open(self.path, "a", encoding="utf-8") as fh:
                fh.write(line)
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            raise StoreError(f"cannot write the row journal {self.path}: {exc}") from exc

    def entries(self) -> list[tuple[str, ShotResult]]:
        """Every row in the journal, oldest first (a torn last line, from a crash during
        its append, is left out: that row's shot is rebuilt from the raw record)."""
        if not self.path.is_file():
            return []
        out = []
        for line in self.path.read_text(encoding="utf-8").splitlines():
            try:
                item = json.loads(line)
            except json.JSONDecodeError:
                continue
            out.append((str(item["op"]), ShotResult.from_dict(item["shot"])))
        return out

    def clear(self) -> None:
        """Remove the journal (every row it held is in the database)."""
        self.path.unlink(missing_ok=True)


def _identity(shot: ShotResult) -> tuple[str, str, int, int, int]:
    return (shot.run_id, shot.serial, int(shot.point.index), int(shot.repeat),
            int(shot.attempt))


class JournaledStore:
    """The shot-row writes of a run (``record_pending``, ``complete_shot``) through a
    journal while the database cannot be reached (module docstring).

    Parameters
    ----------
    store
        The :class:`~benchrun.store.results.ResultsStore` the rows go to.
    journal_path
        The journal file (``<run_dir>/rows-journal.jsonl``); rows already in it (a run that
        stopped during an outage) are written first.
    outage_limit_s
        How long the database may stay unreachable before the run stops.
    backoff_initial_s, backoff_max_s
        First and longest wait between reconnection attempts (doubling in between).
    clock
        Monotonic time source (seconds).
    """

    def __init__(self, store: Any, journal_path: str | Path, *,
                 outage_limit_s: float = DEFAULT_OUTAGE_LIMIT_S,
                 backoff_initial_s: float = BACKOFF_INITIAL_S,
                 backoff_max_s: float = BACKOFF_MAX_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.store = store
        self.journal = RowJournal(journal_path)
        self.outage_limit_s = float(outage_limit_s)
        self.backoff_initial_s = float(backoff_initial_s)
        self.backoff_max_s = float(backoff_max_s)
        self._clock = clock
        self._lock = threading.RLock()
        self._backlog = len(self.journal.entries())
        self._down_since: float | None = None
        self._next_try = 0.0
        self._wait = self.backoff_initial_s
        #: rows written to the journal during this run, and outages ridden through
        self.journaled = 0
        self.outages: list[float] = []
        if self._backlog:  # left by a run that stopped during an outage: written first
            self._drain(force=True)

    # -- the store's write calls ---------------------------------------------------------
    def record_pending(self, shot: ShotResult) -> None:
        self._write("pending", shot)

    def complete_shot(self, shot: ShotResult) -> bool:
        self._write("complete", shot)
        return True

    def __getattr__(self, name: str) -> Any:  # every other call goes to the store
        return getattr(self.store, name)

    @property
    def backlog(self) -> int:
        """Rows waiting in the journal."""
        return self._backlog

    # -- internals -----------------------------------------------------------------------
    def _write(self, op: str, shot: ShotResult) -> None:
        with self._lock:
            if self._backlog and not self._drain():
                self._journal(op, shot)
                return
            try:
                self._apply(op, shot)
            except StoreUnavailable as exc:
                self._went_down(exc)
                self._journal(op, shot)

    def _journal(self, op: str, shot: ShotResult) -> None:
        self._check_bound()
        self.journal.append(op, shot)
        self._backlog += 1
        self.journaled += 1

    def _apply(self, op: str, shot: ShotResult, *, replay: bool = False) -> None:
        if op == "pending":
            try:
                self.store.record_pending(shot)
            except StoreUnavailable:
                raise
            except StoreError:
                if not replay:
                    raise
                # replayed after the run was resumed: the shot's analysed row is already
                # there (rebuilt from the raw record), so its pending row is not needed
            return
        try:
            self.store.complete_shot(shot)
        except StoreUnavailable:
            raise
        except StoreError:
            # no pending row under its identity (its pending row was never committed): the
            # analysed row goes in whole; add_shot finds an identical row already there, and
            # refuses a different one
            self.store.add_shot(shot)

    def _went_down(self, exc: StoreError) -> None:
        now = self._clock()
        if self._down_since is None:
            self._down_since = now
            self._wait = self.backoff_initial_s
            log.warning("results database unreachable; shot rows wait in %s (up to %.0f s): "
                        "%s", self.journal.path, self.outage_limit_s, exc)
        self._next_try = now + self._wait
        self._wait = min(self._wait * 2.0, self.backoff_max_s)

    def _check_bound(self) -> None:
        if self._down_since is None:
            return
        down = self._clock() - self._down_since
        if down > self.outage_limit_s:
            raise DatabaseOutage(
                f"the results database at {self.store.public_url} has been unreachable for "
                f"{down:.0f} s, longer than the outage limit of {self.outage_limit_s:.0f} s: "
                f"the run stopped; every shot is in the raw record and {self._backlog} row(s) "
                f"wait in {self.journal.path}; once the database is back, 'benchrun run "
                "SEQUENCE --bench BENCH --resume' writes them and continues")

    def _drain(self, *, force: bool = False) -> bool:
        """Write the journal to the database, in order, when a reconnection is due; True
        when it is empty afterwards."""
        if not force and self._clock() < self._next_try:
            return False
        entries = self.journal.entries()
        # the last row of each shot identity is the one that counts (a pending row is
        # replaced by its analysed row, or by the pending row of a shot fired again)
        last: dict[tuple[str, str, int, int, int], int] = {}
        for index, (_op, shot) in enumerate(entries):
            last[_identity(shot)] = index
        try:
            for index, (op, shot) in enumerate(entries):
                if last[_identity(shot)] == index:
                    self._apply(op, shot, replay=True)
        except StoreUnavailable as exc:
            self._went_down(exc)
            return False
        if self._down_since is not None:
            self.outages.append(self._clock() - self._down_since)
            log.warning("results database reachable again after %.1f s: %d journaled row(s) "
                        "written", self.outages[-1], len(entries))
        self.journal.clear()
        self._backlog = 0
        self._down_since = None
        self._wait = self.backoff_initial_s
        return True

    def finish(self, sleep: Callable[[float], None] = time.sleep) -> None:
        """Write what waits in the journal before the run ends: retry with backoff until the
        journal is empty, or raise :class:`DatabaseOutage` past the outage bound."""
        with self._lock:
            while self._backlog:
                if self._drain():
                    return
                self._check_bound()
                sleep(max(0.05, self._next_try - self._clock()))
