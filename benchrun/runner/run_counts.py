"""``run.json``'s shot counts (``counts``) over every session of a run.

A run may take several sessions: the start and each ``--resume`` after a crash or a stop.
Each session's :class:`~benchrun.runner.execute.RunOutcome` counts what that session did
only. The run's ``counts`` hold the run's totals, each by what it means:

``stored``, ``valid``
    the shot rows the run's results store holds for the run (``stored``; a row recorded
    before its analysis finished included), and those analysed and valid (``valid``). The
    store is the truth an auditor compares with: these are recounted from it when a session
    starts (after the shots a crash left in the raw record only were recovered) and when it
    ends, not summed over sessions (a sum would count twice a shot stored by one session
    and recovered by the next, and count a pending row the resume discarded and fired
    again). Between the two recounts they are the start's recount plus the session's own
    figures. ``recounted`` is false when the store could not be read at the end (an outage
    of the results database): the totals are then the earlier sessions' plus this one's.
``pending``
    (recounted only) of the ``stored`` rows, those recorded before their analysis finished
    (the next ``--resume`` analyses them from the raw record). The acceptance report's shots
    (:func:`~benchrun.store.rundata.load_run` ``shots``) are ``stored`` − ``pending``.
``recovered``, ``trim``
    summed over the sessions: the shots recovered from the raw record, and the trim shots
    fired (first-pulse and di/dt trims). Trim shots are stored nowhere but here, so each
    session's figure is kept and the run's is their sum.
``sessions``
    one entry per session, oldest first: ``session`` (0 for the run's start, *n* for its
    *n*-th resume: the *n*-th item of ``run.json`` ``resumes``), ``status`` (``running``
    when the session died without recording its end), and its own ``stored``, ``valid``
    (shots fired and stored by it), ``recovered``, ``trim`` and ``skipped`` (tests already
    complete when it started).

The counts are written to ``run.json`` when the session starts (once the shots a crash
left unfinished were recovered), after each trim shot it fires (:meth:`RunCounts.watch`),
after a shot it stores when the last write is :data:`STORED_WRITE_INTERVAL_S` old or older,
and at its end. So a process that dies without recording its end (``kill -9``, a power cut) leaves
every trim shot it fired for the resume to add (they are stored nowhere else), and its own
``stored`` and ``valid`` at most that interval old (the run's totals lose nothing: the
resume recounts them from the store). Each write is an atomic, synced ``run.json``; written
after every stored shot it added ~2.5 ms to the runner's overhead per shot on the critical
path (benchmarks/shot_overhead.py, whose goal is < 10 % of a ~35 ms acquisition), hence the
interval for stored shots.
"""

from __future__ import annotations

import copy
import logging
import math
import threading
import time
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.store.rundata import write_manifest

log = logging.getLogger("benchrun.runner")

#: the per-session figures of a session entry, in ``RunOutcome`` attribute order
SESSION_FIGURES = {"stored": "shots_stored", "valid": "shots_valid",
                   "recovered": "shots_recovered", "trim": "trim_shots",
                   "skipped": "shots_skipped"}
#: figures summed over the sessions for the run's total
SUMMED = ("recovered", "trim")
#: a shot stored writes the counts when the last write is this old or older, s
STORED_WRITE_INTERVAL_S = 1.0
#: ``RunOutcome`` fields whose change writes the counts at once
WRITTEN_AT_ONCE = frozenset({"trim_shots"})


def store_totals(store: Any, run_id: str) -> tuple[int, int, int]:
    """``(stored, valid, pending)``: the run's shot rows in the results store, those
    analysed and valid, and those recorded before their analysis finished (stored, not
    valid)."""
    shots = store.shots(run_id)
    return (len(shots), sum(1 for s in shots if s.valid and not s.pending),
            sum(1 for s in shots if s.pending))


def earlier_sessions(counts: dict[str, Any] | None, session: int) -> list[dict[str, Any]]:
    """The session entries of ``run.json`` ``counts`` before ``session``. Counts written
    before sessions were kept (no ``sessions`` list: the last session's figures only)
    become one entry for the session before ``session``, marked ``incomplete``."""
    if not counts:
        return []
    if "sessions" in counts:
        return [copy.deepcopy(e) for e in counts["sessions"] if e.get("session", 0) < session]
    entry = {k: counts[k] for k in SESSION_FIGURES if k in counts}
    return [{"session": max(session - 1, 0), **entry, "incomplete": True}]


