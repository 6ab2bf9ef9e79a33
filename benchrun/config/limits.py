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
      - {metric: irrm_A, max: 48 A, aggregation: worst}  # worst shot (default for peaks)
    decision_rule: {rule: guarded, guard_factor: 1}    # w = r·U (ILAC-G8:09/2019)
    uncertainty: {coverage_factor: 2}                  # GUM (JCGM 100:2008) settings
    bins: {metric: qrr_C, condition: 125C, classes: [{name: Q1, max: 4 uC}, ...]}
    lot: {lot_size: 10, sample_size: 10, plan: zero-acceptance, aql: 1 %}
    worst_case:                         # optional: the worst-case snappiness step
      condition: worst-case             # graded at the test point the sequence marks
      rated_voltage: 1200 V             # VRRM
      max_overshoot_excess: 10 %        # of VR + Ls·di/dt (Ls: the bench's stray inductance)
      max_ring_amplitude: 20 %          # of Irrm, after the recovery
      max_ring_decay: 100 ns            # envelope decay time constant
      avalanche_fraction: 90 %          # of VRRM ...
      clamp_time: 5 ns                  # ... held this long: dynamic avalanche suspected
      allow_snap: false                 # the snap flag (RRSF < 1/3) fails the step

Every limit, bin edge, tolerance and absolute uncertainty input is written with its unit
(``150 ns``, ``5 %``, ``3 K``): a bare number is refused at its line
(:mod:`benchrun.config.explicit`), except for the dimensionless metrics (softness, rrsf).
Instrument and probe accuracies are not part of the part's limits: they come from the bench
file (``benchrun.config.bench``, per instrument and probe with its calibration certificate).

Aggregation: each limit says how a device's valid shots are combined before the decision —
``mean`` (the mean of the shots, Type A term s/√n) or ``worst`` (the shot nearest to or beyond
a limit, Type A term s of a single shot). Default: ``worst`` for the peak values
:data:`PEAK_METRICS` (Irrm, Vrm: a peak limit protects against the worst event the part sees),
``mean`` for every other metric (charges, energies and times are properties of the device that
repeated shots estimate better on average).

A test point belongs to a condition when its *requested* temperature (and, where the condition
names them, forward current, bus voltage and di/dt) agree within the tolerances; a shot at
that point is valid for grading when its *measured* conditions agree with the targets within
the same tolerances.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Literal

from pydantic import Field, ValidationInfo, field_validator, model_validator

from benchrun.analysis.metrics_meta import METRICS
from benchrun.config.crosscheck import check_bin_order
from benchrun.config.explicit import (
    ExplicitFraction,
    ExplicitTemperatureBand,
    ExplicitTimeBound,
    ExplicitTolerance,
    explicit,
    has_no_unit,
    parse_explicit,
    unit_missing_message,
)
from benchrun.config.loader import StrictModel, read_yaml, validate
from benchrun.errors import ConfigError

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


#: Metrics that are peak values of one event: graded on the worst shot by default.
PEAK_METRICS = frozenset({"irrm_A", "vrm_V"})

#: How a device's shots are combined for a limit.
Aggregation = Literal["mean", "worst"]


def default_aggregation(metric: str) -> str:
    """``"worst"`` for the peak metrics (:data:`PEAK_METRICS`), ``"mean"`` otherwise."""
    return "worst" if metric in PEAK_METRICS else "mean"


def metric_value(value: Any, metric: str) -> float:
    """Parse a limit, bin edge or absolute input of ``metric``: a unit of the metric's
    dimension is required (a bare number is refused), except for dimensionless metrics."""
    dimension = metric_dimension(metric)
    if dimension == "dimensionless":
        if isinstance(value, bool):
            raise ValueError(f"expected a number, got {value!r}")
        if has_no_unit(value):
            return float(value)
    elif has_no_unit(value):
        raise ValueError(f"{unit_missing_message(value, dimension)} (limit of {metric})")
    try:
        return parse_explicit(value, dimension)
    except ValueError as exc:
        raise ValueError(f"{exc} (limit of {metric})") from None


