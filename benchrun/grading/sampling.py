"""The lot's sampling plan and the protection it gives: OC figures of a single sampling plan.

A single sampling plan by attributes (n, c) accepts a lot when a random sample of n devices
holds at most c non-conforming ones. Its operating characteristic (OC) is the probability of
acceptance Pa as a function of the fraction non-conforming p.

- Pa is computed with the **binomial** distribution (type B OC: sampling from a process,
  or from a lot much larger than the sample), as ISO 2859-1 states the OC of its plans for
  percent non-conforming::

      Pa(p) = Σ_{d=0}^{c} C(n, d) · p^d · (1 − p)^(n − d)

  (Montgomery, *Introduction to Statistical Quality Control*, ch. 15, single sampling OC).
- The **LTPD** (lot tolerance percent defective, the consumer's quality level) is the fraction
  non-conforming accepted with probability β = 10 % (common definition, Montgomery ch. 15):
  the root of Pa(p) = 0.10, found by bisection (Pa falls monotonically in p). For c = 0 it has
  the closed form ``1 − 0.10^(1/n)``.
- For the finite lot actually inspected, the **hypergeometric** distribution (type A OC) gives
  the smallest number D of non-conforming devices in the lot of N that the plan detects with
  probability at least 1 − β; ``lot_ltpd_count`` reports it (for n = N any D ≥ c + 1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from benchrun.config.limits import LotRule

#: Consumer's risk β at the LTPD (common definition: 10 %).
CONSUMER_RISK = 0.10


def binomial_acceptance(p: float, n: int, c: int) -> float:
    """Pa(p) = P(X ≤ c), X ~ Binomial(n, p)."""
    if not 0.0 <= p <= 1.0:
        raise ValueError("p must lie in [0, 1]")
    if p == 0.0:
        return 1.0
    if p == 1.0:
        return 1.0 if c >= n else 0.0
    return math.fsum(math.comb(n, d) * p**d * (1.0 - p) ** (n - d) for d in range(c + 1))


def _log_comb(n: int, k: int) -> float:
    return math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1)


def hypergeometric_acceptance(defectives: int, lot_size: int, n: int, c: int) -> float:
    """Pa for a lot of ``lot_size`` devices holding ``defectives`` non-conforming ones:
    P(X ≤ c), X ~ Hypergeometric(N, D, n). Terms through log-gamma, so lots of any size
    (ISO 2859-1 goes beyond 500 000) cost c + 1 terms."""
    if not 0 <= defectives <= lot_size or not 1 <= n <= lot_size:
        raise ValueError("need 0 ≤ D ≤ N and 1 ≤ n ≤ N")
    total = _log_comb(lot_size, n)
    terms = [
        math.exp(_log_comb(defectives, d) + _log_comb(lot_size - defectives, n - d) - total)
        for d in range(min(c, defectives) + 1)
        if n - d <= lot_size - defectives
    ]
    return min(1.0, math.fsum(terms))


def ltpd(n: int, c: int, beta: float = CONSUMER_RISK) -> float:
    """Fraction non-conforming p with Pa(p) = β (binomial), by bisection to 1e-12."""
    if c >= n:
        return 1.0
    low, high = 0.0, 1.0
    for _ in range(200):
        mid = 0.5 * (low + high)
        if binomial_acceptance(mid, n, c) > beta:
            low = mid
        else:
            high = mid
        if high - low < 1e-12:
            break
    return 0.5 * (low + high)


def lot_ltpd_count(lot_size: int, n: int, c: int, beta: float = CONSUMER_RISK) -> int | None:
    """Smallest D with hypergeometric Pa(D) ≤ β (``None`` when no D ≤ N gets there).

    Pa falls monotonically as D grows, so D is found by bisection."""
    if hypergeometric_acceptance(lot_size, lot_size, n, c) > beta:
        return None
    low, high = 0, lot_size  # Pa(low) > β unless low = 0 qualifies; Pa(high) ≤ β
    if hypergeometric_acceptance(0, lot_size, n, c) <= beta:
        return 0
    while high - low > 1:
        mid = (low + high) // 2
        if hypergeometric_acceptance(mid, lot_size, n, c) <= beta:
            high = mid
        else:
            low = mid
    return high


@dataclass(frozen=True)
class SamplingPlan:
    """A lot's single sampling plan and its OC figures.

    Attributes
    ----------
    kind
        ``"zero-acceptance"`` or ``"iso-2859-1"``.
    lot_size, sample_size, acceptance_number
        N, n, c.
    inspection_level
        ISO 2859-1 inspection level (``None`` for a zero-acceptance plan).
    aql
        Acceptance quality limit as a fraction.
    pa_at_aql
        Binomial probability of accepting a lot at the AQL.
    ltpd
        Binomial fraction non-conforming accepted with probability β.
    lot_ltpd_defectives
        Hypergeometric: fewest non-conforming devices in this lot of N that the plan rejects
        with probability ≥ 1 − β.
    """

    kind: str
    lot_size: int
    sample_size: int
    acceptance_number: int
    inspection_level: str | None
    aql: float
    pa_at_aql: float
    ltpd: float
    lot_ltpd_defectives: int | None
    consumer_risk: float = CONSUMER_RISK

    def describe(self) -> str:
        """The plan and its protection as one paragraph for the report and the CLI."""
        if self.kind == "zero-acceptance":
            plan = (f"Zero-acceptance single sampling plan: n = {self.sample_size} of a lot of "
                    f"N = {self.lot_size}, c = 0")
        else:
            plan = (f"ISO 2859-1 single sampling plan, normal inspection, inspection level "
                    f"{self.inspection_level}, AQL {_percent(self.aql)}: n = "
                    f"{self.sample_size} of a lot of N = {self.lot_size}, Ac = "
                    f"{self.acceptance_number}, Re = {self.acceptance_number + 1} (n and Ac "
                    "as stated in the limits file from ISO 2859-1 Tables 1 and 2-A)")
        beta = _percent(self.consumer_risk)
        text = (f"{plan}. Probability of acceptance at the AQL ({_percent(self.aql)} "
                f"non-conforming): Pa = {_percent(self.pa_at_aql)}; LTPD (Pa = {beta}): "
                f"{_percent(self.ltpd)} non-conforming (binomial, type B OC)")
        if self.lot_ltpd_defectives is not None:
            text += (f"; in this lot of {self.lot_size}, {self.lot_ltpd_defectives} or more "
                     f"non-conforming devices are rejected with probability ≥ "
                     f"{_percent(1 - self.consumer_risk)} (hypergeometric, type A OC)")
        return text + "."

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "lot_size": self.lot_size,
            "sample_size": self.sample_size,
            "acceptance_number": self.acceptance_number,
            "rejection_number": self.acceptance_number + 1,
            "inspection_level": self.inspection_level,
            "aql": self.aql,
            "pa_at_aql": self.pa_at_aql,
            "ltpd": self.ltpd,
            "consumer_risk": self.consumer_risk,
            "lot_ltpd_defectives": self.lot_ltpd_defectives,
            "oc_distribution": "binomial (Pa at AQL, LTPD); hypergeometric (lot_ltpd_defectives)",
            "description": self.describe(),
        }


def _percent(fraction: float) -> str:
    return f"{100 * fraction:.3g} %"


def sampling_plan(rule: LotRule) -> SamplingPlan:
    """The plan of a limits file's ``lot`` block with its OC figures."""
    n, c = rule.sample_size, rule.acceptance_number
    return SamplingPlan(
        kind=rule.plan,
        lot_size=rule.lot_size,
        sample_size=n,
        acceptance_number=c,
        inspection_level=rule.inspection_level,
        aql=rule.aql,
        pa_at_aql=binomial_acceptance(rule.aql, n, c),
        ltpd=ltpd(n, c),
        lot_ltpd_defectives=lot_ltpd_count(rule.lot_size, n, c),
    )
