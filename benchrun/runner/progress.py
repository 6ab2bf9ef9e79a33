"""Progress display (rich) and the per-run log file.

The display shows the device, temperature and shot being fired, shots done out of the
total and an ETA; the log file ``run.log`` in the run folder keeps every step with a UTC
time stamp, appended to on resume. With a :class:`~benchrun.store.live.LivePublisher` the same
progress, the last shot's waveform and every log line go to the results store, where
``benchrun serve`` shows them (:func:`start_live`).
"""

from __future__ import annotations

import contextlib
import logging
import sys
import time
from pathlib import Path
from types import TracebackType
from typing import Any

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
    live
        Publishes the progress through the results store (:func:`start_live`), or ``None``.
    """

    def __init__(self, total: int, done: int = 0, *, enabled: bool = True,
                 console: Console | None = None, live: LiveReport | None = None) -> None:
        self.live = live
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
        if self.live is not None:
            self.live.publisher.status(text)
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, description=text)

    def shooting(self, serial: str, temperature_K: float, label: str) -> None:
        """Show the shot about to be fired."""
        if self.live is not None:
            self.live.publisher.shooting(serial, temperature_K, label)
        self.status(f"{serial}  {temperature_K - 273.15:6.1f} °C  {label}")

    def advance(self, count: int = 1) -> None:
        """Count completed shots."""
        self.done += count
        if self.live is not None:
            self.live.publisher.advance(self.done)
        if self._progress is not None and self._task is not None:
            self._progress.update(self._task, completed=self.done)

    def stored(self, result: Any, raw: Any) -> None:
        """A shot was concluded: publish its waveform (read back from the raw record)."""
        if self.live is not None:
            self.live.shot(result, raw)

    def print(self, text: str) -> None:
        """A line above the live display (warnings, safe-state report)."""
        if self.enabled:
            self._console.print(text)


class LiveReport:
    """A run's live publisher and the log handler feeding it (see :func:`start_live`)."""

    #: Least time between two published waveforms (reading one back costs the run time).
    WAVEFORM_INTERVAL_S = 1.0

    def __init__(self, publisher: Any, handler: logging.Handler) -> None:
        self.publisher = publisher
        self.handler = handler
        self._last_waveform = float("-inf")

    def shot(self, result: Any, raw: Any) -> None:
        """Publish a concluded shot's waveform and markers (at most one a second; an invalid
        shot always); a read failure is skipped."""
        from benchrun.errors import BenchrunError
        from benchrun.store.live import physical_waveform

        now = time.monotonic()
        if result.valid and now - self._last_waveform < self.WAVEFORM_INTERVAL_S:
            return
        self._last_waveform = now
        try:
            t, v, i = physical_waveform(raw.read_shot(result.raw_ref))
        except (BenchrunError, KeyError, OSError, ValueError):
            return
        m = result.metrics or {}
        markers = {"t0_s": m.get("t0_s"), "t_irrm_s": m.get("t_irrm_s"),
                   "irrm_A": m.get("irrm_A"), "t_trr_s": m.get("t_trr_s"),
                   "t2_s": m.get("t2_s")}
        self.publisher.shot(result.serial, result.point.label, result.valid,
                            list(result.flags), t, v, i, markers)

    def close(self, state: str) -> None:
        """Mark the run ended and stop sending log lines."""
        logging.getLogger(LOGGER_NAME).removeHandler(self.handler)
        self.publisher.finish(state)
        self.publisher.close()


def _live_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    try:
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute("PRAGMA busy_timeout=10000")
    finally:
        cursor.close()


def start_live(store_url: str, run_id: str, *, part: str, lot: str, bench: str,
               total: int, done: int) -> LiveReport | None:
    """Start publishing a run's progress through the results store at ``store_url``.

    Returns ``None`` (the run goes on unpublished) when the store cannot be reached.
    """
    from sqlalchemy import create_engine
    from sqlalchemy.exc import SQLAlchemyError

    from benchrun.store.live import LiveLogHandler, LivePublisher

    try:
        sqlite = store_url.startswith("sqlite")
        engine = create_engine(store_url, connect_args={"timeout": 10} if sqlite else {})
        if sqlite:  # progress needs no disk sync per write (the store's own rows do)
            from sqlalchemy import event

            event.listen(engine, "connect", _live_pragmas)
        publisher = LivePublisher(engine, run_id, part=part, lot=lot, bench=bench,
                                  total=total, done=done)
    except SQLAlchemyError as exc:
        logging.getLogger(LOGGER_NAME).warning("live progress not published: %s",
                                               str(exc).splitlines()[0])
        return None
    handler = LiveLogHandler(publisher)
    logging.getLogger(LOGGER_NAME).addHandler(handler)
    return LiveReport(publisher, handler)