def _metric_quantity(value: Any, info: ValidationInfo) -> Any:
    """Parse ``value`` in the dimension of the sibling ``metric`` field."""
    if value is None:
        return None
    metric = info.data.get("metric")
    if metric is None:  # the metric itself failed validation; its error is reported first
        return value
    return metric_value(value, metric)


_Temperature = explicit("temperature")
_Current = explicit("current")
_Voltage = explicit("voltage")
_CurrentSlope = explicit("current_slope")


class Condition(StrictModel):
    """A required test condition (targets; unset ones are taken from the test point)."""

    name: str = Field(min_length=1)
    temperature: _Temperature = Field(gt=0)
    forward_current: _Current | None = Field(default=None, gt=0)
    reverse_voltage: _Voltage | None = Field(default=None, gt=0)
    didt: _CurrentSlope | None = Field(default=None, gt=0)


class Tolerances(StrictModel):
    """Allowed deviation of measured from requested conditions (same names as the sequence);
    written with their units (``5 %``, ``3 K``)."""

    forward_current: ExplicitTolerance | None = 0.05
    didt: ExplicitTolerance | None = 0.25
    reverse_voltage: ExplicitTolerance | None = 0.05
    temperature: ExplicitTemperatureBand = 3.0


class MetricLimit(StrictModel):
    """Lower and/or upper tolerance limit of one metric, at one condition or at all, and
    how the device's shots are combined for it (``aggregation``; ``None`` = the metric's
    default, :func:`default_aggregation`)."""

    metric: str
    condition: str | None = None
    min: float | None = None
    max: float | None = None
    aggregation: Aggregation | None = None

    @property
    def combine(self) -> str:
        """The aggregation in force: the stated one or the metric's default."""
        return self.aggregation or default_aggregation(self.metric)

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
    relative: ExplicitFraction | None = None
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


#: Uncertainty inputs that moved to the bench file, and where they are now.
MOVED_TO_BENCH = {
    "scope_vertical_accuracy": "instruments.scope.accuracy.vertical",
    "current_sensor_tolerance": "probes.diode_current.accuracy.scale",
    "voltage_probe_tolerance": "probes.diode_voltage.accuracy.scale",
    "deskew": "probes.<signal>.accuracy.skew",
}


class UncertaintySpec(StrictModel):
    """Part-side settings of the per-metric GUM budgets (see
    :mod:`benchrun.grading.uncertainty`): coverage factor, the analysis' integration end
    fraction, whether repeatability is evaluated, and part-specific extra contributors.

    Instrument and probe accuracies belong to the bench file
    (:class:`benchrun.config.bench.InstrumentAccuracy`, :class:`~benchrun.config.bench.
    ProbeAccuracy`); naming them here is refused with the key to use there.
    """

    coverage_factor: float = Field(default=2.0, gt=0, le=4)
    integration_end_fraction: float = Field(default=0.02, gt=0, lt=1)
    repeatability: bool = True
    extra: list[ExtraContributor] = Field(default_factory=list)

    @model_validator(mode="before")
    @classmethod
    def _moved(cls, data: Any) -> Any:
        if isinstance(data, dict):
            for key, where in MOVED_TO_BENCH.items():
                if key in data:
                    raise ValueError(
                        f"{key!r} is an instrument or probe accuracy: it belongs to the bench "
                        f"file ({where}, with its calibration certificate), not to the part's "
                        "limits")
        return data


class BinClass(StrictModel):
    """One bin class: ``min <= value <= max`` (either bound optional), SI units after
    loading; written with units in the file."""

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

    A conforming device falls in the first class (in file order) whose bounds contain its
    value, unless the decision rule's guard band around its value crosses a class edge: then
    it is *unbinned* (:mod:`benchrun.grading.bins`).
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
                    entry[key] = metric_value(entry[key], metric)
                except ValueError as exc:
                    name = entry.get("name", index)
                    raise ValueError(f"class {index} ({name}) {key}: {exc}") from None
            parsed.append(entry)
        return parsed


#: Inspection levels of ISO 2859-1 (general I-III, special S-1 to S-4).
INSPECTION_LEVELS = ("I", "II", "III", "S-1", "S-2", "S-3", "S-4")


