"""Measurement uncertainty of each recovery metric, evaluated as in the GUM (JCGM 100:2008).

Every metric ``y`` is modelled as a function of a few input quantities ``x_i`` (gain errors of
the two channels, the quantisation of time instants, the residual skew between voltage and
current, the scatter of repeated shots). For each input the budget lists its standard
uncertainty ``u_i``, its sensitivity coefficient ``c_i = ∂y/∂x_i`` (derived below, evaluated at
the measured values), the combined standard uncertainty

    u_c = sqrt(Σ (c_i·u_i)²)            (JCGM 100:2008 §5.1.2, uncorrelated inputs)

and the expanded uncertainty ``U = k·u_c`` (§6.2.1, k = 2 by default).

Input quantities and their standard uncertainties
-------------------------------------------------
- *Channel gain, scope vertical accuracy.* Specified as ``±acc`` of full scale ``FS``: the
  reading error is bounded by ``a = acc·FS`` (A or V), rectangular (§4.3.7: u = a/√3). The
  offset is removed by the analysis (:mod:`benchrun.analysis.baseline`), so the error acts as a
  gain error; relative to the largest reading ``X_ref`` the metric is taken from it is bounded by
  ``a/X_ref``. Input: the relative gain error δ, ``u(δ) = (a/X_ref)/√3``.
- *Sensor scale tolerance* (shunt or current probe; voltage probe attenuation): relative bound
  ``p``, rectangular, ``u(δ) = p/√3``.
- *ADC quantisation of a peak reading*: one code step ``q = FS/2^bits``, ``u = q/√12``
  (GUM F.2.2.1).
- *Timing resolution of an instant*: the sample interval ``Δt`` bounds where an instant can be
  placed, ``u = Δt/√12`` (GUM F.2.2.1; linear interpolation usually does better, so this is
  conservative).
- *Deskew*: residual skew between the voltage and current channels within ``±a``,
  rectangular, ``u = a/√3``.
- *Repeatability* (Type A, §4.2.3): experimental standard deviation of the mean of the
  ``n`` repeated shots, ``s/√n`` with ν = n − 1, combined with the shots' own capture
  uncertainty ``ū/√n`` (noise, quantisation, timing: identical quantised repeats, s = 0, are
  not "no uncertainty"); a single shot carries its capture uncertainty ``ū``
  (:func:`repeatability`).
- *Coverage factor*: the budget's ν_eff by Welch-Satterthwaite (G.4.1); k is the Student t
  quantile for ν_eff at the coverage probability of the requested normal k (G.3.4).

Sensitivity coefficients (derivations)
--------------------------------------
With ``g`` a relative gain error of a channel, every metric proportional to that channel's
scale scales as ``y(1+g)``, so ``c = y``. Times are found from zero crossings and fractions of
Irrm, which a gain error leaves unchanged (``c = 0``: not listed).

- ``if_A``, ``irrm_A``: ``c = y`` for current gain; Irrm is a single peak sample, so one
  current-ADC step enters with ``c = 1``. (IF is a plateau average: quantisation averages out.)
- ``ta_s = t_irrm − t0``, ``tb_s = t_trr − t_irrm``, ``trr_s = t_trr − t0``: two instants,
  ``c = −1`` and ``+1``.
- ``softness = (t_trr − t_irrm)/(t_irrm − t0)``: ``∂S/∂t0 = tb/ta²``,
  ``∂S/∂t_irrm = −trr/ta²``, ``∂S/∂t_trr = 1/ta``.
- ``rrsf``: a ratio of two slopes of the same channel; gain errors cancel. Only
  repeatability is evaluated.
- ``qrr_C = −∫_{t0}^{t2} i dt``: current gain ``c = Qrr`` (reference reading Irrm). The end
  instant t2 is where ``i = −f·Irrm`` (f = integration end fraction), so
  ``∂Qrr/∂t2 = f·Irrm``; at t0 ``i = 0`` so the start instant does not contribute.
- ``err_J = ∫ v·i dt``: current and voltage gain ``c = Err`` each (voltage reference Vrm).
  A skew τ of the current against the voltage changes it by ``∂Err/∂τ = ∫ v·(di/dt) dt``;
  the current rises by Irrm during tb while the diode holds about VR, so
  ``c ≈ VR·Irrm`` (first-order estimate). End instant: ``∂Err/∂t2 = |v·i|(t2) ≈ VR·f·Irrm``.
- ``didt_A_per_s = ΔI/(t_b − t_a)`` with ``ΔI = 0.5·IF + 0.5·Irrm``: current gain ``c = di/dt``
  (reference max(IF, Irrm)); each instant ``|c| = ΔI/Δt² = (di/dt)²/ΔI``.
- ``vrm_V``, ``vr_V``: voltage gain ``c = y``; Vrm is a peak sample (one voltage-ADC step).
- ``eon_J``, ``eon_recovery_J``: sensor and probe scale tolerances ``c = y``; the switch
  channel's range is not in the acquisition facts, so its scope accuracy is not included (noted
  in the budget).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from benchrun.config.bench import BenchConfig
from benchrun.config.limits import metric_unit
from benchrun.errors import GradingError
from benchrun.units import format_si

SQRT3 = math.sqrt(3.0)
SQRT6 = math.sqrt(6.0)
SQRT12 = math.sqrt(12.0)


def rectangular(half_width: float) -> float:
    """Standard uncertainty of a rectangular distribution of half-width ``a``: ``a/√3``
    (JCGM 100:2008 §4.3.7)."""
    return abs(half_width) / SQRT3


def triangular(half_width: float) -> float:
    """Standard uncertainty of a symmetric triangular distribution: ``a/√6`` (§4.3.9)."""
    return abs(half_width) / SQRT6


def resolution(step: float) -> float:
    """Standard uncertainty of a reading quantised in steps ``δx``: ``δx/√12`` (GUM F.2.2.1)."""
    return abs(step) / SQRT12


def type_a(samples: Sequence[float]) -> tuple[float, float] | None:
    """Experimental standard deviation ``s`` and that of the mean ``s/√n`` (GUM §4.2.2-4.2.3).

    Returns ``None`` for fewer than two samples.
    """
    n = len(samples)
    if n < 2:
        return None
    mean = math.fsum(samples) / n
    s = math.sqrt(math.fsum((x - mean) ** 2 for x in samples) / (n - 1))
    return s, s / math.sqrt(n)


@dataclass(frozen=True)
class Contributor:
    """One line of an uncertainty budget.

    Attributes
    ----------
    name
        What the input quantity is.
    evaluation
        How ``u_i`` was obtained (Type A/B, distribution, clause of the GUM).
    standard_uncertainty
        ``u_i`` in ``input_unit`` (``"1"`` for a relative gain error).
    sensitivity
        ``c_i = ∂y/∂x_i`` in metric unit per input unit.
    """

    name: str
    evaluation: str
    standard_uncertainty: float
    input_unit: str
    sensitivity: float
    dof: float = math.inf

    @property
    def contribution(self) -> float:
        """``|c_i|·u_i`` in the metric's unit."""
        return abs(self.sensitivity) * self.standard_uncertainty

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "evaluation": self.evaluation,
            "u_i": self.standard_uncertainty,
            "input_unit": self.input_unit,
            "c_i": self.sensitivity,
            "contribution": self.contribution,
            "dof": None if math.isinf(self.dof) else self.dof,
        }


