"""What the lot and part-history pages show, computed from the store and cached.

A finished run never changes, so its grade and its per-lot statistics are cached in memory,
keyed by the run, its end time and its number of shot rows (a run still in progress gets a
new entry as shots arrive). Grading uses the limits file stored with the run
(``limits.yaml`` of its folder) and :func:`benchrun.grading.grade_lot`, exactly as the
report does.
"""

from __future__ import annotations

import math
import statistics
import threading
from collections import OrderedDict
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.analysis.metrics_meta import METRICS
from benchrun.config.limits import LimitsSpec, load_limits
from benchrun.errors import BenchrunError
from benchrun.grading import LotGrade, grade_lot, run_bench
from benchrun.grading.grade import point_matches
from benchrun.records import ShotResult, TestPoint
from benchrun.web.catalog import Catalog, Lot, LotRow
from benchrun.web.control import (
    DEFAULT_BASELINE,
    Limits,
    Signal,
    individuals_limits,
    nelson_signals,
)


class LRUCache:
    """A small thread-safe least-recently-used cache."""

    def __init__(self, size: int = 256) -> None:
        self._data: OrderedDict[Any, Any] = OrderedDict()
        self._size = size
        self._lock = threading.Lock()

    def peek(self, key: Any) -> Any:
        """The cached value, or ``None``."""
        with self._lock:
            return self._data.get(key)

    def get(self, key: Any, make: Callable[[], Any]) -> Any:
        with self._lock:
            if key in self._data:
                self._data.move_to_end(key)
                return self._data[key]
        value = make()
        with self._lock:
            self._data[key] = value
            while len(self._data) > self._size:
                self._data.popitem(last=False)
        return value


@dataclass(frozen=True)
class LotView:
    """The lot page's content."""

    lot: Lot
    shots: list[ShotResult]
    grade: LotGrade | None
    limits: LimitsSpec | None
    problem: str | None  # why there is no grade


@dataclass(frozen=True)
class LotPoint:
    """One lot on a part-history chart: mean and spread of its device means."""

    run_id: str
    lot: str
    started: str
    n: int
    mean: float
    spread: float | None


@dataclass(frozen=True)
class Chart:
    """One metric at one condition across the lots of a part."""

    metric: str
    condition: str
    unit: str
    name: str
    points: list[LotPoint]
    mean_limits: Limits | None
    spread_limits: Limits | None
    mean_signals: list[Signal]
    spread_signals: list[Signal]


def _limits_of(lot: Lot) -> LimitsSpec | None:
    path = lot.limits_path
    return None if path is None else load_limits(path)


def _limits_cached(cache: LRUCache, path: Path | None) -> LimitsSpec | None:
    if path is None:
        return None
    stat = path.stat()
    return cache.get(("limits", str(path), stat.st_mtime_ns, stat.st_size),
                     lambda: load_limits(path))


