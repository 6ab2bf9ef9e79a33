"""Storing and analysing shots beside the acquisition of the next one.

A shot is *stored* when it is durable in the raw record and recorded in the results DB; the
shot cycle fires the next shot only once the previous one is stored
(:meth:`ShotWriter.wait_stored`). The work is split so that little of it stands between two
shots:

1. The moment a shot fires, its *pending* results row is committed on the rows thread
   (:meth:`ShotWriter.record_fired`): identity, raw reference, timestamp, bus voltage, the
   single flag :data:`~benchrun.records.FLAG_ANALYSIS_PENDING`, not valid, no metrics. This
   runs while the scope acquires.
2. Once the capture is read, the cycle writes it to the raw record itself
   (``RawRecord.append_shot(..., wait=False)``: handed to the operating system at once; the
   ``fsync`` of "power-loss" mode runs on the record's own thread while the next shot is
   prepared and armed) and hands the shot to :meth:`ShotWriter.submit`.
3. :meth:`ShotWriter.wait_stored`, just before the next fire, waits for that ``fsync`` and for
   the pending row.
4. The writer thread analyses the shot and checks its measured conditions
   (:func:`benchrun.runner.shots.build_result`), then replaces the pending row by the analysed
   shot (:meth:`ResultsStore.complete_shot`). It starts when the next shot fires
   (:meth:`ShotWriter.release`, called by the cycle at the fire; or when the result is asked
   for), so it runs while the scope acquires, not beside the cycle's own round trips. The
   cycle reads the analysed result (:meth:`ShotTicket.result`) before it decides on a retry.

Crash safety: a crash after step 1 but before the raw entry became visible leaves a pending
row without raw data: ``--resume`` discards it and fires that test again (the shot was in
flight; nothing stored is lost). A crash between steps 2 and 4 leaves a pending row (or, if
the row was rolled back, only the raw entry): ``--resume`` analyses the raw entry and
completes the row before it fires anything (``ShotCycle.recover_orphans``).

A failure of either thread (a store error) is raised in the cycle's thread by the next
:meth:`ShotWriter.wait_stored` or :meth:`ShotTicket.result`; the run then ends in the safe
state like any other error.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

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
    """One capture as fired and written to the raw record (``raw_ref``), with what the
    analysis needs; ``row`` is the future of its pending results row
    (:meth:`ShotWriter.record_fired`)."""

    raw_ref: str
    context: ShotContext
    t_start: float
    dt: float
    channels: Mapping[str, ChannelData]
    probes: Mapping[str, ProbeCalibration]
    row: Future[None]


@dataclass
class ShotTicket:
    """Progress of one submitted shot: its row recorded (*stored*, with the raw record's
    sync) and *analysed*."""

    shot: CapturedShot
    index: int = 0
    writer: ShotWriter | None = None
    stored: Future[str] = field(default_factory=Future)
    analysed: Future[ShotResult] = field(default_factory=Future)

    def result(self) -> ShotResult:
        """Block until the shot is analysed and its DB row completed (its analysis is
        released now if it was not yet). Raises the worker's error."""
        if self.writer is not None:
            self.writer.release(self.index)
        return self.analysed.result()


def pending_result(context: ShotContext, raw_ref: str) -> ShotResult:
    """The DB row of a shot recorded before its analysis: no metrics, not valid, flagged."""
    return ShotResult(
        **context.identity(),
        conditions={"if_A": None, "didt_A_per_s": None, "vr_V": None,
                    "temperature_K": context.temperature_K},
        metrics={}, flags=(FLAG_ANALYSIS_PENDING,), valid=False, raw_ref=raw_ref,
    )  # fmt: skip


def raw_ref_of(context: ShotContext) -> str:
    """The raw reference of a shot: ``shots/<shot_key>``."""
    return shot_ref(shot_key(context.point.index, context.serial, context.repeat,
                             context.attempt))


class ShotWriter:
    """Records pending rows, then analyses submitted shots, each on its own thread (module
    docstring).

    Parameters
    ----------
    raw, store
        The run's raw record (the cycle writes it; :meth:`wait_stored` waits for its sync) and
        the results store the rows go to.
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
        pending = pending_result(context, raw_ref_of(context))
        return self._rows.submit(self.store.record_pending, pending)

    def submit(self, shot: CapturedShot) -> ShotTicket:
        """Queue a shot written to the raw record for its analysis; returns at once."""
        ticket = ShotTicket(shot, self._submitted, self)
        self._submitted += 1
        self._worker.submit(self._work, ticket)
        self._last = ticket
        return ticket

    def release(self, upto: int | None = None) -> None:
        """Let the analysis of every shot submitted so far (or up to index ``upto``)
        start."""
        with self._gate:
            last = self._submitted - 1 if upto is None else upto
            if last > self._released:
                self._released = last
                self._gate.notify_all()

    def wait_stored(self) -> None:
        """Block until every submitted shot is stored: durable in the raw record (its sync
        in "power-loss" mode) and its pending row committed."""
        self.raw.wait_durable()
        if self._last is not None:
            self._last.stored.result()

    def close(self) -> None:
        """Finish every submitted shot (stored and analysed), then stop both threads. Errors
        stay with the tickets."""
        self.release()
        self._worker.shutdown(wait=True)
        self._rows.shutdown(wait=True)

    def _work(self, ticket: ShotTicket) -> None:
        shot = ticket.shot
        try:
            shot.row.result()
        except BaseException as exc:  # handed to the cycle's thread
            ticket.stored.set_exception(exc)
            ticket.analysed.set_exception(exc)
            return
        ticket.stored.set_result(shot.raw_ref)
        with self._gate:
            self._gate.wait_for(lambda: self._released >= ticket.index)
        try:
            result = build_result(shot.context, shot.t_start, shot.dt, shot.channels,
                                  shot.probes, self.sequence, shot.raw_ref)
            self.store.complete_shot(result)
        except BaseException as exc:  # handed to the cycle's thread
            log.error("shot %s: analysis or its DB row failed: %s", shot.raw_ref, exc)
            ticket.analysed.set_exception(exc)
            return
        ticket.analysed.set_result(result)