@dataclass(frozen=True)
class UncertaintyBudget:
    """Combined and expanded uncertainty of one metric value."""

    metric: str
    value: float | None
    contributors: tuple[Contributor, ...]
    combined: float
    coverage_factor: float
    expanded: float
    notes: tuple[str, ...] = ()
    effective_dof: float = math.inf

    def to_dict(self) -> dict[str, Any]:
        return {
            "metric": self.metric,
            "value": self.value,
            "contributors": [c.to_dict() for c in self.contributors],
            "u_c": self.combined,
            "k": self.coverage_factor,
            "U": self.expanded,
            "notes": list(self.notes),
            "nu_eff": None if math.isinf(self.effective_dof) else self.effective_dof,
        }


def combine(contributors: Sequence[Contributor]) -> float:
    """Combined standard uncertainty ``sqrt(Σ (c_i·u_i)²)`` (JCGM 100:2008 eq. 10)."""
    return math.sqrt(math.fsum(c.contribution**2 for c in contributors))


def effective_dof(contributors: Sequence[Contributor]) -> float:
    """Welch-Satterthwaite effective degrees of freedom (JCGM 100:2008 G.4.1, eq. G.2b):
    ``ν_eff = u_c⁴ / Σ (c_i·u_i)⁴/ν_i``; Type B inputs have ν_i = ∞."""
    u_c = combine(contributors)
    denominator = math.fsum(c.contribution**4 / c.dof for c in contributors
                            if math.isfinite(c.dof) and c.dof > 0)
    if u_c == 0.0 or denominator == 0.0:
        return math.inf
    return u_c**4 / denominator


