"""Result records of grading: :class:`MetricGrade`, :class:`DeviceGrade`, :class:`LotGrade`.

Frozen dataclasses with deterministic, JSON-safe ``to_dict()`` (verification compares these
dictionaries exactly).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from benchrun.grading.lot import LotStatistics
from benchrun.grading.sampling import SamplingPlan
from benchrun.grading.uncertainty import UncertaintyBudget
from benchrun.records import json_safe


@dataclass(frozen=True)
class MetricGrade:
    """Grade of one metric of one device at one condition."""

    metric: str
    condition: str
    unit: str
    value: float | None
    n: int
    expanded_uncertainty: float | None
    combined_uncertainty: float | None
    coverage_factor: float
    lower: float | None
    upper: float | None
    acceptance_lower: float | None
    acceptance_upper: float | None
    guard_band: float | None
    outcome: str
    statement: str
    reason: str
    budget: UncertaintyBudget | None = None
    #: how the shots were combined: ``"mean"`` or ``"worst"`` (the shot nearest a limit)
    aggregation: str = "mean"
    #: the valid shots' values the grade was taken from, in shot order
    shot_values: tuple[float, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "metric": self.metric,
            "condition": self.condition,
            "unit": self.unit,
            "value": self.value,
            "n": self.n,
            "U": self.expanded_uncertainty,
            "u_c": self.combined_uncertainty,
            "k": self.coverage_factor,
            "lower": self.lower,
            "upper": self.upper,
            "acceptance_lower": self.acceptance_lower,
            "acceptance_upper": self.acceptance_upper,
            "guard_band": self.guard_band,
            "outcome": self.outcome,
            "statement": self.statement,
            "reason": self.reason,
            "budget": None if self.budget is None else self.budget.to_dict(),
            "aggregation": self.aggregation,
            "shot_values": list(self.shot_values),
        }


@dataclass(frozen=True)
class DeviceGrade:
    """Verdict of one device: the worst of its metric outcomes, its bin and why."""

    serial: str
    verdict: str
    bin: str | None
    grades: tuple[MetricGrade, ...]
    reasons: tuple[str, ...]
    values: dict[str, dict[str, float]] = field(default_factory=dict)
    shots: dict[str, dict[str, int]] = field(default_factory=dict)
    invalid_shots: tuple[str, ...] = ()
    ratios: dict[str, float] = field(default_factory=dict)
    #: why the device is in its bin, or why it is unbinned (``None``: no bins or not
    #: conforming)
    bin_reason: str | None = None

    @property
    def unbinned(self) -> bool:
        """A conforming device the bins could not place (see ``bin_reason``)."""
        return self.bin is None and self.bin_reason is not None

    def grade(self, metric: str, condition: str) -> MetricGrade:
        """The grade of ``metric`` at ``condition``."""
        for item in self.grades:
            if item.metric == metric and item.condition == condition:
                return item
        raise KeyError((metric, condition))

    def to_dict(self) -> dict[str, Any]:
        return {
            "serial": self.serial,
            "verdict": self.verdict,
            "bin": self.bin,
            "grades": [g.to_dict() for g in self.grades],
            "reasons": list(self.reasons),
            "values": {c: dict(v) for c, v in self.values.items()},
            "shots": {c: dict(v) for c, v in self.shots.items()},
            "invalid_shots": list(self.invalid_shots),
            "ratios": dict(self.ratios),
            "bin_reason": self.bin_reason,
        }


@dataclass(frozen=True)
class LotGrade:
    """Grades of every device, the lot disposition with its reasons, statistics, budgets."""

    part: str
    lots: tuple[str, ...]
    run_ids: tuple[str, ...]
    conditions: tuple[dict[str, Any], ...]
    devices: list[DeviceGrade]
    disposition: str
    reasons: tuple[str, ...]
    statistics: LotStatistics
    budgets: dict[str, UncertaintyBudget]
    decision_rule: str
    lot_rule: str
    #: the sampling plan and its OC figures (Pa at the AQL, LTPD)
    plan: SamplingPlan | None = None
    #: the instrument and probe accuracies the budgets used, with their certificates
    instrument_inputs: dict[str, Any] = field(default_factory=dict)
    #: every limit in force per condition: metric, condition, unit, lower, upper, aggregation
    limits: tuple[dict[str, Any], ...] = ()
    #: the worst-case snappiness step per device (:mod:`benchrun.grading.worst_case`)
    worst_case: tuple[Any, ...] = ()

    def device(self, serial: str) -> DeviceGrade:
        """The grade of the device ``serial``."""
        for item in self.devices:
            if item.serial == serial:
                return item
        raise KeyError(serial)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe, deterministic dictionary (non-finite floats become ``None``)."""
        data = {
            "part": self.part,
            "lots": list(self.lots),
            "run_ids": list(self.run_ids),
            "conditions": [dict(c) for c in self.conditions],
            "devices": [d.to_dict() for d in self.devices],
            "disposition": self.disposition,
            "reasons": list(self.reasons),
            "statistics": self.statistics.to_dict(),
            "budgets": {key: b.to_dict() for key, b in self.budgets.items()},
            "decision_rule": self.decision_rule,
            "lot_rule": self.lot_rule,
            "plan": None if self.plan is None else self.plan.to_dict(),
            "instrument_inputs": dict(self.instrument_inputs),
            "limits": [dict(row) for row in self.limits],
        }
        if self.worst_case:  # only when graded: earlier grades keep their dictionary
            data["worst_case"] = [w.to_dict() for w in self.worst_case]
        return json_safe(data)


