"""``run.json``'s di/dt control record (``didt_control``) over every session of a run.

A run may take several sessions: the start and each ``--resume`` after a crash or a stop.
Each session trims the di/dt points it fires afresh (:class:`~benchrun.runner.didt_trim.
DidtControl` starts empty), so its own record covers those points only. The run's record
keeps them all:

- a point controlled in one session only keeps that session's entry;
- a point controlled in several (a crash in the middle of its shots; a point left invalid,
  tried again on resume) has the latest session's entry as its entry, and every earlier
  session's entry, oldest first, under ``earlier``. The latest entry is the point's state
  (the setting its remaining shots were fired with, valid or not); the earlier ones are what
  the shots stored before the crash were fired with, and the trim shots they cost the device
  (an auditor tracing a stored shot back to the trim that set it up needs both).

Every entry carries ``session``: 0 for the run's start, *n* for its *n*-th resume (the
*n*-th item of ``run.json`` ``resumes``).

The record is written to ``run.json`` each time a trim or a graded miss changes it
(:meth:`DidtRecord.watch`), not only at the end of the session, so a process that dies
without recording its end (``kill -9``, a power cut) leaves it for the resume to merge.

``points_invalid`` (points not fired: their di/dt could not be set) is merged the same way:
an earlier session's entry stays unless this session controlled the point again.
"""

from __future__ import annotations

import copy
import logging
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.records import TestPoint
from benchrun.runner.didt_trim import DidtControl, PointDrive
from benchrun.store.rundata import write_manifest

log = logging.getLogger("benchrun.runner")

#: key of the session that wrote an entry (0: the start, n: the n-th resume)
SESSION = "session"
#: key of the earlier sessions' entries of a point, oldest first
EARLIER = "earlier"


def merge_didt_records(earlier: dict[str, Any] | None, current: dict[str, Any] | None,
                       session: int) -> dict[str, Any] | None:
    """The run's ``didt_control`` from the earlier sessions' (as ``run.json`` held it when
    ``session`` started) and ``session``'s own (:meth:`DidtControl.record`); see the module
    docstring. Neither argument is changed."""
    if current is None:
        return copy.deepcopy(earlier)
    merged = {**copy.deepcopy(earlier or {}),
              **{k: copy.deepcopy(v) for k, v in current.items() if k != "points"}}
    points: dict[str, Any] = copy.deepcopy((earlier or {}).get("points") or {})
    for index, entry in current.get("points", {}).items():
        latest = {**copy.deepcopy(entry), SESSION: session}
        before = points.get(index)
        if before is not None:
            older = before.pop(EARLIER, [])
            latest[EARLIER] = [*older, before]
        points[index] = latest
    merged["points"] = {k: points[k] for k in sorted(points, key=_point_order)}
    return merged


def merge_points_invalid(earlier: dict[str, str] | None, current: dict[int, str],
                         controlled: set[str]) -> dict[str, str]:
    """``run.json`` ``points_invalid`` over the sessions: the earlier sessions' entries of the
    points this session did not control again (``controlled``: point indices as text), then
    this session's ``current``."""
    merged = {k: v for k, v in (earlier or {}).items() if k not in controlled}
    merged.update({str(k): v for k, v in current.items()})
    return {k: merged[k] for k in sorted(merged, key=_point_order)}


def _point_order(key: str) -> tuple[int, str]:
    return (int(key), "") if key.isdigit() else (1 << 62, key)


class DidtRecord:
    """The di/dt control record of one session of a run, merged into ``run.json``.

    Created once the session's manifest is final in memory (``resumes`` appended on a
    resume); keeps what ``run.json`` held then as the earlier sessions' record.
    """

    def __init__(self, run_dir: Path, manifest: dict[str, Any]) -> None:
        self.run_dir = Path(run_dir)
        self.manifest = manifest
        self.session = len(manifest.get("resumes") or [])
        self.earlier = copy.deepcopy(manifest.get("didt_control"))
        self.earlier_invalid = dict(manifest.get("points_invalid") or {})
        self.control: DidtControl | None = None
        self.save_error: str | None = None

    def watch(self, control: DidtControl) -> RecordedDidtControl:
        """A control like ``control`` (same means, tolerance and trim budget; nothing trimmed
        yet) whose every change is written to ``run.json`` at once."""
        recorded = RecordedDidtControl(control.gate, control.tolerance,
                                       max_trims=control.max_trims, on_change=self.save)
        self.control = recorded
        return recorded

    def merged(self) -> dict[str, Any] | None:
        """The run's ``didt_control`` so far (None: no session controlled a di/dt)."""
        current = self.control.record() if self.control is not None and self.control.points \
            else None
        return merge_didt_records(self.earlier, current, self.session)

    def points_invalid(self, current: dict[int, str]) -> dict[str, str]:
        """The run's ``points_invalid`` given this session's ``current``."""
        controlled = set() if self.control is None else {str(i) for i in self.control.points}
        return merge_points_invalid(self.earlier_invalid, current, controlled)

    def save(self) -> None:
        """Write the merged record to ``run.json`` now. A failure (a full disk) is logged
        once and left to the end of the session, which writes the record again."""
        record = self.merged()
        if record is None:
            return
        self.manifest["didt_control"] = record
        try:
            write_manifest(self.run_dir, self.manifest)
        except (BenchrunError, OSError) as exc:
            if self.save_error is None:
                log.warning("the di/dt control record could not be written to run.json "
                            "now (it is written again at the end of the run): %s", exc)
            self.save_error = str(exc)


class RecordedDidtControl(DidtControl):
    """:class:`DidtControl` that calls ``on_change()`` after every trim and graded miss."""

    def __init__(self, *args: Any, on_change: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._on_change = on_change

    def trim(self, point: TestPoint, fire: Any) -> PointDrive:
        state = super().trim(point, fire)
        self._on_change()
        return state

    def missed(self, point: TestPoint, measured: float | None) -> bool:
        retry = super().missed(point, measured)
        self._on_change()
        return retry