class LotData:
    """Lot views and part histories over a :class:`Catalog`, cached."""

    def __init__(self, catalog: Catalog) -> None:
        self.catalog = catalog
        self._cache = LRUCache(512)
        self._summaries = LRUCache(20000)

    def _key(self, row: LotRow) -> tuple[str, str, str | None, int]:
        # a finished run never changes; one in progress is keyed by its row count too
        if row.finished and row.status != "running":
            return (row.store.url, row.run_id, row.finished, -1)
        return (row.store.url, row.run_id, row.finished, self.catalog.shot_count(row))

    def lot_view(self, lot: Lot) -> LotView:
        key = ("view", *self._key(lot.row))
        return self._cache.get(key, lambda: self._make_view(lot))

    def _make_view(self, lot: Lot) -> LotView:
        shots = self.catalog.shots(lot.row)
        try:
            limits = _limits_cached(self._cache, lot.limits_path)
        except BenchrunError as exc:
            return LotView(lot, shots, None, None, f"the stored limits file is unusable: {exc}")
        if limits is None:
            return LotView(lot, shots, None, None,
                           "no limits file stored with this run (its run folder is not "
                           "reachable from this server)")
        if not shots:
            return LotView(lot, shots, None, limits, "no analysed shots yet")
        try:
            grade = grade_lot(shots, limits, bench=self._bench(lot))
        except BenchrunError as exc:
            return LotView(lot, shots, None, limits, f"cannot grade: {exc}")
        return LotView(lot, shots, grade, limits, None)

    def _bench(self, lot: Lot) -> Any:
        """The run's bench file (its accuracies are the uncertainty budgets' inputs)."""
        path = lot.bench_path
        if path is None:
            return run_bench(lot)  # raises GradingError with what to do
        stat = path.stat()
        return self._cache.get(("bench", str(path), stat.st_mtime_ns, stat.st_size),
                               lambda: run_bench(lot))

    # -- part history ------------------------------------------------------------------
    def parts(self) -> list[str]:
        return sorted({row.part for row in self.catalog.lots()})

    def _summaries_of(self, rows: list[LotRow], limits: LimitsSpec
                      ) -> list[dict[tuple[str, str], tuple[int, float, float | None]]]:
        """Each lot's summary: cached ones as they are, the others from one query per store
        over the part's shots (light columns only, no ShotResult built)."""
        keys = [("summary", *self._key(row), id(limits)) for row in rows]
        found = [self._summaries.peek(key) for key in keys]
        missing = [row for row, got in zip(rows, found, strict=True) if got is None]
        if missing:
            by_store: dict[str, list[LotRow]] = {}
            for row in missing:
                by_store.setdefault(row.store.url, []).append(row)
            for group in by_store.values():
                wanted = {row.run_id for row in group}
                items: dict[str, list[Any]] = {run_id: [] for run_id in wanted}
                for run_id, item in self.catalog.shot_metrics(group[0].store, group[0].part,
                                                              wanted):
                    items[run_id].append(item)
                for row in group:
                    key = ("summary", *self._key(row), id(limits))
                    self._summaries.get(key, lambda these=items[row.run_id]: lot_summary(
                        these, limits))
            found = [self._summaries.peek(key) for key in keys]
        return [f or {} for f in found]

    def history(self, part: str, baseline: int = DEFAULT_BASELINE
                ) -> tuple[list[Chart], LimitsSpec | None, list[LotRow]]:
        """Charts of every graded metric of ``part`` (limits of its newest lot)."""
        rows = sorted((r for r in self.catalog.lots() if r.part == part),
                      key=lambda r: (r.started, r.run_id))
        state = tuple(self._key(row) for row in rows)
        return self._cache.get(("history", part, baseline, state),
                               lambda: self._history(part, baseline, rows))

    def _history(self, part: str, baseline: int, rows: list[LotRow]
                 ) -> tuple[list[Chart], LimitsSpec | None, list[LotRow]]:
        limits = None
        for row in reversed(rows):
            lot = self.catalog.lot(row.run_id)
            if lot is not None:
                try:
                    limits = _limits_cached(self._cache, lot.limits_path)
                except BenchrunError:
                    limits = None
            if limits is not None:
                break
        if limits is None:
            return [], None, rows
        summaries = list(zip(rows, self._summaries_of(rows, limits), strict=True))
        charts = []
        for metric, condition in graded_pairs(limits):
            points = [LotPoint(row.run_id, row.lot, row.started, *s[(metric, condition)])
                      for row, s in summaries if (metric, condition) in s]
            means = [p.mean for p in points]
            spreads = [p.spread for p in points]
            mean_limits = individuals_limits(means, baseline)
            spread_values = [s for s in spreads if s is not None]
            spread_limits = (individuals_limits(spread_values, baseline)
                             if len(spread_values) == len(spreads) else None)
            meta = METRICS.get(metric)
            charts.append(Chart(
                metric, condition, meta.unit if meta else "", meta.name if meta else metric,
                points, mean_limits, spread_limits,
                nelson_signals(means, mean_limits) if mean_limits else [],
                nelson_signals(spread_values, spread_limits) if spread_limits else []))
        return charts, limits, rows


def graded_pairs(limits: LimitsSpec) -> list[tuple[str, str]]:
    """(metric, condition) of every limit in the limits file, in file order."""
    pairs: list[tuple[str, str]] = []
    for condition in limits.conditions:
        for item in limits.limits_at(condition.name):
            if (item.metric, condition.name) not in pairs:
                pairs.append((item.metric, condition.name))
    return pairs


def lot_summary(shots: Iterable[ShotResult | tuple[str, TestPoint, dict[str, Any], bool]],
                limits: LimitsSpec) -> dict[tuple[str, str], tuple[int, float, float | None]]:
    """Per graded (metric, condition): number of devices, mean and sample standard deviation
    of the device means (each device's mean over its valid shots at points belonging to the
    condition, matched as grading matches them). ``shots`` are ShotResults or
    ``(serial, point, metrics, valid)`` tuples."""
    pairs = graded_pairs(limits)
    conditions = {c.name: c for c in limits.conditions}
    per_device: dict[tuple[str, str], dict[str, list[float]]] = {p: {} for p in pairs}
    matched: dict[Any, list[str]] = {}
    for shot in shots:
        if isinstance(shot, ShotResult):
            serial, point, metrics, valid = shot.serial, shot.point, shot.metrics, shot.valid
        else:
            serial, point, metrics, valid = shot
        if not valid:
            continue
        point_key = (point.temperature_K, point.forward_current_A, point.bus_voltage_V,
                     point.didt_A_per_s)
        names = matched.get(point_key)
        if names is None:
            names = [n for n, c in conditions.items()
                     if point_matches(point, c, limits.tolerances)]
            matched[point_key] = names
        for name in names:
            for metric, condition in pairs:
                if condition != name:
                    continue
                value = metrics.get(metric)
                if isinstance(value, int | float) and math.isfinite(value):
                    per_device[(metric, condition)].setdefault(serial, []).append(
                        float(value))
    out: dict[tuple[str, str], tuple[int, float, float | None]] = {}
    for pair, devices in per_device.items():
        means = [sum(v) / len(v) for v in devices.values() if v]
        if not means:
            continue
        spread = statistics.stdev(means) if len(means) > 1 else None
        out[pair] = (len(means), sum(means) / len(means), spread)
    return out
