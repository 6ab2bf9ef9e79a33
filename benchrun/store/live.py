"""Live state of runs in progress, published through the results store.

The runner's progress reporter (:class:`benchrun.runner.progress.RunProgress`) writes one row
per run to ``live_runs`` (what is happening now: device, temperature, test point, shots done
out of the total, the time-left estimate and the last shot's waveform, thinned) and appends
the run's log lines to ``live_events`` (each retry, invalid shot and safe-state report as it
happens). Because both tables live in the results database, ``benchrun serve`` shows every
bench writing to one shared PostgreSQL store, not only runs on its own machine.

Writing never stops a run: a failed write is logged once and the run goes on
(:class:`LivePublisher`). Reading (:func:`live_runs`, :func:`live_events`) is for the web
application.
"""

from __future__ import annotations

import itertools
import json
import logging
import math
import threading
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import delete, insert, select, update
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import SQLAlchemyError

from benchrun.store.schema import live_events_table, live_runs_table, utc_now

log = logging.getLogger("benchrun.live")

#: Points kept of the last waveform (min/max pairs per bucket, so peaks survive thinning).
WAVEFORM_POINTS = 1200

#: Event kinds told apart on the live page.
KIND_INVALID = "invalid shot"
KIND_RETRY = "retry"
KIND_SAFE_STATE = "safe state"
KIND_ERROR = "error"
KIND_LOG = "log"


def event_kind(level: int, message: str) -> str:
    """The kind of a run-log line shown on the live page."""
    text = message.lower()
    if text.startswith("safe state") or "safe state" in text[:40]:
        return KIND_SAFE_STATE
    if " invalid: " in text:
        return KIND_INVALID
    if "retry" in text or "widening its range" in text or "fired again" in text:
        return KIND_RETRY
    if level >= logging.ERROR:
        return KIND_ERROR
    return KIND_LOG


