"""Control charts of lot statistics: individuals charts with moving-range limits and the
Nelson rules (pure functions).

Limits come from a stated baseline (the first lots in time order): centre line ``CL`` = mean
of the baseline values, ``sigma`` = mean moving range / d2 with d2 = 1.128 for ranges of two
successive points, ``UCL/LCL = CL ± 3 sigma`` (individuals chart, ISO 7870-2:2023 §8 and
Table 3; NIST/SEMATECH e-Handbook of Statistical Methods §6.3.2.2). An individuals chart of
the lot means is used rather than an X̄ chart from within-lot spread, so the lot-to-lot
variation a supplier has anyway sets the limits and only a change against it signals.

The eight tests are those of L. S. Nelson, "The Shewhart control chart — tests for special
causes", Journal of Quality Technology 16(4), 1984, pp. 237–239, as also listed in
ISO 7870-2:2023 Annex B; zones are 1, 2 and 3 sigma from the centre line.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

#: d2 for moving ranges of two points (ISO 7870-2:2023 Table 3).
D2_N2 = 1.128
#: Baseline length used when the user names none: 20 lots (ISO 7870-2 asks for 20 to 25
#: subgroups before limits are set; fewer give provisional limits).
DEFAULT_BASELINE = 20

NELSON_RULES = {
    1: "one point beyond 3 sigma",
    2: "nine points in a row on one side of the centre line",
    3: "six points in a row steadily increasing or decreasing",
    4: "fourteen points in a row alternating up and down",
    5: "two of three points in a row beyond 2 sigma on one side",
    6: "four of five points in a row beyond 1 sigma on one side",
    7: "fifteen points in a row within 1 sigma of the centre line",
    8: "eight points in a row beyond 1 sigma, on either side",
}


@dataclass(frozen=True)
class Limits:
    """Control limits of an individuals chart and where they came from."""

    centre: float
    sigma: float
    baseline: int

    @property
    def upper(self) -> float:
        return self.centre + 3.0 * self.sigma

    @property
    def lower(self) -> float:
        return self.centre - 3.0 * self.sigma


@dataclass(frozen=True)
class Signal:
    """A Nelson rule broken; ``index`` is the point completing the pattern."""

    rule: int
    index: int

    @property
    def description(self) -> str:
        return NELSON_RULES[self.rule]


def individuals_limits(values: Sequence[float], baseline: int) -> Limits | None:
    """Limits from the first ``baseline`` values (at least two are needed)."""
    base = [float(v) for v in values[:baseline] if math.isfinite(v)]
    if len(base) < 2:
        return None
    centre = sum(base) / len(base)
    ranges = [abs(b - a) for a, b in itertools.pairwise(base)]
    sigma = (sum(ranges) / len(ranges)) / D2_N2
    return Limits(centre, sigma, len(base))


def _runs(flags: np.ndarray, length: int) -> np.ndarray:
    """Indices ``i`` (of the last element) where ``flags[i-length+1 : i+1]`` are all true."""
    if flags.size < length:
        return np.empty(0, dtype=int)
    return np.nonzero(sliding_window_view(flags, length).all(axis=1))[0] + length - 1


def _counts(flags: np.ndarray, length: int, need: int) -> np.ndarray:
    """Indices of the last element of each window of ``length`` with at least ``need`` true."""
    if flags.size < length:
        return np.empty(0, dtype=int)
    return np.nonzero(sliding_window_view(flags, length).sum(axis=1) >= need)[0] + length - 1


def nelson_signals(values: Sequence[float], limits: Limits) -> list[Signal]:
    """Every Nelson test broken by ``values`` against ``limits`` (each signalled once, at
    the point that completes it; overlapping windows signal at each completing point)."""
    x = np.asarray(values, dtype=float)
    c, s = limits.centre, limits.sigma
    if s <= 0 or not math.isfinite(s) or x.size == 0:
        return []
    z = (x - c) / s
    d = np.diff(x)
    found: dict[int, np.ndarray] = {
        1: np.nonzero(np.abs(z) > 3)[0],
        2: np.union1d(_runs(z > 0, 9), _runs(z < 0, 9)),
        3: np.union1d(_runs(d > 0, 5), _runs(d < 0, 5)) + 1,
        4: _runs((np.sign(d[:-1]) * np.sign(d[1:])) < 0, 12) + 2,
        5: np.union1d(_counts(z > 2, 3, 2), _counts(z < -2, 3, 2)),
        6: np.union1d(_counts(z > 1, 5, 4), _counts(z < -1, 5, 4)),
        7: _runs(np.abs(z) < 1, 15),
        8: _runs(np.abs(z) > 1, 8),
    }
    signals = [Signal(rule, int(i)) for rule, where in found.items() for i in where]
    return sorted(signals, key=lambda sig: (sig.index, sig.rule))
