"""Limits file schema: what a part must meet, how conformity is decided, how U is estimated.

Loaded with :func:`load_limits`; errors name file, line and field (unknown keys, unknown
metrics, a quantity of the wrong dimension such as ``"30 V"`` for a charge, ``min > max``,
a limit that names an undefined condition). Example (``limits/DX-4417.yaml``)::

    part: DX-4417
    conditions:                         # required test conditions; every device must have
      - name: 25C                       # a valid shot at each
        temperature: 25 degC
        forward_current: 30 A           # optional; so are reverse_voltage and didt
      - name: 125C
        temperature: 125 degC
    tolerances: {forward_current: 5 %, didt: 25 %, reverse_voltage: 5 %, temperature: 3 K}
    limits:
      - {metric: trr_s, max: 150 ns}                   # at every condition
      - {metric: qrr_C, condition: 25C, max: 2.5 uC}   # overrides a general entry there
    decision_rule: {rule: guarded, guard_factor: 1}    # w = r·U (ILAC-G8:09/2019)
    uncertainty:                                       # GUM (JCGM 100:2008) inputs
      coverage_factor: 2
      scope_vertical_accuracy: 1.5 %                   # of full scale, each channel
      current_sensor_tolerance: 1 %
      voltage_probe_tolerance: 1 %
      deskew: 0.5 ns
    bins: {metric: qrr_C, condition: 125C, classes: [{name: Q1, max: 4 uC}, ...]}
    lot: {acceptance_number: 0, indeterminate: nonconforming, invalid: nonconforming}

A test point belongs to a condition when its *requested* temperature (and, where the condition
names them, forward current, bus voltage and di/dt) agree within the tolerances; a shot at
that point is valid for grading when its *measured* conditions agree with the targets within
the same tolerances.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, ValidationInfo, field_validator, model_validator

from benchrun.analysis.metrics_meta import METRICS
from benchrun.config.loader import (
    Current,
    CurrentSlope,
    Fraction,
    StrictModel,
    Temperature,
    TemperatureBand,
    Voltage,
    read_yaml,
    validate,
)
from benchrun.errors import ConfigError, UnitError
from benchrun.units import parse_quantity

#: Unit symbol (as in :mod:`benchrun.analysis.metrics_meta`) → dimension for parse_quantity.
_DIMENSION_OF_UNIT = {
    "A": "current",
    "s": "time",
    "": "dimensionless",
    "C": "charge",
    "J": "energy",
    "A/s": "current_slope",
    "V": "voltage",
    "W": "power",
    "V/s": "voltage_slope",
}

#: Absolute instants inside a record: a limit on them would mean nothing.
_NOT_GRADEABLE = frozenset({"t0_s", "t_irrm_s", "t_trr_s", "t2_s"})

#: Gradeable metric key → (dimension for :func:`benchrun.units.parse_quantity`, unit symbol),
#: from the analysis' metric table (``benchrun/analysis/metrics_meta.py``).
METRIC_UNITS: dict[str, tuple[str, str]] = {
    key: (_DIMENSION_OF_UNIT[item.unit], item.unit)
    for key, item in METRICS.items()
    if key not in _NOT_GRADEABLE and item.unit in _DIMENSION_OF_UNIT
}


def metric_dimension(metric: str) -> str:
    """Dimension name of a gradeable metric; ``ValueError`` for an unknown key."""
    if metric not in METRIC_UNITS:
        known = ", ".join(METRIC_UNITS)
        raise ValueError(f"unknown metric {metric!r} (known: {known})")
    return METRIC_UNITS[metric][0]


def metric_unit(metric: str) -> str:
    """Display unit symbol of a metric ("" for dimensionless or unknown keys)."""
    return METRIC_UNITS.get(metric, ("", ""))[1]


def _time_bound(value: Any) -> float:
    try:
        result = parse_quantity(value, "time")
    except UnitError as exc:
        raise ValueError(exc.message) from None
    if result < 0:
        raise ValueError("a time bound must not be negative")
    return result


#: A non-negative time bound: ``"0.5 ns"``.
TimeBound = Annotated[float, BeforeValidator(_time_bound)]


def _metric_quantity(value: Any, info: ValidationInfo) -> Any:
    """Parse ``value`` in the dimension of the sibling ``metric`` field."""
    if value is None:
        return None
    metric = info.data.get("metric")
    if metric is None:  # the metric itself failed validation; its error is reported first
        return value
    try:
        return parse_quantity(value, metric_dimension(metric))
    except UnitError as exc:
        raise ValueError(f"{exc.message} (limit of {metric})") from None


class Condition(StrictModel):
    """A required test condition (targets; unset ones are taken from the test point)."""

    name: str = Field(min_length=1)
    temperature: Temperature = Field(gt=0)
    forward_current: Current | None = Field(default=None, gt=0)
    reverse_voltage: Voltage | None = Field(default=None, gt=0)
    didt: CurrentSlope | None = Field(default=None, gt=0)


class Tolerances(StrictModel):
    """Allowed deviation of measured from requested conditions (same names as the sequence)."""

    forward_current: Fraction | None = 0.05
    didt: Fraction | None = 0.25
    reverse_voltage: Fraction | None = 0.05
    temperature: TemperatureBand = 3.0


class MetricLimit(StrictModel):
    """Lower and/or upper tolerance limit of one metric, at one condition or at all."""

    metric: str
    condition: str | None = None
    min: float | None = None
    max: float | None = None

    @field_validator("metric")
    @classmethod
    def _known(cls, value: str) -> str:
        metric_dimension(value)
        return value

    @field_validator("min", "max", mode="before")
    @classmethod
    def _parse(cls, value: Any, info: ValidationInfo) -> Any:
        return _metric_quantity(value, info)

    @model_validator(mode="after")
    def _order(self) -> MetricLimit:
        if self.min is None and self.max is None:
            raise ValueError("give 'min', 'max' or both")
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError(f"min ({self.min:g}) is greater than max ({self.max:g})")
        return self


class DecisionRuleSpec(StrictModel):
    """Decision rule of ILAC-G8:09/2019: ``simple`` acceptance (§4.2.1, w = 0), ``guarded``
    (§4.2.3, non-binary: conforming / indeterminate / non-conforming) or ``guarded-binary``
    (§4.2.2: pass inside the acceptance limits, fail otherwise), guard band w = r·U."""

    rule: Literal["simple", "guarded", "guarded-binary"] = "guarded"
    guard_factor: float = Field(default=1.0, ge=0, le=3)


class ExtraContributor(StrictModel):
    """An additional Type B contributor to one metric's budget (GUM §4.3)."""

    metric: str
    name: str = Field(min_length=1)
    relative: Fraction | None = None
    absolute: float | None = None
    distribution: Literal["rectangular", "triangular", "normal"] = "rectangular"
    coverage_factor: float = Field(default=2.0, gt=0)

    @field_validator("metric")
    @classmethod
    def _known(cls, value: str) -> str:
        metric_dimension(value)
        return value

    @field_validator("absolute", mode="before")
    @classmethod
    def _parse(cls, value: Any, info: ValidationInfo) -> Any:
        return _metric_quantity(value, info)

    @model_validator(mode="after")
    def _one(self) -> ExtraContributor:
        if (self.relative is None) == (self.absolute is None):
            raise ValueError("give exactly one of 'relative' or 'absolute'")
        if self.absolute is not None and self.absolute < 0:
            raise ValueError("a bound must not be negative")
        return self


