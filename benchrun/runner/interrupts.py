"""Stop signals, the bounded safe-state procedure and the space kept for the end of a run.

:class:`StopSignals` turns the first SIGINT or SIGTERM into an exception that stops the run
(the runner then brings the bench to the safe state); every later SIGINT or SIGTERM — a
process manager commonly sends more than one — is *deferred*: it is recorded and the
procedure that brings the bench to the safe state, records the outcome and prints it carries
on to its end. Only ``kill -9`` (which no program can catch) or a power cut stop it; the
README's safety section says what a hardware interlock must do then.

:func:`bounded` runs the safe-state procedure on its own thread with a hard wall-clock bound,
so a hung instrument connection cannot keep the runner from reporting: past the bound the
report says the safe state was not confirmed.

:class:`SpaceReserve` keeps a small file in the run folder from the start of a run and gives
its space back when the disk fills, so the end of the run (status, safe state) can still be
recorded in ``run.json`` and the results database.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import Any

from benchrun.runner.safety import SafeStateReport

log = logging.getLogger("benchrun.runner")

#: The signals that stop a run (and are deferred while it is being made safe).
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)

#: Name of the reserve file in the run folder (removed when the run ends).
RESERVE_FILE = ".space-reserve"
#: Bytes kept for the end-of-run records (manifest a few kB, results DB journal pages).
RESERVE_BYTES = 1 << 20


class Terminated(KeyboardInterrupt):
    """SIGTERM (or SIGINT), handled like Ctrl-C: safe state, then stop."""


class StopSignals:
    """SIGINT and SIGTERM handlers for the length of a run (main thread only).

    The first signal raises :class:`Terminated` in the main thread; once :meth:`defer` was
    called — or after that first signal — every further one is only recorded in
    :attr:`deferred`.
    """

    def __init__(self) -> None:
        self.received: list[int] = []
        self.deferred: list[int] = []
        self.deferring = False
        self._previous: dict[int, Any] = {}

    def install(self) -> StopSignals:
        if threading.current_thread() is threading.main_thread():
            for signum in STOP_SIGNALS:
                self._previous[signum] = signal.signal(signum, self._handle)
        return self

    def restore(self) -> None:
        for signum, previous in self._previous.items():
            signal.signal(signum, previous)
        self._previous.clear()
        if self.deferred:
            names = ", ".join(signal.Signals(s).name for s in self.deferred)
            log.warning("%s received while the bench was being made safe: deferred until "
                        "the safe state was reached and recorded", names)

    def defer(self) -> None:
        """From now on signals are recorded, not raised."""
        self.deferring = True

    def _handle(self, signum: int, frame: FrameType | None) -> None:
        self.received.append(signum)
        if self.deferring:
            self.deferred.append(signum)
            return
        self.deferring = True  # the run is stopping: a second signal must not cut it short
        raise Terminated(f"signal {signal.Signals(signum).name}")


def bounded(procedure: Callable[[], SafeStateReport], bound_s: float) -> SafeStateReport:
    """Run ``procedure`` (a safe-state procedure) with a wall-clock bound of ``bound_s``.

    Past the bound, a report saying the safe state was not confirmed is returned and the
    procedure is left to finish on its (daemon) thread.
    """
    box: dict[str, Any] = {}

    def target() -> None:
        try:
            box["report"] = procedure()
        except BaseException as exc:  # the safe state never raises; report anything that does
            box["error"] = exc

    thread = threading.Thread(target=target, name="safe-state", daemon=True)
    thread.start()
    thread.join(bound_s)
    if "report" in box:
        return box["report"]
    report = SafeStateReport()
    if "error" in box:
        report.problems.append(f"safe-state procedure failed: {box['error']}")
    else:
        report.problems.append(f"safe-state procedure did not finish within {bound_s:.0f} s "
                               "(an instrument does not answer)")
    log.critical(report.describe())
    return report


class SpaceReserve:
    """A file of :data:`RESERVE_BYTES` in the run folder, released when the disk fills."""

    def __init__(self, run_dir: Path) -> None:
        self.path = Path(run_dir) / RESERVE_FILE
        try:
            with open(self.path, "wb") as fh:
                fh.write(b"\0" * RESERVE_BYTES)
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            log.warning("no space could be reserved for the end of the run: %s", exc)
            self.release()

    def release(self) -> bool:
        """Give the space back; True when there was any to give."""
        try:
            self.path.unlink()
        except FileNotFoundError:
            return False
        except OSError:
            return False
        return True
