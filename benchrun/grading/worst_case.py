"""The worst-case snappiness step of a qualification (pure).

A sequence marks one test point ``qualification: worst_case_snappiness`` (low current, high
di/dt, cold, high VR); the limits file's ``worst_case`` block names the condition it belongs to
and the step's limits.  Each device is graded on its **worst** valid shot at that point — the
shot whose finding lies farthest towards or beyond a limit
(:attr:`~benchrun.analysis.snappiness.SnappinessAssessment.severity`) — by
:func:`benchrun.analysis.snappiness.assess_snappiness`, with Ls the bench fixture's stray
inductance.  Outcome: ``conforming`` (every limit met), ``non-conforming`` (with the reasons)
or ``invalid`` (no valid shot there, no Ls, or no ``worst_case`` limits for a marked point).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from benchrun.analysis.snappiness import (
    WORST_CASE_SNAPPINESS,
    SnappinessAssessment,
    SnappinessLimits,
    assess_snappiness,
)
from benchrun.config.limits import WorstCaseSpec
from benchrun.grading.decision import CONFORMING, INVALID, NONCONFORMING
from benchrun.records import ShotResult, TestPoint

__all__ = ["WorstCaseGrade", "grade_worst_case", "snappiness_limits"]


@dataclass(frozen=True)
class WorstCaseGrade:
    """One device's worst-case snappiness grade.

    ``shot``: ``"repeat r attempt a"`` of the worst shot; ``assessment`` its findings (None when
    not graded); ``reason``: one sentence for the report.
    """

    serial: str
    condition: str
    outcome: str
    reason: str
    n: int = 0
    shot: str = ""
    assessment: SnappinessAssessment | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"serial": self.serial, "condition": self.condition, "outcome": self.outcome,
                "reason": self.reason, "n": self.n, "shot": self.shot,
                "assessment": None if self.assessment is None else self.assessment.to_dict()}


def snappiness_limits(spec: WorstCaseSpec) -> SnappinessLimits:
    """The analysis' limits from the limits file's ``worst_case`` block."""
    return SnappinessLimits(
        rated_voltage_V=spec.rated_voltage, max_overshoot_excess=spec.max_overshoot_excess,
        max_ring_fraction=spec.max_ring_amplitude, max_ring_decay_s=spec.max_ring_decay,
        avalanche_fraction=spec.avalanche_fraction, clamp_time_s=spec.clamp_time,
        allow_snap=spec.allow_snap)


def grade_worst_case(shots: Sequence[ShotResult], spec: WorstCaseSpec | None,
                     points: Mapping[str, TestPoint | None], *,
                     stray_inductance_H: float | Mapping[str, float] | None,
                     valid: Mapping[int, bool] | None = None) -> list[WorstCaseGrade]:
    """Grade every device of ``shots`` at the worst-case snappiness point.

    ``stray_inductance_H``: the fixture's Ls, one value for one bench, or run id → Ls when the
    shots come from runs on several benches (a lot graded across runs); a shot whose run has
    no Ls makes the device's step invalid.

    ``points``: condition name → the test point graded there (as matched by the grading);
    ``valid``: ``id(shot)`` → whether the shot is valid for grading at the condition (its
    measured conditions within tolerance); default: the shot's own ``valid``.  Returns [] when
    there is neither a ``worst_case`` block nor a marked point.
    """
    marked = any(s.point.qualification == WORST_CASE_SNAPPINESS for s in shots)
    serials = sorted({s.serial for s in shots})
    if spec is None:
        if not marked:
            return []
        return [WorstCaseGrade(serial, "", INVALID,
                               "the sequence marks a worst-case snappiness point but the "
                               "limits file has no worst_case block: not graded")
                for serial in serials]
    point = points.get(spec.condition)
    limits = snappiness_limits(spec)
    out = []
    for serial in serials:
        here = [s for s in shots if s.serial == serial and point is not None
                and s.point == point]
        good = [s for s in here if (valid or {}).get(id(s), s.valid)]
        strays = {id(s): _stray_of(s, stray_inductance_H) for s in good}
        if stray_inductance_H is None or any(v is None for v in strays.values()):
            out.append(WorstCaseGrade(serial, spec.condition, INVALID,
                                      "the bench fixture's stray inductance is not known "
                                      "(grade with the bench file): VR + Ls·di/dt cannot be "
                                      "formed", len(good)))
            continue
        if not good:
            why = ("no test point matches it" if point is None
                   else f"none of its {len(here)} shot(s) is valid" if here
                   else "no shot recorded")
            out.append(WorstCaseGrade(serial, spec.condition, INVALID,
                                      f"worst-case snappiness at {spec.condition}: {why}"))
            continue
        found = [(assess_snappiness(s.metrics, s.flags, stray_inductance_H=strays[id(s)],
                                    limits=limits), s) for s in good]
        assessment, shot = max(found, key=lambda pair: pair[0].severity)
        label = f"repeat {shot.repeat} attempt {shot.attempt}"
        if assessment.passed:
            outcome = CONFORMING
            reason = (f"worst-case snappiness at {spec.condition} passed on the worst of "
                      f"{len(good)} shot(s) ({label})")
        else:
            outcome = NONCONFORMING
            reason = (f"worst-case snappiness at {spec.condition} failed on the worst of "
                      f"{len(good)} shot(s) ({label}): " + "; ".join(assessment.reasons))
        out.append(WorstCaseGrade(serial, spec.condition, outcome, reason, len(good), label,
                                  assessment))
    return out


def _stray_of(shot: ShotResult, stray: float | Mapping[str, float] | None) -> float | None:
    """The Ls of the bench that took ``shot``."""
    if stray is None or isinstance(stray, (int, float)):
        return stray
    return stray.get(shot.run_id)