def merge_counts(earlier: dict[str, Any] | None, entry: dict[str, Any],
                 totals: tuple[int, int, int] | None,
                 base: tuple[int, int, int] | None = None) -> dict[str, Any]:
    """The run's ``counts`` (module docstring) from ``earlier`` (``run.json`` ``counts``
    when the session started), the session's ``entry`` and ``totals`` (``(stored, valid,
    pending)`` recounted from the store now; None: the start's recount ``base`` plus the
    session's figures, or without ``base`` the earlier totals plus them). No argument is
    changed."""
    session = int(entry["session"])
    sessions = [*earlier_sessions(earlier, session), copy.deepcopy(entry)]
    merged: dict[str, Any] = {k: sum(int(e.get(k, 0)) for e in sessions) for k in SUMMED}
    if totals is not None:
        merged["stored"], merged["valid"] = int(totals[0]), int(totals[1])
        merged["pending"] = int(totals[2])
        merged["recounted"] = True
    else:
        if base is None:
            before = earlier or {}
            base = (int(before.get("stored", 0)) + int(entry.get("recovered", 0)),
                    int(before.get("valid", 0)) + int(entry.get("recovered", 0)))
        merged["stored"] = base[0] + int(entry.get("stored", 0))
        merged["valid"] = base[1] + int(entry.get("valid", 0))
        merged["recounted"] = False
    merged["sessions"] = sessions
    return merged


class RunCounts:
    """The shot counts of one session of a run, merged into ``run.json``.

    Created once the session's manifest is final in memory (``resumes`` appended on a
    resume); keeps what ``run.json`` held then as the earlier sessions' counts.
    """

    def __init__(self, run_dir: Path, manifest: dict[str, Any], outcome: Any, *,
                 stored_interval_s: float | None = None,
                 clock: Any = time.monotonic) -> None:
        self.run_dir = Path(run_dir)
        self.stored_interval_s = float(STORED_WRITE_INTERVAL_S if stored_interval_s is None
                                       else stored_interval_s)
        self._clock = clock
        self._written = -math.inf
        self.manifest = manifest
        self.outcome = outcome
        self.session = len(manifest.get("resumes") or [])
        self.earlier = copy.deepcopy(manifest.get("counts"))
        #: (stored, valid, pending) recounted from the store when the session started
        self.base: tuple[int, int, int] | None = None
        self.save_error: str | None = None
        self._lock = threading.Lock()

    def entry(self) -> dict[str, Any]:
        """This session's entry of ``counts`` ``sessions``."""
        figures = {k: int(getattr(self.outcome, name)) for k, name in SESSION_FIGURES.items()}
        return {"session": self.session, "status": self.outcome.status, **figures}

    def merged(self, store: Any = None,
               totals: tuple[int, int, int] | None = None) -> dict[str, Any]:
        """The run's ``counts`` now: recounted from ``store`` when given and readable (or
        with the ``totals`` just recounted)."""
        if store is not None and totals is None:
            try:
                totals = store_totals(store, self.outcome.run_id)
            except (BenchrunError, OSError) as exc:
                log.warning("the results store could not be read to count the run's shots "
                            "(run.json counts add this session's to the earlier ones): %s",
                            exc)
        return merge_counts(self.earlier, self.entry(), totals, self.base)

    def start(self, store: Any) -> None:
        """Recount the stored shots at the session's start (after the shots a crash left
        unfinished were recovered, before anything is fired) and write the counts."""
        try:
            self.base = store_totals(store, self.outcome.run_id)
        except (BenchrunError, OSError) as exc:
            log.warning("the results store could not be read to count the run's shots: %s",
                        exc)
        self.save(totals=self.base)

    def watch(self) -> None:
        """Write the counts as the session's figures change (module docstring)."""
        self.outcome.on_count = self.changed

    def changed(self, name: str) -> None:
        """``RunOutcome.name`` changed: write the counts now (a trim shot) or, for a stored
        shot, when the last write is the interval old."""
        if name in WRITTEN_AT_ONCE or \
                self._clock() - self._written >= self.stored_interval_s:
            self.save()

    def save(self, store: Any = None, totals: tuple[int, int, int] | None = None) -> None:
        """Write the merged counts to ``run.json`` now (arguments: :meth:`merged`). A
        failure (a full disk) is logged once and left to the end of the session, which
        writes them again."""
        with self._lock:
            self._written = self._clock()
            self.manifest["counts"] = self.merged(store, totals)
            try:
                write_manifest(self.run_dir, self.manifest)
            except (BenchrunError, OSError) as exc:
                if self.save_error is None:
                    log.warning("the shot counts could not be written to run.json now (they "
                                "are written again at the end of the run): %s", exc)
                self.save_error = str(exc)
