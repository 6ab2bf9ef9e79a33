"""Lot statistics and lot disposition.

- Process capability ``Cpk = min(USL − μ, μ − LSL)/(3σ)``; with one limit the one-sided index
  ``Cpu = (USL − μ)/(3σ)`` or ``Cpl = (μ − LSL)/(3σ)`` (Montgomery, *Introduction to Statistical
  Quality Control*, ch. 8, process capability ratios). σ is the sample standard deviation of
  the devices' values. Computed for graded metrics only (a metric with a limit at the
  condition), and stated only from :data:`MIN_CAPABILITY_N` devices on (below that the
  estimate is too uncertain to print; common practice, from memory of the usual guidance of
  at least 25 to 30 values).
- Lower confidence bound of Cpk (one-sided, 95 %), Bissell's normal approximation
  (A. F. Bissell, "How reliable is your capability index?", *Applied Statistics* 39(3),
  1990, pp. 331-340)::

      Cpk_L = Ĉpk − z_{1−α} · sqrt(1/(9n) + Ĉpk²/(2(n − 1)))

  with z_{0.95} = 1.645; the same formula bounds the one-sided Cpu and Cpl.
- Outliers by the modified z-score ``M_i = 0.6745·(x_i − median)/MAD`` with ``|M_i| > 3.5``
  (Iglewicz & Hoaglin, *How to Detect and Handle Outliers*, ASQC Basic References in Quality
  Control vol. 16, 1993). With MAD = 0 no outlier is declared (the score is undefined).
- Lot disposition by attributes: accept when at most ``c`` devices count as non-conforming and
  at least ``n`` devices were graded (single sampling plan wording of ISO 2859-1: acceptance
  number c, sample size n).
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from benchrun.grading.decision import CONFORMING, INDETERMINATE, INVALID, NONCONFORMING

#: Threshold of the modified z-score (Iglewicz & Hoaglin 1993).
MODIFIED_Z_LIMIT = 3.5
#: Fewest devices from which a capability index is stated (common practice, from memory).
MIN_CAPABILITY_N = 25
#: One-sided confidence level of the Cpk lower bound and its normal quantile z_{0.95}.
CAPABILITY_CONFIDENCE = 0.95
Z_95 = 1.6448536269514722
#: The capability method as stated on the report.
CAPABILITY_METHOD = (
    f"Cpk = min(USL − mean, mean − LSL)/(3s) over the devices' values (Montgomery, "
    f"Introduction to Statistical Quality Control, ch. 8); lower {CAPABILITY_CONFIDENCE:.0%} "
    "confidence bound by Bissell's approximation Cpk − z·sqrt(1/(9n) + Cpk²/(2(n − 1))) "
    f"(Bissell, Applied Statistics 39(3), 1990); stated only from n = {MIN_CAPABILITY_N} "
    "devices (common practice)"
)
#: The outlier test as stated on the report.
OUTLIER_TEST = (
    f"modified z-score |0.6745·(x − median)/MAD| > {MODIFIED_Z_LIMIT:g} (Iglewicz & Hoaglin, "
    "How to Detect and Handle Outliers, ASQC 1993)"
)


def cpk_lower_bound(cpk: float, n: int, z: float = Z_95) -> float | None:
    """Bissell's (1990) approximate lower confidence bound of Cpk (``None`` for n < 2)."""
    if n < 2 or not math.isfinite(cpk):
        return None
    return cpk - z * math.sqrt(1.0 / (9.0 * n) + cpk * cpk / (2.0 * (n - 1)))
#: 0.6745 = Φ⁻¹(0.75): makes MAD a consistent estimator of σ for normal data.
MAD_CONSTANT = 0.6745


def capability(
    mean: float, sigma: float, lower: float | None, upper: float | None
) -> tuple[float | None, float | None, float | None]:
    """``(Cpk, Cpl, Cpu)``; an index that needs a missing limit, or σ ≤ 0, is ``None``.

    ``Cpk`` is the smaller of the available one-sided indices (Montgomery, ch. 8).
    """
    if not (sigma > 0 and math.isfinite(sigma)):
        return None, None, None
    cpl = None if lower is None else (mean - lower) / (3.0 * sigma)
    cpu = None if upper is None else (upper - mean) / (3.0 * sigma)
    present = [x for x in (cpl, cpu) if x is not None]
    return (min(present) if present else None), cpl, cpu