class UncertaintySpec(StrictModel):
    """Inputs of the per-metric GUM budgets (see :mod:`benchrun.grading.uncertainty`).

    Bounds are half-widths of rectangular distributions (JCGM 100:2008 §4.3.7) unless stated.
    """

    coverage_factor: float = Field(default=2.0, gt=0, le=4)
    scope_vertical_accuracy: Fraction = 0.015
    current_sensor_tolerance: Fraction = 0.01
    voltage_probe_tolerance: Fraction = 0.01
    deskew: TimeBound = 0.5e-9
    integration_end_fraction: float = Field(default=0.02, gt=0, lt=1)
    repeatability: bool = True
    extra: list[ExtraContributor] = Field(default_factory=list)


class BinClass(StrictModel):
    """One bin class: ``min <= value <= max`` (either bound optional), SI units."""

    name: str = Field(min_length=1)
    min: float | None = None
    max: float | None = None

    @model_validator(mode="after")
    def _order(self) -> BinClass:
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError(f"min ({self.min:g}) is greater than max ({self.max:g})")
        return self


class BinSpec(StrictModel):
    """Classes of one metric at one condition, e.g. Qrr classes for parallel matching.

    A device falls in the first class (in file order) whose bounds contain its value.
    """

    metric: str
    condition: str | None = None
    classes: list[BinClass] = Field(min_length=1)

    @field_validator("metric")
    @classmethod
    def _known(cls, value: str) -> str:
        metric_dimension(value)
        return value

    @field_validator("classes", mode="before")
    @classmethod
    def _parse(cls, value: Any, info: ValidationInfo) -> Any:
        metric = info.data.get("metric")
        if metric is None or not isinstance(value, list):
            return value
        dimension = metric_dimension(metric)
        parsed: list[Any] = []
        for index, item in enumerate(value):
            if not isinstance(item, dict):
                parsed.append(item)
                continue
            entry = dict(item)
            for key in ("min", "max"):
                if entry.get(key) is None:
                    continue
                try:
                    entry[key] = parse_quantity(entry[key], dimension)
                except UnitError as exc:
                    name = entry.get("name", index)
                    raise ValueError(f"class {index} ({name}) {key}: {exc.message}") from None
            parsed.append(entry)
        return parsed