def t_coverage_factor(k_normal: float, dof: float) -> float:
    """Coverage factor for ``dof`` degrees of freedom with the coverage probability that
    ``k_normal`` gives for a normal distribution (k = 2: 95.45 %): the Student t quantile
    (JCGM 100:2008 G.3.4 and Table G.2; scipy.stats.t). Infinite dof: ``k_normal``."""
    if math.isinf(dof):
        return k_normal
    from scipy import stats

    p = math.erf(k_normal / math.sqrt(2.0))
    return float(stats.t.ppf(0.5 * (1.0 + p), max(dof, 1.0)))


def make_budget(
    metric: str,
    value: float | None,
    contributors: Sequence[Contributor],
    coverage_factor: float = 2.0,
    notes: Sequence[str] = (),
) -> UncertaintyBudget:
    """Combine contributors and expand with ``U = k·u_c`` (JCGM 100:2008 §6.2.1).

    ``coverage_factor`` is the normal-distribution k; when a Type A contributor has finite
    degrees of freedom, k is the t quantile for the Welch-Satterthwaite ν_eff at the same
    coverage probability (:func:`t_coverage_factor`).
    """
    u_c = combine(contributors)
    nu = effective_dof(contributors)
    k = t_coverage_factor(coverage_factor, nu)
    return UncertaintyBudget(
        metric=metric,
        value=value,
        contributors=tuple(contributors),
        combined=u_c,
        coverage_factor=k,
        expanded=k * u_c,
        notes=tuple(notes),
        effective_dof=nu,
    )


_TYPE_A = "Type A, s/√n, ν = n − 1 (JCGM 100:2008 §4.2.3, G.3.3)"
_CAPTURE = ("Type B, from the capture itself, ū/√n (identical quantised readings: "
            "JCGM 100:2008 F.2.2.1)")


def pooled_std(groups: Sequence[Sequence[float]]) -> tuple[float, float] | None:
    """Pooled within-group standard deviation and its degrees of freedom,
    ``s_p² = ΣΣ(x_ij − x̄_i)² / Σ(n_i − 1)``, ν = Σ(n_i − 1) (ISO 5725-2 repeatability;
    JCGM 100:2008 H.3.6 for pooled estimates). None when no group has two values."""
    ss, dof = 0.0, 0
    for group in groups:
        if len(group) >= 2:
            mean = math.fsum(group) / len(group)
            ss += math.fsum((x - mean) ** 2 for x in group)
            dof += len(group) - 1
    return (math.sqrt(ss / dof), float(dof)) if dof else None


def repeatability(samples: Sequence[float], capture_u: Sequence[float], unit: str,
                  pooled: tuple[float, float] | None = None
                  ) -> tuple[list[Contributor], list[str]]:
    """Repeatability and capture contributors of a mean of ``n`` repeated shots.

    - ``s/√n`` with ν = n − 1 (Type A, §4.2.3, G.3.3);
    - combined with the shots' own capture uncertainty ``ū/√n`` (ν = ∞; ``ū`` the rms of
      the shots' ``u``: noise, quantisation, timing, :mod:`benchrun.analysis.capture_uncertainty`),
      so identical quantised repeats (s = 0) keep the uncertainty each shot is known to,
      and the budget changes smoothly with s (the capture term is partly inside s as well:
      conservative by at most a factor √2 when s ≈ ū);
    - a single shot: ``ū`` alone.
    """
    notes: list[str] = []
    caps = [float(u) for u in capture_u if u is not None and math.isfinite(float(u))]
    u_bar = math.sqrt(math.fsum(u * u for u in caps) / len(caps)) if caps else None
    n = len(samples)
    items: list[Contributor] = []
    evaluated = type_a([float(x) for x in samples])
    if pooled is not None and n >= 1:
        s_p, nu = pooled
        items.append(Contributor(
            f"repeatability, pooled s = {s_p:.4g} (ν = {nu:g}) over n = {n}",
            "Type A, pooled s/√n, ν = Σ(n_i − 1) (JCGM 100:2008 §4.2.3, H.3.6)",
            s_p / math.sqrt(n), unit, 1.0, dof=nu))
    elif evaluated is None:
        notes.append("single shot: repeatability not evaluated (Type A needs n ≥ 2)")
    else:
        s, u_mean = evaluated
        items.append(Contributor(f"repeatability, s = {s:.4g} over n = {n}", _TYPE_A, u_mean,
                                 unit, 1.0, dof=float(n - 1)))
    if u_bar is not None:
        count = max(n, 1)
        items.append(Contributor(
            f"capture (noise, quantisation, timing), ū = {u_bar:.4g} over n = {count}",
            _CAPTURE, u_bar / math.sqrt(count), unit, 1.0))
    return items, notes