def modified_z_scores(values: Sequence[float]) -> list[float] | None:
    """Modified z-scores ``0.6745·(x − median)/MAD``; ``None`` when MAD = 0 or n < 3."""
    if len(values) < 3:
        return None
    median = statistics.median(values)
    mad = statistics.median(abs(x - median) for x in values)
    if mad <= 0:
        return None
    return [MAD_CONSTANT * (x - median) / mad for x in values]


@dataclass(frozen=True)
class MetricStatistics:
    """Statistics of one metric at one condition over the devices' mean values."""

    metric: str
    condition: str
    n: int
    mean: float | None
    std: float | None
    minimum: float | None
    maximum: float | None
    lower: float | None
    upper: float | None
    cpk: float | None
    cpl: float | None
    cpu: float | None
    cpk_lower: float | None = None
    capability_note: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "metric": self.metric,
            "condition": self.condition,
            "n": self.n,
            "mean": self.mean,
            "std": self.std,
            "min": self.minimum,
            "max": self.maximum,
            "lower": self.lower,
            "upper": self.upper,
            "cpk": self.cpk,
            "cpl": self.cpl,
            "cpu": self.cpu,
            "cpk_lower": self.cpk_lower,
            "capability_note": self.capability_note,
        }


def summarize(
    metric: str,
    condition: str,
    values: Sequence[float],
    lower: float | None = None,
    upper: float | None = None,
    *,
    min_n: int = MIN_CAPABILITY_N,
) -> MetricStatistics:
    """Count, mean, sample σ (n − 1), min, max and capability of ``values``.

    The capability indices and their lower confidence bound are stated only for a graded
    metric (a limit given) from ``min_n`` values on; otherwise they are ``None`` and
    ``capability_note`` says why.
    """
    n = len(values)
    if n == 0:
        return MetricStatistics(metric, condition, 0, None, None, None, None, lower, upper,
                                None, None, None, None, "no values")
    mean = math.fsum(values) / n
    std = statistics.stdev(values) if n >= 2 else None
    cpk = cpl = cpu = low = None
    note = ""
    if lower is None and upper is None:
        note = "not graded: no capability"
    elif n < min_n:
        note = f"n = {n} < {min_n}: capability not stated"
    elif std is not None:
        cpk, cpl, cpu = capability(mean, std, lower, upper)
        low = None if cpk is None else cpk_lower_bound(cpk, n)
        if cpk is None:
            note = "s = 0: capability undefined"
    return MetricStatistics(metric, condition, n, mean, std, min(values), max(values),
                            lower, upper, cpk, cpl, cpu, low, note)


@dataclass(frozen=True)
class Outlier:
    """A device whose mean value of a metric is far from the lot (modified z-score)."""

    serial: str
    metric: str
    condition: str
    value: float
    z: float
    test: str = OUTLIER_TEST

    def to_dict(self) -> dict[str, Any]:
        return {"serial": self.serial, "metric": self.metric, "condition": self.condition,
                "value": self.value, "modified_z": self.z, "test": self.test}


def find_outliers(
    metric: str, condition: str, serials: Sequence[str], values: Sequence[float]
) -> list[Outlier]:
    """Devices with ``|M| > 3.5`` (Iglewicz & Hoaglin 1993)."""
    scores = modified_z_scores(values)
    if scores is None:
        return []
    return [
        Outlier(serial, metric, condition, value, z)
        for serial, value, z in zip(serials, values, scores, strict=True)
        if abs(z) > MODIFIED_Z_LIMIT
    ]


@dataclass(frozen=True)
class RatioStatistics:
    """Hot/cold ratio of one metric: per device and the lot mean."""

    metric: str
    hot: str
    cold: str
    per_device: dict[str, float]
    mean: float | None

    def to_dict(self) -> dict[str, Any]:
        return {"metric": self.metric, "hot": self.hot, "cold": self.cold,
                "per_device": dict(self.per_device), "mean": self.mean}


