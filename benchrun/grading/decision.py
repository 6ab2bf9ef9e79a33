"""Decision rules for statements of conformity (ILAC-G8:09/2019, ISO 14253-1).

A measured value ``x`` with expanded uncertainty ``U`` is compared with tolerance limits
``TL`` (lower and/or upper). The guard band is ``w = r·U``.

- *Simple acceptance* (ILAC-G8:09/2019 §4.2.1, binary, w = 0): the acceptance limit is the
  tolerance limit, ``AL = TL``. A value inside the tolerance interval passes, any other fails.
  The probability of false acceptance may reach 50 % for a value right at the limit.
- *Guarded acceptance, non-binary* (§4.2.3): ``AL = TL − w`` (inside the tolerance interval).
  "Pass" inside the acceptance limits, "conditional pass" in the guard band inside the
  tolerance limit, "conditional fail" within ``w`` outside it, "fail" beyond ``TL + w``.
  In ISO 14253-1 wording the first is *conforming*, the last *non-conforming*, and the two
  conditional statements are *indeterminate* (neither conformity nor non-conformity is proven).
  With ``w = U`` (k = 2) the specific probability of false acceptance is at most about 2.5 %
  for a normal distribution (ILAC-G8:09/2019 §4.2.2, Figure 4).
- *Guarded acceptance, binary* (§4.2.2): pass inside ``AL = TL − w``, fail otherwise.

Values exactly at an acceptance limit are accepted (common practice for "≤ max").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

from benchrun.units import format_si

CONFORMING = "conforming"
NONCONFORMING = "non-conforming"
INDETERMINATE = "indeterminate"
INVALID = "invalid"

#: Outcomes from best to worst (a device verdict is the worst of its metric outcomes: a
#: proven non-conformity outweighs a test that could not be carried out).
OUTCOME_ORDER = (CONFORMING, INDETERMINATE, INVALID, NONCONFORMING)

RuleKind = Literal["simple", "guarded", "guarded-binary"]


@dataclass(frozen=True)
class DecisionRule:
    """A decision rule: ``kind`` and guard factor ``r`` (``w = r·U``)."""

    kind: RuleKind = "guarded"
    guard_factor: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in ("simple", "guarded", "guarded-binary"):
            raise ValueError(f"unknown decision rule {self.kind!r}")
        if not (self.guard_factor >= 0 and math.isfinite(self.guard_factor)):
            raise ValueError("the guard factor must be a finite number ≥ 0")

    def guard_band(self, expanded_uncertainty: float) -> float:
        """``w = r·U`` (0 for simple acceptance)."""
        if self.kind == "simple":
            return 0.0
        return self.guard_factor * abs(expanded_uncertainty)

    def describe(self, coverage_factor: float = 2.0) -> str:
        """Statement of the rule for the report."""
        k = f"{coverage_factor:g}"
        if self.kind == "simple":
            return (
                "Simple acceptance, binary statement (ILAC-G8:09/2019 §4.2.1): a device passes "
                "a limit when its graded value (the mean of its valid shots, or the worst shot "
                "where the limit says so) lies inside the tolerance limits "
                "(acceptance limit = tolerance limit, guard band w = 0). The expanded "
                f"uncertainty U = {k}·u_c (JCGM 100:2008) is reported but not used in the "
                "decision; the probability of false acceptance can reach 50 % at a limit."
            )
        r = f"{self.guard_factor:g}"
        if self.kind == "guarded-binary":
            return (
                "Guarded acceptance, binary statement (ILAC-G8:09/2019 §4.2.2): acceptance "
                f"limits are the tolerance limits moved inward by the guard band w = {r}·U, "
                f"U = {k}·u_c (JCGM 100:2008 §6.2); a graded value (mean of the valid shots, "
                "or the worst shot where the limit says so) inside them passes (conforming), "
                "any other fails (non-conforming)."
            )
        return (
            "Guarded acceptance, non-binary statement (ILAC-G8:09/2019 §4.2.3) with guard band "
            f"w = {r}·U, U = {k}·u_c (JCGM 100:2008 §6.2): the graded value (the mean of the "
            "valid shots, or the worst shot where the limit says so) is conforming (pass) "
            "inside the tolerance limits reduced by w, non-conforming (fail) outside the "
            "tolerance limits widened by w, and otherwise indeterminate "
            "(conditional pass / conditional fail; ISO 14253-1 wording). With w = U and k = 2 "
            "the specific probability of false acceptance is at most about 2.5 %."
        )


@dataclass(frozen=True)
class Decision:
    """Outcome of comparing one value with its limits.

    ``acceptance_lower/upper`` are the guard-band-adjusted acceptance limits ``TL ∓ w``;
    ``rejection_lower/upper`` the limits beyond which the value is non-conforming.
    ``statement`` is the ILAC-G8 wording (pass, conditional pass, conditional fail, fail).
    """

    outcome: str
    statement: str
    guard_band: float
    acceptance_lower: float | None
    acceptance_upper: float | None
    rejection_lower: float | None
    rejection_upper: float | None
    reason: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "outcome": self.outcome,
            "statement": self.statement,
            "guard_band": self.guard_band,
            "acceptance_lower": self.acceptance_lower,
            "acceptance_upper": self.acceptance_upper,
            "rejection_lower": self.rejection_lower,
            "rejection_upper": self.rejection_upper,
            "reason": self.reason,
        }


def _fmt(value: float, unit: str) -> str:
    return format_si(value, unit) if unit else f"{value:.4g}"


def decide(
    value: float,
    expanded_uncertainty: float,
    lower: float | None,
    upper: float | None,
    rule: DecisionRule,
    *,
    name: str = "value",
    unit: str = "",
) -> Decision:
    """Apply a decision rule to one measured value.

    Parameters
    ----------
    value
        Measured value (mean of the valid shots).
    expanded_uncertainty
        ``U = k·u_c`` of that value.
    lower, upper
        Tolerance limits; ``None`` for a one-sided specification.
    rule
        The decision rule.
    name, unit
        Used in the reason text only.
    """
    if lower is None and upper is None:
        raise ValueError("a decision needs at least one tolerance limit")
    if not math.isfinite(value):
        raise ValueError("the measured value must be finite")
    w = rule.guard_band(expanded_uncertainty)
    acc_lo = None if lower is None else lower + w
    acc_hi = None if upper is None else upper - w
    rej_lo = None if lower is None else lower - w
    rej_hi = None if upper is None else upper + w
    if rule.kind == "guarded-binary":
        rej_lo, rej_hi = acc_lo, acc_hi

    shown = _fmt(value, unit)
    inside_acceptance = (acc_lo is None or value >= acc_lo) and (acc_hi is None or value <= acc_hi)
    no_zone = acc_lo is not None and acc_hi is not None and acc_lo > acc_hi
    if inside_acceptance and not no_zone:
        parts = []
        if acc_lo is not None:
            parts.append(f"≥ {_fmt(acc_lo, unit)}")
        if acc_hi is not None:
            parts.append(f"≤ {_fmt(acc_hi, unit)}")
        what = "acceptance limit" if w > 0 else "tolerance limit"
        reason = f"{name} {shown} {' and '.join(parts)} ({what})"
        return Decision(CONFORMING, "pass", w, acc_lo, acc_hi, rej_lo, rej_hi, reason)

    below = rej_lo is not None and value < rej_lo
    above = rej_hi is not None and value > rej_hi
    if rule.kind == "guarded-binary" and no_zone:
        below = above = True  # no acceptance zone at all: nothing can pass
    if below or above:
        if above:
            limit = f"> {_fmt(upper, unit)}" if upper is not None else ""
            extra = f" + w {_fmt(w, unit)}" if w > 0 and rule.kind == "guarded" else ""
        else:
            limit = f"< {_fmt(lower, unit)}" if lower is not None else ""
            extra = f" − w {_fmt(w, unit)}" if w > 0 and rule.kind == "guarded" else ""
        if rule.kind == "guarded-binary":
            reason = f"{name} {shown} outside the acceptance limits (guard band {_fmt(w, unit)})"
            if no_zone:
                reason += "; the guard band leaves no acceptance zone"
        else:
            reason = f"{name} {shown} {limit}{extra} (tolerance limit)"
        return Decision(NONCONFORMING, "fail", w, acc_lo, acc_hi, rej_lo, rej_hi, reason)

    inside_tolerance = (lower is None or value >= lower) and (upper is None or value <= upper)
    statement = "conditional pass" if inside_tolerance else "conditional fail"
    reason = (
        f"{name} {shown} within the guard band (w = {_fmt(w, unit)}, U = "
        f"{_fmt(expanded_uncertainty, unit)}) of a tolerance limit: {statement}"
    )
    if no_zone:
        reason += "; the guard band leaves no acceptance zone"
    return Decision(INDETERMINATE, statement, w, acc_lo, acc_hi, rej_lo, rej_hi, reason)


def worst(outcomes: list[str] | tuple[str, ...]) -> str:
    """Worst outcome by :data:`OUTCOME_ORDER` (conforming for an empty list)."""
    if not outcomes:
        return CONFORMING
    return max(outcomes, key=OUTCOME_ORDER.index)
