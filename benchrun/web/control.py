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


def nelson_signals(values: Sequence[float], limits: Limits) -> list[Signal]:
    """Every Nelson test broken by ``values`` against ``limits`` (each signalled once, at
    the point that completes it; overlapping windows signal at each completing point)."""
    x = [float(v) for v in values]
    c, s = limits.centre, limits.sigma
    if s <= 0 or not math.isfinite(s):
        return []
    z = [(v - c) / s for v in x]
    out: list[Signal] = []

    def side(v: float) -> int:
        return 1 if v > 0 else (-1 if v < 0 else 0)

    for i in range(len(z)):
        if abs(z[i]) > 3:
            out.append(Signal(1, i))
        if i >= 8:
            sides = {side(v) for v in z[i - 8:i + 1]}
            if len(sides) == 1 and 0 not in sides:
                out.append(Signal(2, i))
        if i >= 5:
            w = x[i - 5:i + 1]
            steps = [b - a for a, b in itertools.pairwise(w)]
            if all(d > 0 for d in steps) or all(d < 0 for d in steps):
                out.append(Signal(3, i))
        if i >= 13:
            w = x[i - 13:i + 1]
            steps = [b - a for a, b in itertools.pairwise(w)]
            if all(d != 0 for d in steps) and all(
                    (a > 0) != (b > 0) for a, b in itertools.pairwise(steps)):
                out.append(Signal(4, i))
        if i >= 2:
            w = z[i - 2:i + 1]
            if any(sum(1 for v in w if sign * v > 2) >= 2 for sign in (1, -1)):
                out.append(Signal(5, i))
        if i >= 4:
            w = z[i - 4:i + 1]
            if any(sum(1 for v in w if sign * v > 1) >= 4 for sign in (1, -1)):
                out.append(Signal(6, i))
        if i >= 14 and all(abs(v) < 1 for v in z[i - 14:i + 1]):
            out.append(Signal(7, i))
        if i >= 7 and all(abs(v) > 1 for v in z[i - 7:i + 1]):
            out.append(Signal(8, i))
    return out