@dataclass(frozen=True)
class InstrumentInputs:
    """Instrument-side inputs of the budgets, from the bench file (:func:`bench_inputs`).

    The ``*_source`` strings name the calibration certificate each figure is taken from;
    they appear in the budget lines.
    """

    scope_vertical_accuracy: float = 0.015
    current_sensor_tolerance: float = 0.01
    voltage_probe_tolerance: float = 0.01
    deskew: float = 0.5e-9
    integration_end_fraction: float = 0.02
    scope_source: str = ""
    current_source: str = ""
    voltage_source: str = ""
    deskew_source: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "scope_vertical_accuracy": self.scope_vertical_accuracy,
            "current_sensor_tolerance": self.current_sensor_tolerance,
            "voltage_probe_tolerance": self.voltage_probe_tolerance,
            "deskew": self.deskew,
            "integration_end_fraction": self.integration_end_fraction,
            "scope_source": self.scope_source,
            "current_source": self.current_source,
            "voltage_source": self.voltage_source,
            "deskew_source": self.deskew_source,
        }


def bench_inputs(bench: BenchConfig, integration_end_fraction: float = 0.02
                 ) -> InstrumentInputs:
    """Instrument and probe accuracies of a bench file as budget inputs.

    The scope's ``accuracy.vertical`` and the ``accuracy.scale`` of the ``diode_current`` and
    ``diode_voltage`` probes are required; the residual v–i skew bound is the root sum of
    squares of the two probes' ``accuracy.skew`` (independent rectangular bounds, combined
    as in JCGM 100:2008 eq. 10 and quoted as one bound).

    Raises
    ------
    GradingError
        The bench file does not state one of the required accuracies.
    """
    scope = bench.instruments.scope.accuracy
    if scope is None or scope.vertical is None:
        raise GradingError("the bench file gives no scope accuracy: add instruments.scope."
                           "accuracy {vertical, certificate, calibrated} (the uncertainty "
                           "budgets need it)")
    probes = {}
    for signal in ("diode_current", "diode_voltage"):
        entry = bench.probes.get(signal)
        if entry is None or entry.accuracy is None:
            raise GradingError(f"the bench file gives no accuracy for the {signal} probe: add "
                               f"probes.{signal}.accuracy {{scale, skew, certificate, "
                               "calibrated}")
        probes[signal] = entry.accuracy
    current, voltage = probes["diode_current"], probes["diode_voltage"]
    skew = math.hypot(current.skew, voltage.skew)
    skew_sources = [p.source for p in (current, voltage) if p.skew > 0]
    return InstrumentInputs(
        scope_vertical_accuracy=scope.vertical,
        current_sensor_tolerance=current.scale,
        voltage_probe_tolerance=voltage.scale,
        deskew=skew,
        integration_end_fraction=integration_end_fraction,
        scope_source=scope.source,
        current_source=current.source,
        voltage_source=voltage.source,
        deskew_source="; ".join(skew_sources),
    )


_TYPE_B_RECT = "Type B, rectangular a/√3 (JCGM 100:2008 §4.3.7)"
_TYPE_B_RES = "Type B, resolution δ/√12 (JCGM 100:2008 F.2.2.1)"


def _cited(source: str) -> str:
    return f" ({source})" if source else ""


