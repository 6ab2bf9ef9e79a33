"""Grading: limits, GUM uncertainty, ILAC-G8 decision rules, bins, lot statistics.

``load_limits(path) -> LimitsSpec`` and ``grade_lot(shots, limits, *, bench) -> LotGrade``
are the contract (DEVELOPERS.md); ``run_bench(run)`` loads the bench file a stored run was
made on (its instrument and probe accuracies feed the budgets).
"""

from __future__ import annotations

from typing import Any

from benchrun.config.bench import BenchConfig, load_bench
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
from benchrun.grading.sampling import SamplingPlan
from benchrun.grading.uncertainty import Contributor, InstrumentInputs, UncertaintyBudget


def run_bench(run: Any) -> BenchConfig:
    """The bench file of a stored run (``RunData.bench_path``).

    Raises
    ------
    GradingError
        The run has no run folder or no ``bench.yaml``.
    """
    from benchrun.errors import GradingError

    path = getattr(run, "bench_path", None)
    if path is None or not path.is_file():
        raise GradingError("the instrument and probe accuracies come from the bench file and "
                           "the run has no bench.yaml; name one with --bench FILE")
    return load_bench(path)


__all__ = [
    "CONFORMING",
    "INDETERMINATE",
    "INVALID",
    "NONCONFORMING",
    "BenchConfig",
    "Contributor",
    "DecisionRule",
    "DeviceGrade",
    "InstrumentInputs",
    "LimitsSpec",
    "LotGrade",
    "MetricGrade",
    "SamplingPlan",
    "UncertaintyBudget",
    "decide",
    "grade_lot",
    "load_limits",
    "run_bench",
]
