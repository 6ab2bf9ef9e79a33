"""Storing and analysing captured shots on one background thread, in the order fired.

The shot cycle hands every capture to :class:`ShotWriter` and goes on preparing the next
shot (device check, bus read-back, temperature) while the worker thread

1. writes the shot to the raw record and makes it durable (the run's durability mode),
2. has recorded it in the results DB as *pending*: its identity, raw reference, timestamp
   and bus voltage, with the single flag :data:`~benchrun.records.FLAG_ANALYSIS_PENDING`,
   committed. The cycle asks for this row the moment the shot fires
   (:meth:`ShotWriter.record_fired`), so it is written on a second thread while the scope
   acquires; it names the raw reference before the raw entry is linked, and both must be
   done before the shot counts as stored. A crash in between can leave a pending row whose
   raw entry never became visible: ``--resume`` discards that row and fires the test again
   (the shot was in flight; nothing stored is lost).

The shot is then *stored*. The cycle waits for that (:meth:`ShotWriter.wait_stored`) before
it fires the next shot, so every shot is in the raw record and in the results DB before the
next one fires. The worker goes on:

3. analyses the shot and checks its measured conditions
   (:func:`benchrun.runner.shots.build_result`),
4. replaces the pending row by the analysed shot (:meth:`ResultsStore.complete_shot`).

Steps 3 and 4 wait until the next shot has fired (:meth:`ShotWriter.release`, called by the
cycle the moment the pulse source fires; or until the result is asked for), so they run
while the scope acquires and do not compete with the cycle's own instrument round trips
before the fire for the interpreter. The cycle reads the analysed result
(:meth:`ShotTicket.result`) before it decides on a retry. A crash between steps 2 and 4 leaves a
pending row, which ``--resume`` completes from the raw record before it fires anything
(the same path as a shot that reached only the raw record).

A failure of the worker (a store error) is raised in the cycle's thread by the next
:meth:`ShotWriter.wait_stored` or :meth:`ShotTicket.result`; the run then ends in the safe
state like any other error.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import wait as futures_wait
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from benchrun.records import FLAG_ANALYSIS_PENDING, ShotResult
from benchrun.runner.shots import ShotContext, build_result, shot_key
from benchrun.store.raw import shot_ref

if TYPE_CHECKING:
    from benchrun.analysis import ChannelData, ProbeCalibration
    from benchrun.config.sequence import SequenceConfig
    from benchrun.store.raw import RawRecord
    from benchrun.store.results import ResultsStore

log = logging.getLogger("benchrun.runner")


@dataclass(frozen=True)
class CapturedShot:
    """One capture as fired, with everything the raw record and the analysis need; ``row``
    is the future of its pending results row (:meth:`ShotWriter.record_fired`)."""

    key: str
    context: ShotContext
    t_start: float
    dt: float
    channels: Mapping[str, ChannelData]
    probes: Mapping[str, ProbeCalibration]
    settings: dict[str, Any]
    row: Future[None] | None = None


@dataclass
class ShotTicket:
    """Progress of one submitted shot: *stored* (raw record and DB) and *analysed*."""

    shot: CapturedShot
    index: int = 0
    writer: ShotWriter | None = None
    stored: Future[str] = field(default_factory=Future)
    analysed: Future[ShotResult] = field(default_factory=Future)

    def wait_stored(self) -> str:
        """Block until the shot is durable in the raw record and recorded in the DB; returns
        its raw reference. Raises the worker's error."""
        return self.stored.result()

    def result(self) -> ShotResult:
        """Block until the shot is analysed and its DB row completed (its analysis is
        released now if it was not yet). Raises the worker's error."""
        if self.writer is not None:
            self.writer.release(self.index)
        return self.analysed.result()