class LotRule(StrictModel):
    """Lot acceptance by attributes: accept when at most ``acceptance_number`` (c) devices
    count as non-conforming, and at least ``sample_size`` (n) devices were graded."""

    acceptance_number: int = Field(default=0, ge=0)
    sample_size: int | None = Field(default=None, ge=1)
    indeterminate: Literal["nonconforming", "conforming"] = "nonconforming"
    invalid: Literal["nonconforming", "excluded"] = "nonconforming"


class LimitsSpec(StrictModel):
    """A whole limits file."""

    part: str = Field(min_length=1)
    description: str = ""
    revision: str = ""
    conditions: list[Condition] = Field(min_length=1)
    tolerances: Tolerances = Tolerances()
    limits: list[MetricLimit] = Field(min_length=1)
    decision_rule: DecisionRuleSpec = DecisionRuleSpec()
    uncertainty: UncertaintySpec = UncertaintySpec()
    bins: BinSpec | None = None
    lot: LotRule = LotRule()

    def condition(self, name: str) -> Condition:
        """The condition called ``name``."""
        for condition in self.conditions:
            if condition.name == name:
                return condition
        raise KeyError(name)

    def limits_at(self, condition: str) -> list[MetricLimit]:
        """Limits that apply at ``condition``: condition-specific entries override general
        ones for the same metric; order follows the file."""
        specific = {item.metric for item in self.limits if item.condition == condition}
        chosen: list[MetricLimit] = []
        for item in self.limits:
            if item.condition == condition or (
                item.condition is None and item.metric not in specific
            ):
                chosen.append(item)
        return chosen


def _cross_check(spec: LimitsSpec, filename: str, lines: dict[tuple[Any, ...], int]) -> None:
    """Checks that span several entries, reported at the line of the offending entry."""

    def fail(message: str, path: tuple[Any, ...]) -> None:
        line = None
        probe = path
        while probe:
            if probe in lines:
                line = lines[probe]
                break
            probe = probe[:-1]
        field = ".".join(str(part) for part in path)
        raise ConfigError(message, file=filename, line=line, field=field)

    names = [condition.name for condition in spec.conditions]
    for index, name in enumerate(names):
        if names.index(name) != index:
            fail(f"condition {name!r} is defined twice", ("conditions", index, "name"))
    seen: set[tuple[str, str | None]] = set()
    for index, item in enumerate(spec.limits):
        if item.condition is not None and item.condition not in names:
            fail(
                f"unknown condition {item.condition!r} (defined: {', '.join(names)})",
                ("limits", index, "condition"),
            )
        key = (item.metric, item.condition)
        if key in seen:
            where = f"at {item.condition}" if item.condition else "for all conditions"
            fail(f"{item.metric} has two limits {where}", ("limits", index, "metric"))
        seen.add(key)
    for index, extra in enumerate(spec.uncertainty.extra):
        if extra.metric not in {item.metric for item in spec.limits}:
            fail(f"{extra.metric} has no limit to budget for", ("uncertainty", "extra", index))
    if spec.bins is not None:
        if spec.bins.condition is not None and spec.bins.condition not in names:
            fail(f"unknown condition {spec.bins.condition!r}", ("bins", "condition"))
        if spec.bins.condition is None and len(names) > 1:
            fail("name the condition the bins apply to", ("bins", "metric"))


def load_limits(path: str | Path) -> LimitsSpec:
    """Load and validate a limits file.

    Raises
    ------
    ConfigError
        With ``file:line: field: message`` for every mistake in the file.
    """
    data, lines = read_yaml(path)
    if data is None:
        data = {}
    spec = validate(LimitsSpec, data, filename=str(path), lines=lines)
    _cross_check(spec, str(path), lines)
    return spec
