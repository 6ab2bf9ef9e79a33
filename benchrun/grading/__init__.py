"""Grading: limits, GUM uncertainty, ILAC-G8 decision rules, bins, lot statistics.

``load_limits(path) -> LimitsSpec`` and ``grade_lot(shots, limits) -> LotGrade`` are the
contract (DEVELOPERS.md).
"""

from benchrun.config.limits import LimitsSpec, load_limits
from benchrun.grading.decision import (
    CONFORMING,
    INDETERMINATE,
    INVALID,
    NONCONFORMING,
    DecisionRule,
    decide,
)
from benchrun.grading.grade import DeviceGrade, LotGrade, MetricGrade, grade_lot
from benchrun.grading.uncertainty import Contributor, UncertaintyBudget

__all__ = [
    "CONFORMING",
    "INDETERMINATE",
    "INVALID",
    "NONCONFORMING",
    "Contributor",
    "DecisionRule",
    "DeviceGrade",
    "LimitsSpec",
    "LotGrade",
    "MetricGrade",
    "UncertaintyBudget",
    "decide",
    "grade_lot",
    "load_limits",
]