class LotRule(StrictModel):
    """Lot acceptance by attributes, single sampling: a sample of ``sample_size`` (n) devices
    from a lot of ``lot_size`` (N) is accepted when at most ``acceptance_number`` (c) of them
    count as non-conforming.

    ``plan`` names where n and c come from: ``zero-acceptance`` (c = 0) or ``iso-2859-1``
    (n and c as read from ISO 2859-1 Tables 1 and 2-A for the stated ``inspection_level`` and
    ``aql``; the tool does not look them up). ``aql`` is required for both: the plan's
    probability of acceptance at the AQL and its LTPD are computed from it
    (:mod:`benchrun.grading.sampling`).
    """

    lot_size: int = Field(ge=1)
    sample_size: int = Field(ge=1)
    plan: Literal["zero-acceptance", "iso-2859-1"]
    aql: ExplicitTolerance
    acceptance_number: int = Field(default=0, ge=0)
    inspection_level: Literal["I", "II", "III", "S-1", "S-2", "S-3", "S-4"] | None = None
    indeterminate: Literal["nonconforming", "conforming"] = "nonconforming"
    invalid: Literal["nonconforming", "excluded"] = "nonconforming"

    @model_validator(mode="after")
    def _consistent(self) -> LotRule:
        if self.sample_size > self.lot_size:
            raise ValueError(f"sample size n = {self.sample_size} is larger than the lot "
                             f"(N = {self.lot_size})")
        if self.acceptance_number >= self.sample_size:
            raise ValueError(f"acceptance number c = {self.acceptance_number} must be smaller "
                             f"than the sample size n = {self.sample_size}")
        if self.plan == "zero-acceptance" and self.acceptance_number != 0:
            raise ValueError("a zero-acceptance plan has c = 0; use plan: iso-2859-1 for "
                             f"c = {self.acceptance_number}")
        if self.plan == "iso-2859-1" and self.inspection_level is None:
            raise ValueError("an ISO 2859-1 plan names its inspection_level (I, II, III, "
                             "S-1 ... S-4)")
        if self.plan == "zero-acceptance" and self.inspection_level is not None:
            raise ValueError("inspection_level belongs to an ISO 2859-1 plan")
        return self


class ConventionSpec(StrictModel):
    """The Qrr / Err / trr window convention the limits assume
    (:mod:`benchrun.analysis.conventions`); grading refuses results of another one."""

    integration_window: Literal["fraction", "trr_end", "triangle"] = "fraction"
    integration_end_fraction: float = Field(default=0.02, gt=0, lt=1)
    trr_method: Literal["extrapolate", "threshold"] = "extrapolate"
    fit_high: float = Field(default=0.9, gt=0, lt=1)
    fit_low: float = Field(default=0.25, gt=0, lt=1)
    trr_threshold_fraction: float = Field(default=0.25, gt=0, lt=1)


class WorstCaseSpec(StrictModel):
    """``worst_case:`` block: limits of the worst-case snappiness step
    (:mod:`benchrun.analysis.snappiness`), applied to the worst shot of the test point the
    sequence marks ``qualification: worst_case_snappiness`` (at ``condition``)."""

    condition: str = Field(min_length=1)
    rated_voltage: _Voltage = Field(gt=0)
    max_overshoot_excess: ExplicitFraction = Field(gt=0)
    max_ring_amplitude: ExplicitFraction = Field(gt=0)
    max_ring_decay: ExplicitTimeBound = Field(gt=0)
    avalanche_fraction: ExplicitFraction = Field(default=0.9, gt=0)
    clamp_time: ExplicitTimeBound = Field(default=5e-9, gt=0)
    allow_snap: bool = False


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
    lot: LotRule
    convention: ConventionSpec = ConventionSpec()
    worst_case: WorstCaseSpec | None = None

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
    if spec.worst_case is not None and spec.worst_case.condition not in names:
        fail(f"unknown condition {spec.worst_case.condition!r} (defined: {', '.join(names)})",
             ("worst_case", "condition"))
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
    check_bin_order(spec, str(path), lines)
    return spec
