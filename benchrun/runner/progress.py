"""Progress display (rich) and the per-run log file.

The display shows the device, temperature and shot being fired, shots done out of the
total and an ETA; the log file ``run.log`` in the run folder keeps every step with a UTC
time stamp, appended to on resume.
"""

from __future__ import annotations

import contextlib
import logging
import sys
import time
from pathlib import Path
from types import TracebackType

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

LOGGER_NAME = "benchrun"


class _UTCFormatter(logging.Formatter):
    converter = time.gmtime


class RunLogHandler(logging.FileHandler):
    """The run log file. A write that fails (disk full, file too large, I/O error) prints one
    line on standard error instead of logging's traceback, and the file is written no more:
    the run goes on (the shots, the results database and the safe state do not depend on
    it). :attr:`failure` says why it stopped (None while it works)."""

    failure: str | None = None

    def emit(self, record: logging.LogRecord) -> None:
        if self.failure is None:
            super().emit(record)

    def handleError(self, record: logging.LogRecord) -> None:  # noqa: N802 (logging API)
        exc = sys.exc_info()[1]
        if self.failure is not None:
            return
        self.failure = str(exc) if exc is not None else "write failed"
        with contextlib.suppress(OSError, ValueError):
            print(f"benchrun: the run log {self.baseFilename} cannot be written "
                  f"({self.failure}); the run goes on without it", file=sys.stderr)
        with contextlib.suppress(OSError, ValueError):
            self.close()

    def close(self) -> None:
        try:
            super().close()
        except OSError as exc:  # the last flush on a full disk
            if self.failure is None:
                self.failure = str(exc)


def open_run_log(path: str | Path, level: int = logging.INFO) -> RunLogHandler:
    """Attach a file handler writing to ``path`` (appending) to the ``benchrun`` logger.

    Returns the handler (a :class:`RunLogHandler`); pass it to :func:`close_run_log` when
    the run ends.
    """
    handler = RunLogHandler(path, mode="a", encoding="utf-8")
    handler.setLevel(level)
    handler.setFormatter(_UTCFormatter("%(asctime)sZ %(levelname)-8s %(message)s",
                                       datefmt="%Y-%m-%dT%H:%M:%S"))
    logger = logging.getLogger(LOGGER_NAME)
    logger.addHandler(handler)
    if logger.level == logging.NOTSET or logger.level > level:
        logger.setLevel(level)
    return handler


def close_run_log(handler: logging.Handler) -> None:
    """Detach and close a handler from :func:`open_run_log`."""
    logging.getLogger(LOGGER_NAME).removeHandler(handler)
    handler.close()


class RunProgress:
    """Live progress of a run; a silent stand-in when ``enabled`` is False.

    Parameters
    ----------
    total
        Shots planned in the whole run.
    done
        Shots already complete (a resumed run).
    enabled
        Show the display (on standard error).
    """

    def __init__(self, total: int, done: int = 0, *, enabled: bool = True,
                 console: Console | None = None) -> None:
        self.total = total
        self.done = done
        self.enabled = enabled
        self._progress: Progress | None = None
        self._task: TaskID | None = None
        self._console = console or Console(stderr=True, file=sys.stderr)
        self._text = "starting"

    def __enter__(self) -> RunProgress:
        if self.enabled:
            self._progress = Progress(
                TextColumn("{task.description}"),
                BarColumn(bar_width=20),
                MofNCompleteColumn(),
                TextColumn("shots"),
                TimeElapsedColumn(),
                TextColumn("ETA"),
                TimeRemainingColumn(),
                console=self._console,
                transient=False,
            )
            self._progress.start()
            self._task = self._progress.add_task(self._text, total=self.total,
                                                 completed=self.done)
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        if self._progress is not None:
            self._progress.stop()
            self._progress = None

    def status(self, text: str) -> None:
        """Show what is happening now (e.g. waiting for a temperature)."""
        self._text = text
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, description=text)

    def shooting(self, serial: str, temperature_K: float, label: str) -> None:
        """Show the shot about to be fired."""
        self.status(f"{serial}  {temperature_K - 273.15:6.1f} °C  {label}")

    def advance(self, count: int = 1) -> None:
        """Count completed shots."""
        self.done += count
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, completed=self.done)

    def print(self, text: str) -> None:
        """A line above the live display (warnings, safe-state report)."""
        if self.enabled:
            self._console.print(text)
