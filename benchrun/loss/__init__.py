"""Recovery loss estimate: energy per commutation, average power, and part comparison.

Public API::

    from benchrun.loss import estimate_losses, compare, LossTable, Comparison
"""

from benchrun.loss.compare import Comparison, ComparisonRow, compare
from benchrun.loss.estimate import (
    LossGroup,
    LossRow,
    LossTable,
    capacitive_parts_of,
    estimate_losses,
    rejected_devices,
    shot_energy,
)

__all__ = [
    "Comparison",
    "ComparisonRow",
    "LossGroup",
    "LossRow",
    "LossTable",
    "capacitive_parts_of",
    "compare",
    "estimate_losses",
    "rejected_devices",
    "shot_energy",
]