@dataclass(frozen=True)
class LotStatistics:
    """Counts, yield, per-metric statistics, hot/cold ratios and outliers of a lot."""

    count: int
    conforming: int
    nonconforming: int
    indeterminate: int
    invalid: int
    yield_fraction: float | None
    metrics: tuple[MetricStatistics, ...]
    ratios: tuple[RatioStatistics, ...]
    outliers: tuple[Outlier, ...]
    capability_method: str = CAPABILITY_METHOD
    outlier_test: str = OUTLIER_TEST

    def to_dict(self) -> dict[str, Any]:
        return {
            "count": self.count,
            "conforming": self.conforming,
            "nonconforming": self.nonconforming,
            "indeterminate": self.indeterminate,
            "invalid": self.invalid,
            "yield": self.yield_fraction,
            "metrics": [m.to_dict() for m in self.metrics],
            "ratios": [r.to_dict() for r in self.ratios],
            "outliers": [o.to_dict() for o in self.outliers],
            "capability_method": self.capability_method,
            "outlier_test": self.outlier_test,
        }


def disposition(
    verdicts: dict[str, str],
    *,
    acceptance_number: int,
    sample_size: int | None,
    indeterminate: str,
    invalid: str,
) -> tuple[str, tuple[str, ...]]:
    """Lot disposition ``"accept"``/``"reject"`` and the reasons behind it.

    Parameters
    ----------
    verdicts
        Device serial → verdict.
    acceptance_number
        c: the most devices that may count as non-conforming in an accepted lot.
    sample_size
        n: the fewest devices that must have been graded (``None``: no minimum).
    indeterminate
        ``"nonconforming"`` or ``"conforming"``: how an indeterminate device counts.
    invalid
        ``"nonconforming"`` (counts against c) or ``"excluded"`` (not graded; counts
        against n).
    """
    def serials(verdict: str) -> list[str]:
        return [s for s, v in verdicts.items() if v == verdict]

    reasons: list[str] = []
    failing = serials(NONCONFORMING)
    undecided = serials(INDETERMINATE)
    untested = serials(INVALID)
    counted = list(failing)
    if failing:
        reasons.append(f"{len(failing)} device(s) non-conforming: {', '.join(failing)}")
    if undecided:
        how = "count as non-conforming" if indeterminate == "nonconforming" else \
            "count as conforming"
        reasons.append(f"{len(undecided)} device(s) indeterminate ({how} by the lot rule): "
                       f"{', '.join(undecided)}")
        if indeterminate == "nonconforming":
            counted += undecided
    graded = len(verdicts)
    if untested:
        if invalid == "nonconforming":
            reasons.append(f"{len(untested)} device(s) invalid (not graded; count as "
                           f"non-conforming by the lot rule): {', '.join(untested)}")
            counted += untested
        else:
            reasons.append(f"{len(untested)} device(s) invalid (not graded; excluded by the "
                           f"lot rule): {', '.join(untested)}")
            graded -= len(untested)
    decision = "accept"
    if len(counted) > acceptance_number:
        decision = "reject"
        reasons.append(f"{len(counted)} device(s) count as non-conforming > acceptance number "
                       f"c = {acceptance_number}")
    else:
        reasons.append(f"{len(counted)} device(s) count as non-conforming ≤ acceptance number "
                       f"c = {acceptance_number}")
    if graded == 0:
        decision = "reject"
        reasons.append("no device was graded")
    if sample_size is not None and graded < sample_size:
        decision = "reject"
        reasons.append(f"only {graded} device(s) graded, fewer than the sample size "
                       f"n = {sample_size}")
    return decision, tuple(reasons)


__all__ = [
    "CONFORMING",
    "LotStatistics",
    "MetricStatistics",
    "Outlier",
    "RatioStatistics",
    "capability",
    "disposition",
    "find_outliers",
    "modified_z_scores",
    "summarize",
]