class _Builder:
    """Collects contributors for one metric, skipping (with a note) what cannot be evaluated."""

    def __init__(self, values: Mapping[str, float | None], acquisition: Mapping[str, Any]):
        self.values = values
        self.acquisition = acquisition
        self.items: list[Contributor] = []
        self.notes: list[str] = []

    def get(self, key: str) -> float | None:
        value = self.values.get(key)
        if value is None or not math.isfinite(value):
            return None
        return float(value)

    def fact(self, key: str) -> float | None:
        value = self.acquisition.get(key)
        if value is None or isinstance(value, bool):
            return None
        try:
            number = float(value)
        except (TypeError, ValueError):
            return None
        return number if math.isfinite(number) and number > 0 else None

    def add(self, name: str, evaluation: str, u: float, unit: str, c: float) -> None:
        self.items.append(Contributor(name, evaluation, u, unit, c))

    def scope_gain(self, channel: str, reference: float | None, c: float, acc: float,
                   source: str = "") -> None:
        range_key = "current_range_A" if channel == "current" else "voltage_range_V"
        full_scale = self.fact(range_key)
        if full_scale is None:
            self.notes.append(f"{range_key} not recorded: {channel}-channel scope accuracy "
                              "not included")
            return
        if reference is None or reference <= 0:
            self.notes.append(f"no {channel} reference reading: scope accuracy not included")
            return
        bound = acc * full_scale / reference
        unit = "A" if channel == "current" else "V"
        self.add(
            f"{channel}-channel gain, scope vertical accuracy ±{100 * acc:.3g} % of "
            f"{format_si(full_scale, unit)} full scale, relative to {format_si(reference, unit)}"
            + _cited(source),
            _TYPE_B_RECT, rectangular(bound), "1", c,
        )

    def sensor(self, name: str, tolerance: float, c: float, source: str = "") -> None:
        self.add(f"{name} ±{100 * tolerance:.3g} %" + _cited(source), _TYPE_B_RECT,
                 rectangular(tolerance), "1", c)

    def adc_step(self, channel: str) -> None:
        range_key = "current_range_A" if channel == "current" else "voltage_range_V"
        full_scale = self.fact(range_key)
        bits = self.fact("adc_bits")
        if full_scale is None or bits is None:
            self.notes.append(f"{range_key} or adc_bits not recorded: {channel} quantisation "
                              "not included")
            return
        step = full_scale / 2.0**bits
        unit = "A" if channel == "current" else "V"
        self.add(f"{channel} ADC quantisation of the peak sample", _TYPE_B_RES,
                 resolution(step), unit, 1.0)

    def instants(self, names_and_c: Sequence[tuple[str, float]]) -> None:
        dt = self.fact("sample_interval_s")
        if dt is None:
            self.notes.append("sample_interval_s not recorded: timing resolution not included")
            return
        for name, c in names_and_c:
            self.add(f"timing resolution of {name}", _TYPE_B_RES, resolution(dt), "s", c)


