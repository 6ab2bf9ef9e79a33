"""Qualification verdicts of a characterisation run (pure): the limits file applied to the
test points that stand for its conditions, and the worst-case snappiness step.

A sweep visits many points that lie within a limits condition's tolerances (the nominal
condition names no di/dt, so the di/dt sweep's 30 A, 25 °C, 600 V points match it as well as
the nominal point), and the acceptance grading (:func:`benchrun.grading.grade_lot`) refuses a
condition that matches several test points.  The qualification therefore grades an explicit
selection (:func:`select_graded_points`), one test point per limits condition:

1. the condition of the limits' ``worst_case`` block: the test point the sequence marks
   ``qualification: worst_case_snappiness`` (when it matches the condition);
2. otherwise the test point whose sequence entry is labelled with the condition's name
   (e.g. ``label: nominal`` for the condition ``nominal``) and matches it;
3. otherwise the only test point of the run that matches the condition; several matching
   points and no label leave the condition ungraded, with the points named.

Only the shots of the selected points are graded, by the acceptance path unchanged:
:func:`benchrun.grading.grade_lot` with the run's limits file and bench file, which grades
every limit at its condition (GUM budget, the limits' decision rule) and the worst-case
snappiness step (:func:`benchrun.grading.worst_case.grade_worst_case`, on each device's worst
valid shot at the marked point, Ls the bench fixture's stray inductance).  The other points of
the sweep are characterisation data and are not graded.  A limits file that cannot be applied
(:class:`~benchrun.errors.GradingError`) is a result here: the reason is kept and shown.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from benchrun.analysis.snappiness import WORST_CASE_SNAPPINESS
from benchrun.config.bench import BenchConfig
from benchrun.config.limits import Condition, LimitsSpec
from benchrun.errors import GradingError
from benchrun.grading.decision import CONFORMING, INVALID, worst
from benchrun.grading.grade import grade_lot, point_matches
from benchrun.grading.results import DeviceGrade, LotGrade, MetricGrade
from benchrun.grading.worst_case import WorstCaseGrade
from benchrun.records import ShotResult, TestPoint, json_safe

__all__ = ["ConditionVerdict", "GradedPoint", "Qualification", "condition_verdict",
           "grade_qualification", "select_graded_points"]


@dataclass(frozen=True)
class GradedPoint:
    """The test point graded at one limits condition (``None``: none), and why (``how``)."""

    condition: str
    point: TestPoint | None
    how: str


@dataclass(frozen=True)
class ConditionVerdict:
    """One device's verdict at one limits condition: the worst outcome of its limits there
    (``invalid`` without a valid shot), the reasons of every limit not met, the grades."""

    serial: str
    condition: str
    outcome: str
    reasons: tuple[str, ...]
    grades: tuple[MetricGrade, ...]
    n_valid: int

    def to_dict(self) -> dict[str, Any]:
        return {"serial": self.serial, "condition": self.condition, "outcome": self.outcome,
                "reasons": list(self.reasons), "n_valid": self.n_valid,
                "grades": [{"metric": g.metric, "value": g.value, "U": g.expanded_uncertainty,
                            "n": g.n, "lower": g.lower, "upper": g.upper,
                            "aggregation": g.aggregation, "outcome": g.outcome}
                           for g in self.grades]}


@dataclass(frozen=True)
class Qualification:
    """The qualification verdicts of a characterisation run (module docstring).

    ``lot`` is None when nothing could be graded (``not_graded`` says why); ``serials`` are
    every device of the run, graded or not.
    """

    serials: tuple[str, ...]
    selection: tuple[GradedPoint, ...] = ()
    limits: LimitsSpec | None = None
    lot: LotGrade | None = None
    stray_inductance_H: float | None = None
    not_graded: str = ""
    limits_source: str = ""
    #: serial → the shot the worst-case step was graded on (its flags are shown)
    worst_shots: Mapping[str, ShotResult] = field(default_factory=dict)

    @property
    def worst_case(self) -> tuple[WorstCaseGrade, ...]:
        return () if self.lot is None else tuple(self.lot.worst_case)

    def worst_case_of(self, serial: str) -> WorstCaseGrade | None:
        return next((w for w in self.worst_case if w.serial == serial), None)

    def device(self, serial: str) -> DeviceGrade | None:
        if self.lot is None:
            return None
        return next((d for d in self.lot.devices if d.serial == serial), None)

    def conditions(self) -> list[Condition]:
        """The limits' conditions in file order (the worst-case one included)."""
        return [] if self.limits is None else list(self.limits.conditions)

    @property
    def nominal_conditions(self) -> list[str]:
        """The limits' conditions other than the worst-case step's one."""
        spec = None if self.limits is None else self.limits.worst_case
        return [c.name for c in self.conditions()
                if spec is None or c.name != spec.condition]

    def verdict(self, serial: str, condition: str) -> ConditionVerdict:
        """The device's verdict at ``condition`` (invalid when the device was not graded)."""
        device = self.device(serial)
        if device is None:
            why = self.not_graded or "no shot of the device at the graded test points"
            return ConditionVerdict(serial, condition, INVALID, (why,), (), 0)
        return condition_verdict(device, condition)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe summary (attached to the signed report)."""
        return json_safe({
            "limits": self.limits_source,
            "not_graded": self.not_graded,
            "stray_inductance_H": self.stray_inductance_H,
            "selection": [{"condition": g.condition,
                           "point_index": None if g.point is None else g.point.index,
                           "point_label": None if g.point is None else g.point.label,
                           "how": g.how} for g in self.selection],
            "devices": [{"serial": serial,
                         "verdict": None if self.device(serial) is None
                         else self.device(serial).verdict,
                         "conditions": [self.verdict(serial, c.name).to_dict()
                                        for c in self.conditions()],
                         "worst_case": None if self.worst_case_of(serial) is None
                         else self.worst_case_of(serial).to_dict()}
                        for serial in self.serials],
            "decision_rule": None if self.lot is None else self.lot.decision_rule,
        })


def condition_verdict(device: DeviceGrade, condition: str) -> ConditionVerdict:
    """A device's verdict at one condition from its :class:`DeviceGrade`: the worst outcome
    of its limits there; ``invalid`` when no shot there was valid."""
    grades = tuple(g for g in device.grades if g.condition == condition)
    n_valid = int(device.shots.get(condition, {}).get("valid", 0))
    outcomes = [g.outcome for g in grades]
    reasons = [g.reason for g in grades if g.outcome != CONFORMING]
    if n_valid == 0:
        outcomes.append(INVALID)
        prefix = f"required condition {condition}:"
        reasons = [r for r in device.reasons if r.startswith(prefix)] or [
            f"no valid shot at {condition}"]
    return ConditionVerdict(device.serial, condition, worst(outcomes),
                            tuple(dict.fromkeys(reasons)), grades, n_valid)


def _describe(point: TestPoint) -> str:
    return f"#{point.index} '{point.label}'"


def select_graded_points(points: Sequence[TestPoint], limits: LimitsSpec,
                         entry_labels: Mapping[int, str] | None = None
                         ) -> tuple[GradedPoint, ...]:
    """One test point per limits condition (module docstring, rules 1-3).

    ``entry_labels``: test point index → the label of its sequence entry (before the
    temperature is appended); default: the point's label up to ``" @ "``.
    """
    labels = dict(entry_labels or {})
    distinct: list[TestPoint] = []
    for p in sorted(points, key=lambda p: p.index):
        if p not in distinct:
            distinct.append(p)
    tol = limits.tolerances
    out = []
    for condition in limits.conditions:
        matching = [p for p in distinct if point_matches(p, condition, tol)]
        if limits.worst_case is not None and condition.name == limits.worst_case.condition:
            marked = [p for p in matching if p.qualification == WORST_CASE_SNAPPINESS]
            if len(marked) == 1:
                out.append(GradedPoint(condition.name, marked[0],
                                       f"test point {_describe(marked[0])}, marked "
                                       f"qualification: {WORST_CASE_SNAPPINESS}"))
                continue
        named = [p for p in matching
                 if labels.get(p.index, p.label.split(" @ ", 1)[0]).strip() == condition.name]
        if len(named) == 1:
            out.append(GradedPoint(condition.name, named[0],
                                   f"test point {_describe(named[0])}, the sequence's point "
                                   f"labelled '{condition.name}'"))
        elif len(matching) == 1:
            out.append(GradedPoint(condition.name, matching[0],
                                   f"test point {_describe(matching[0])}, the only point of "
                                   "the run at the condition"))
        elif matching:
            listed = ", ".join(_describe(p) for p in matching)
            out.append(GradedPoint(condition.name, None,
                                   f"not graded: {len(matching)} test points match it "
                                   f"({listed}); label one of them '{condition.name}' in "
                                   "the sequence"))
        else:
            out.append(GradedPoint(condition.name, None,
                                   "not graded: no test point of the run matches it"))
    return tuple(out)


def grade_qualification(shots: Sequence[ShotResult], limits: LimitsSpec | None,
                        bench: BenchConfig | None, *,
                        entry_labels: Mapping[int, str] | None = None,
                        analysis_options: Mapping[str, Any] | None = None,
                        limits_source: str = "") -> Qualification:
    """Grade the selected points' shots with :func:`benchrun.grading.grade_lot` (module
    docstring).  ``limits`` or ``bench`` None: nothing graded, with the reason."""
    serials = tuple(sorted({s.serial for s in shots}))
    if limits is None:
        return Qualification(serials, not_graded="the run folder holds no limits file: no "
                             "qualification verdict", limits_source=limits_source)
    selection = select_graded_points([s.point for s in shots], limits, entry_labels)
    stray = None if bench is None else bench.fixture.stray_inductance
    base = Qualification(serials, selection, limits, stray_inductance_H=stray,
                         limits_source=limits_source)
    if bench is None:
        return replace(base, not_graded="the run folder holds no bench file (the instrument "
                        "accuracies and the fixture's stray inductance come from it): no "
                        "qualification verdict")
    chosen = {g.point for g in selection if g.point is not None}
    subset = [s for s in shots if s.point in chosen]
    if not subset:
        return replace(base, not_graded="no test point of the run stands for a limits "
                        "condition: no qualification verdict")
    try:
        lot = grade_lot(subset, limits, bench=bench, analysis_options=analysis_options)
    except GradingError as exc:
        return replace(base, not_graded=f"the limits could not be applied: {exc}")
    return replace(base, lot=lot, worst_shots=_worst_shots(subset, lot.worst_case))


def _worst_shots(shots: Sequence[ShotResult], graded: Sequence[WorstCaseGrade]
                 ) -> dict[str, ShotResult]:
    """Each device's graded worst shot, found by the label the step gives it
    (``"repeat r attempt a"``, :class:`~benchrun.grading.worst_case.WorstCaseGrade`)."""
    out = {}
    for g in graded:
        if g.assessment is None:
            continue
        for s in shots:
            if (s.serial == g.serial and s.point.qualification == WORST_CASE_SNAPPINESS
                    and f"repeat {s.repeat} attempt {s.attempt}" == g.shot):
                out[g.serial] = s
                break
    return out

