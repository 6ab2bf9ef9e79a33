"""Plain records shared by the runner, the store, grading, loss estimation and the report.

These are the contract between packages: the runner produces :class:`ShotResult` objects,
the store persists and reloads them unchanged, grading and the report only read them.
All values are SI floats (kelvin for temperatures).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

#: Keys of ``ShotResult.conditions`` (measured test conditions of one shot).
CONDITION_KEYS = ("if_A", "didt_A_per_s", "vr_V", "temperature_K")

#: The only flag of a shot recorded before its analysis finished (the shot is in the raw
#: record; its metrics follow). A run interrupted at that moment completes the shot from the
#: raw record on ``--resume``. Such a shot is not valid.
FLAG_ANALYSIS_PENDING = "analysis_pending"

#: Starts of the flags that make a shot invalid whatever its measured conditions (the runner's
#: ``build_result``): no event found, required metrics missing, a clipped diode channel, not
#: analysed yet. Every other flag is a condition flag (``"condition:..."``) or a warning.
INVALIDATING_FLAGS = ("analysis_failed", "metrics_missing", "clipped_diode",
                      FLAG_ANALYSIS_PENDING)


def invalid_for_conditions_only(flags: tuple[str, ...] | list[str]) -> bool:
    """Whether an invalid shot carrying ``flags`` was invalid only for its measured
    conditions: at least one condition flag and no invalidating flag (warnings, such as an
    under-resolved recovery, do not count)."""
    return (any(f.startswith("condition:") for f in flags)
            and not any(f.startswith(INVALIDATING_FLAGS) for f in flags))


@dataclass(frozen=True)
class TestPoint:
    """One requested test condition of a sequence (targets, SI units)."""

    __test__ = False  # not a pytest test class

    index: int
    temperature_K: float
    bus_voltage_V: float
    forward_current_A: float
    didt_A_per_s: float | None = None
    gate_resistance_ohm: float | None = None
    label: str = ""
    #: qualification step the point serves ("" = none; "worst_case_snappiness":
    #: :mod:`benchrun.analysis.snappiness`), from the sequence's ``qualification``
    qualification: str = ""

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class ShotResult:
    """Everything known about one fired and analysed shot.

    Attributes
    ----------
    run_id, part, lot, serial
        Identify the run and the device under test.
    point
        The requested test point.
    repeat, attempt
        Repeat number at this point (0-based) and attempt (0 first, 1 the retry of an invalid shot).
    timestamp
        ISO 8601 UTC time the shot was fired.
    conditions
        Measured test conditions, keys :data:`CONDITION_KEYS`.
    metrics
        Recovery (and switching) metrics, SI units, keys as ``RecoveryMetrics.to_dict()``;
        a metric that could not be found is ``None``.
    flags
        Reasons the result may be untrustworthy (from analysis and condition checks).
    valid
        True when the measured conditions were within tolerance and analysis found the event.
    raw_ref
        Key of this shot in the run's raw HDF5 record (e.g. ``"shots/000012"``).
    acquisition
        What the uncertainty budget needs about the capture: ``sample_interval_s``,
        ``voltage_range_V``, ``current_range_A`` (full scale), ``adc_bits``, ...
    """

    run_id: str
    part: str
    lot: str
    serial: str
    point: TestPoint
    repeat: int
    attempt: int
    timestamp: str
    conditions: dict[str, float]
    metrics: dict[str, float | None]
    flags: tuple[str, ...] = ()
    valid: bool = True
    raw_ref: str = ""
    acquisition: dict[str, float] = field(default_factory=dict)

    @property
    def pending(self) -> bool:
        """True for a shot recorded before its analysis finished
        (:data:`FLAG_ANALYSIS_PENDING`)."""
        return FLAG_ANALYSIS_PENDING in self.flags

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["flags"] = list(self.flags)
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ShotResult:
        values = dict(data)
        values["point"] = TestPoint(**values["point"])
        values["flags"] = tuple(values.get("flags", ()))
        return cls(**values)


def json_safe(value: Any) -> Any:
    """``value`` with non-finite floats replaced by ``None`` and tuples by lists (for JSON)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    return value