def metric_contributors(
    metric: str,
    values: Mapping[str, float | None],
    acquisition: Mapping[str, Any],
    inputs: InstrumentInputs,
) -> tuple[list[Contributor], list[str]]:
    """Type B contributors of one metric (see the module docstring for each derivation).

    Parameters
    ----------
    metric
        Metric key.
    values
        Measured values of the metrics (SI), used to evaluate the sensitivity coefficients.
    acquisition
        Acquisition facts: ``sample_interval_s``, ``current_range_A``, ``voltage_range_V``,
        ``adc_bits``.
    inputs
        Instrument accuracy inputs.
    """
    b = _Builder(values, acquisition)
    y = b.get(metric)
    acc = inputs.scope_vertical_accuracy
    i_tol, v_tol = inputs.current_sensor_tolerance, inputs.voltage_probe_tolerance
    s_acc, s_i, s_v = inputs.scope_source, inputs.current_source, inputs.voltage_source
    if y is None:
        return [], [f"{metric} not measured"]
    irrm, if_, vr, vrm = b.get("irrm_A"), b.get("if_A"), b.get("vr_V"), b.get("vrm_V")
    ta, tb = b.get("ta_s"), b.get("tb_s")
    f_end = inputs.integration_end_fraction
    current_sensor = "current-sensor scale tolerance"
    voltage_probe = "voltage-probe scale tolerance"
    if metric in ("if_A", "irrm_A"):
        b.scope_gain("current", y, y, acc, s_acc)
        b.sensor(current_sensor, i_tol, y, s_i)
        if metric == "irrm_A":
            b.adc_step("current")
    elif metric == "ta_s":
        b.instants([("t0", -1.0), ("the current minimum", 1.0)])
    elif metric == "tb_s":
        b.instants([("the current minimum", -1.0), ("the trr end point", 1.0)])
    elif metric == "trr_s":
        b.instants([("t0", -1.0), ("the trr end point", 1.0)])
    elif metric == "softness":
        if ta is None or tb is None or ta <= 0:
            b.notes.append("ta or tb not measured: timing resolution not included")
        else:
            trr = ta + tb
            b.instants([
                ("t0", tb / ta**2),
                ("the current minimum", -trr / ta**2),
                ("the trr end point", 1.0 / ta),
            ])
    elif metric == "rrsf":
        b.notes.append("ratio of two slopes of one channel: gain errors cancel; "
                       "repeatability only")
    elif metric == "qrr_C":
        b.scope_gain("current", irrm, y, acc, s_acc)
        b.sensor(current_sensor, i_tol, y, s_i)
        if irrm is not None:
            b.instants([("the integration end t2", f_end * irrm)])
    elif metric == "err_J":
        b.scope_gain("current", irrm, y, acc, s_acc)
        b.sensor(current_sensor, i_tol, y, s_i)
        b.scope_gain("voltage", vrm if vrm is not None else vr, y, acc, s_acc)
        b.sensor(voltage_probe, v_tol, y, s_v)
        if vr is not None and irrm is not None:
            b.add(f"voltage-current deskew within ±{format_si(inputs.deskew, 's')}"
                  + _cited(inputs.deskew_source), _TYPE_B_RECT,
                  rectangular(inputs.deskew), "s", vr * irrm)
            b.instants([("the integration end t2", vr * f_end * irrm)])
        else:
            b.notes.append("VR or Irrm not measured: deskew and end-instant terms not included")
    elif metric == "didt_A_per_s":
        reference = max((x for x in (if_, irrm) if x is not None), default=None)
        b.scope_gain("current", reference, y, acc, s_acc)
        b.sensor(current_sensor, i_tol, y, s_i)
        if if_ is not None and irrm is not None and if_ + irrm > 0:
            delta_i = 0.5 * if_ + 0.5 * irrm
            c = y**2 / delta_i
            b.instants([("the +0.5·IF crossing", c), ("the −0.5·Irrm crossing", -c)])
    elif metric in ("vrm_V", "vr_V"):
        b.scope_gain("voltage", y, y, acc, s_acc)
        b.sensor(voltage_probe, v_tol, y, s_v)
        if metric == "vrm_V":
            b.adc_step("voltage")
    elif metric in ("eon_J", "eon_recovery_J"):
        b.sensor(current_sensor, i_tol, y, s_i)
        b.sensor(voltage_probe, v_tol, y, s_v)
        b.notes.append("switch-channel scope accuracy and deskew not modelled")
    else:
        b.notes.append("no model for this metric: repeatability only")
    return b.items, b.notes


def metric_budget(
    metric: str,
    values: Mapping[str, float | None],
    acquisition: Mapping[str, Any],
    inputs: InstrumentInputs,
    *,
    repeat_samples: Sequence[float] = (),
    repeat_std: tuple[float, int] | None = None,
    extra: Sequence[Contributor] = (),
    coverage_factor: float = 2.0,
    include_repeatability: bool = True,
    capture_u: Sequence[float] = (),
    pooled: tuple[float, float] | None = None,
) -> UncertaintyBudget:
    """Full GUM budget of one metric value.

    Parameters
    ----------
    metric, values, acquisition, inputs
        As for :func:`metric_contributors`.
    repeat_samples
        The repeated shots' values (Type A, ``s/√n``).
    repeat_std
        Instead of samples: a (pooled) standard deviation ``s`` and the number ``n`` of shots
        averaged, giving ``s/√n``.
    extra
        Further contributors (already evaluated).
    coverage_factor
        ``k`` for ``U = k·u_c``.
    include_repeatability
        Whether to evaluate the Type A term.
    capture_u
        Each repeated shot's capture uncertainty of the metric (``u`` of the analysis),
        combined with the repeatability term (:func:`repeatability`).
    pooled
        ``(s_p, ν)`` from :func:`pooled_std` over the lot's devices at the condition: used
        instead of the device's own s (more degrees of freedom, a smaller t factor).
    """
    contributors, notes = metric_contributors(metric, values, acquisition, inputs)
    unit = metric_unit(metric) or "1"
    if include_repeatability:
        if repeat_std is not None:
            s, n = repeat_std
            if n >= 1 and math.isfinite(s):
                contributors.append(Contributor(
                    f"repeatability, pooled s = {s:.4g} over n = {n}",
                    "Type A, s/√n (JCGM 100:2008 §4.2.3)", s / math.sqrt(n), unit, 1.0))
        else:
            items, more = repeatability(list(repeat_samples), capture_u, unit, pooled)
            contributors.extend(items)
            notes.extend(more)
    contributors.extend(extra)
    value = values.get(metric)
    return make_budget(metric, None if value is None else float(value), contributors,
                       coverage_factor, notes)