def thin_waveform(t: np.ndarray, *series: np.ndarray,
                  points: int = WAVEFORM_POINTS) -> list[list[float]]:
    """Thin a waveform for display: the minimum and maximum of each bucket, in time order.

    Returns ``[t, s1, s2, ...]`` as lists of floats (at most ``points`` samples each); the
    bucket extremes are taken on the first series, so its peaks are kept exactly.
    """
    n = len(t)
    if n <= points:
        return [np.asarray(a, dtype=float).tolist() for a in (t, *series)]
    buckets = max(1, points // 2)
    edges = np.linspace(0, n, buckets + 1).astype(int)
    picks: list[int] = []
    first = np.asarray(series[0]) if series else np.asarray(t)
    for a, b in itertools.pairwise(edges):
        if b <= a:
            continue
        seg = first[a:b]
        lo, hi = a + int(np.argmin(seg)), a + int(np.argmax(seg))
        picks.extend(sorted({lo, hi}))
    idx = np.asarray(picks)
    return [np.asarray(arr, dtype=float)[idx].tolist() for arr in (t, *series)]


def _finite(value: Any) -> float | None:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


class LivePublisher:
    """Writes a run's live state and events to the results store.

    Parameters
    ----------
    engine
        The results store's SQLAlchemy engine (tables created by the store).
    run_id, part, lot, bench
        What the live page names the run by.
    total, done
        Shots planned in the whole run, and those already complete (a resumed run).
    min_interval_s
        Least time between two state writes (events are written at once).
    """

    def __init__(self, engine: Engine, run_id: str, *, part: str, lot: str, bench: str,
                 total: int, done: int = 0, min_interval_s: float = 0.5) -> None:
        self._engine = engine
        self.run_id = run_id
        self._row: dict[str, Any] = {
            "run_id": run_id, "bench": bench, "part": part, "lot": lot, "state": "running",
            "updated": utc_now(), "started": utc_now(), "status_text": "starting",
            "serial": None, "temperature_K": None, "point_label": None, "done": int(done),
            "total": int(total), "eta_s": None, "last_shot": None,
        }
        self._t0 = time.monotonic()
        self._done0 = int(done)
        self._min_interval = min_interval_s
        self._last_write = 0.0
        self._failed = False
        self._lock = threading.Lock()
        self._write(force=True, fresh=True)

    # -- writing --------------------------------------------------------------------------
    def _run(self, what: str, fn: Any) -> None:
        try:
            with self._engine.begin() as conn:
                fn(conn)
        except SQLAlchemyError as exc:
            if not self._failed:
                self._failed = True
                log.warning("live progress not published (%s): %s", what,
                            str(exc).splitlines()[0])

    def _write(self, *, force: bool = False, fresh: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._last_write < self._min_interval:
            return
        self._last_write = now
        self._row["updated"] = utc_now()
        row = dict(self._row)

        def write(conn: Connection) -> None:
            if fresh:
                conn.execute(delete(live_runs_table)
                             .where(live_runs_table.c.run_id == self.run_id))
                conn.execute(insert(live_runs_table), row)
            else:
                conn.execute(update(live_runs_table)
                             .where(live_runs_table.c.run_id == self.run_id), row)

        with self._lock:
            self._run("state", write)

    def status(self, text: str) -> None:
        """What is happening now (settling, trimming ...)."""
        self._row["status_text"] = text
        self._write()

    def shooting(self, serial: str, temperature_K: float, label: str) -> None:
        """The shot about to be fired."""
        self._row.update(serial=serial, temperature_K=_finite(temperature_K),
                         point_label=label, status_text=f"firing {label} on {serial}")
        self._write()

    def advance(self, done: int) -> None:
        """Shots complete so far; updates the time-left estimate (mean pace of this session)."""
        self._row["done"] = int(done)
        fresh = done - self._done0
        if fresh > 0:
            pace = (time.monotonic() - self._t0) / fresh
            self._row["eta_s"] = max(0.0, pace * (self._row["total"] - done))
        self._write()

    def shot(self, serial: str, label: str, valid: bool, flags: list[str],
             t: np.ndarray, v: np.ndarray, i: np.ndarray, markers: dict[str, Any]) -> None:
        """The last stored shot and its waveform around the recovery (from before t0 to past
        t2, when both are known), thinned to :data:`WAVEFORM_POINTS`."""
        t, v, i = np.asarray(t), np.asarray(v), np.asarray(i)
        t0, t2 = _finite(markers.get("t0_s")), _finite(markers.get("t2_s"))
        if t0 is not None and t2 is not None and t2 > t0:
            span = t2 - t0
            keep = (t >= t0 - 1.5 * span) & (t <= t0 + 3.0 * span)
            if np.count_nonzero(keep) >= 2:
                t, v, i = t[keep], v[keep], i[keep]
        tt, ii, vv = thin_waveform(t, i, v)
        self._row["last_shot"] = json.dumps({
            "serial": serial, "label": label, "valid": bool(valid), "flags": list(flags),
            "t": tt, "i": ii, "v": vv,
            "markers": {k: _finite(x) for k, x in markers.items()},
        }, allow_nan=False)
        self._write(force=True)

    def event(self, level: int, message: str) -> None:
        """One log line of the run, stored at once."""
        row = {"run_id": self.run_id, "time": utc_now(), "kind": event_kind(level, message),
               "level": logging.getLevelName(level), "message": message}
        with self._lock:
            self._run("event", lambda conn: conn.execute(insert(live_events_table), row))

    def close(self) -> None:
        """Release the database connections."""
        self._engine.dispose()

    def finish(self, state: str) -> None:
        """The run ended (``complete``, ``interrupted``, ``aborted``...)."""
        self._row["state"] = state
        self._row["status_text"] = f"run {state}"
        self._row["eta_s"] = 0.0 if state == "complete" else None
        self._write(force=True)


class LiveLogHandler(logging.Handler):
    """Sends every ``benchrun`` log line of a run (INFO and above) to a publisher."""

    def __init__(self, publisher: LivePublisher) -> None:
        super().__init__(logging.INFO)
        self.publisher = publisher

    def emit(self, record: logging.LogRecord) -> None:
        if record.name.startswith("benchrun.live"):
            return
        try:
            self.publisher.event(record.levelno, record.getMessage())
        except Exception:  # a log handler must never raise into the run
            self.handleError(record)


# -- reading ------------------------------------------------------------------------------
@dataclass(frozen=True)
class LiveRun:
    """One ``live_runs`` row as the web page shows it."""

    run_id: str
    bench: str
    part: str
    lot: str
    state: str
    updated: str
    started: str
    status_text: str
    serial: str | None
    temperature_K: float | None
    point_label: str | None
    done: int
    total: int
    eta_s: float | None
    last_shot: dict[str, Any] | None


def live_runs(conn: Connection) -> list[LiveRun]:
    """Every run with a live row, newest first."""
    rows = conn.execute(select(live_runs_table)
                        .order_by(live_runs_table.c.started.desc())).mappings().all()
    return [_live(r) for r in rows]


def live_run(conn: Connection, run_id: str) -> LiveRun | None:
    """One run's live row, or ``None``."""
    row = conn.execute(select(live_runs_table)
                       .where(live_runs_table.c.run_id == run_id)).mappings().first()
    return None if row is None else _live(row)


def _live(row: Any) -> LiveRun:
    data = dict(row)
    text = data.pop("last_shot")
    try:
        last = json.loads(text) if text else None
    except ValueError:
        last = None
    return LiveRun(last_shot=last, **data)


def live_events(conn: Connection, run_id: str, after_id: int = 0,
                limit: int = 500) -> list[dict[str, Any]]:
    """A run's events after ``after_id``, oldest first (``id, time, kind, level, message``)."""
    t = live_events_table
    rows = conn.execute(select(t.c.id, t.c.time, t.c.kind, t.c.level, t.c.message)
                        .where(t.c.run_id == run_id, t.c.id > after_id)
                        .order_by(t.c.id).limit(limit)).mappings().all()
    return [dict(r) for r in rows]


def physical_waveform(shot: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Time, diode voltage and diode current of a raw shot (:class:`RawShot`), in s, V, A.

    Channel volts are ``codes * gain + offset``; the physical value is channel volts times the
    probe's scale, shifted by ``-deskew_s`` in time (the contract of
    :mod:`benchrun.analysis.pipeline`); the current is resampled onto the voltage's time base.
    """
    def channel(name: str) -> tuple[np.ndarray, np.ndarray]:
        data, probe = shot.channels[name], shot.probes[name]
        values = (np.asarray(data.codes, dtype=float) * data.gain + data.offset) * probe.scale
        t = shot.t_start + shot.dt * np.arange(len(values)) - probe.deskew_s
        return t, values

    t, v = channel("diode_voltage")
    ti, i = channel("diode_current")
    return t, v, np.interp(t, ti, i)