def pending_result(context: ShotContext, raw_ref: str) -> ShotResult:
    """The DB row of a shot recorded before its analysis: no metrics, not valid, flagged."""
    return ShotResult(
        run_id=context.run_id, part=context.part, lot=context.lot, serial=context.serial,
        point=context.point, repeat=context.repeat, attempt=context.attempt,
        timestamp=context.timestamp,
        conditions={"if_A": None, "didt_A_per_s": None, "vr_V": None,
                    "temperature_K": context.temperature_K},
        metrics={}, flags=(FLAG_ANALYSIS_PENDING,), valid=False, raw_ref=raw_ref,
    )  # fmt: skip


class ShotWriter:
    """Stores, then analyses, submitted shots on one worker thread (module docstring).

    Parameters
    ----------
    raw, store
        The run's raw record and results store; while shots are in flight only the worker
        writes to them.
    sequence
        The run's sequence (analysis options and condition tolerances).
    """

    def __init__(self, raw: RawRecord, store: ResultsStore, sequence: SequenceConfig) -> None:
        self.raw = raw
        self.store = store
        self.sequence = sequence
        self._worker = ThreadPoolExecutor(max_workers=1, thread_name_prefix="shot-writer")
        self._rows = ThreadPoolExecutor(max_workers=1, thread_name_prefix="shot-rows")
        self._last: ShotTicket | None = None
        self._submitted = 0
        self._released = -1  # shots up to this index may be analysed
        self._gate = threading.Condition()

    def record_fired(self, context: ShotContext) -> Future[None]:
        """Commit the pending row of a shot that has just fired (on the rows thread); pass
        the returned future as ``CapturedShot.row``."""
        pending = pending_result(context, shot_ref(self._key(context)))
        return self._rows.submit(self.store.record_pending, pending)

    @staticmethod
    def _key(context: ShotContext) -> str:
        return shot_key(context.point.index, context.serial, context.repeat, context.attempt)

    def submit(self, shot: CapturedShot) -> ShotTicket:
        """Queue a shot; returns at once."""
        ticket = ShotTicket(shot, self._submitted, self)
        self._submitted += 1
        self._worker.submit(self._work, ticket)
        self._last = ticket
        return ticket

    def release(self, upto: int | None = None) -> None:
        """Let the analysis of every shot submitted so far (or up to index ``upto``) start."""
        with self._gate:
            last = self._submitted - 1 if upto is None else upto
            if last > self._released:
                self._released = last
                self._gate.notify_all()

    def wait_stored(self) -> None:
        """Block until every submitted shot is stored (shots are handled in order)."""
        if self._last is not None:
            self._last.wait_stored()

    def close(self) -> None:
        """Finish every submitted shot (stored and analysed), then stop the worker. Errors
        stay with the tickets."""
        self.release()
        self._worker.shutdown(wait=True)
        self._rows.shutdown(wait=True)

    def _work(self, ticket: ShotTicket) -> None:
        shot = ticket.shot
        row: Future[Any] | None = shot.row
        try:
            attrs = shot.context.attrs(shot.settings)
            ref = shot_ref(shot.key)
            if row is None:
                row = self._rows.submit(self.store.record_pending,
                                        pending_result(shot.context, ref))
            written = self.raw.append_shot(shot.key, shot.t_start, shot.dt, shot.channels,
                                           shot.probes, attrs)
            assert written == ref
            row.result()
        except BaseException as exc:  # handed to the cycle's thread
            if row is not None:
                futures_wait((row,))
            ticket.stored.set_exception(exc)
            ticket.analysed.set_exception(exc)
            return
        ticket.stored.set_result(ref)
        with self._gate:
            self._gate.wait_for(lambda: self._released >= ticket.index)
        try:
            result = build_result(shot.context, shot.t_start, shot.dt, shot.channels,
                                  shot.probes, self.sequence, ref)
            self.store.complete_shot(result)
        except BaseException as exc:  # handed to the cycle's thread
            log.error("shot %s: analysis or its DB row failed: %s", shot.key, exc)
            ticket.analysed.set_exception(exc)
            return
        ticket.analysed.set_result(result)
