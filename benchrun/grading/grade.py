"""Apply a limits file to analysed shots: per-metric grades, device verdicts, bins, lot.

Pure: shots and a :class:`~benchrun.config.limits.LimitsSpec` in, a frozen
:class:`LotGrade` out. A failing device is a result; :class:`~benchrun.errors.GradingError`
is raised only when the limits cannot be applied at all (another part, a condition that
matches two different test points).

Per device and required condition, the shots at the test point matching the condition are
checked against the tolerances: a shot whose measured IF, di/dt, VR or temperature lies
outside them, or that the runner or the analysis marked invalid, is *invalid* and never graded.
Each limited metric is graded on the aggregate its limit names (``mean`` of the valid shots,
or the ``worst`` shot: the one nearest to or beyond a limit; default per metric in
:func:`benchrun.config.limits.default_aggregation`; ``n`` reported) with its GUM budget
(:mod:`benchrun.grading.uncertainty`; instrument and probe accuracies from the bench file) and
the decision rule (:mod:`benchrun.grading.decision`). A required condition without any valid
shot makes the device *invalid*. Bins follow the same decision rule at their edges
(:mod:`benchrun.grading.bins`), the lot its sampling plan (:mod:`benchrun.grading.sampling`).
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import replace
from typing import Any

from benchrun.analysis.conventions import Convention, mismatch
from benchrun.analysis.pipeline import CAPTURE_U_PREFIX
from benchrun.config.bench import BenchConfig
from benchrun.config.limits import (
    METRIC_UNITS,
    Condition,
    ExtraContributor,
    LimitsSpec,
    MetricLimit,
    Tolerances,
    metric_unit,
)
from benchrun.errors import GradingError
from benchrun.grading.bins import bin_with_guard
from benchrun.grading.decision import (
    CONFORMING,
    INDETERMINATE,
    INVALID,
    NONCONFORMING,
    DecisionRule,
    decide,
    worst,
)
from benchrun.grading.lot import (
    LotStatistics,
    MetricStatistics,
    Outlier,
    RatioStatistics,
    disposition,
    find_outliers,
    summarize,
)
from benchrun.grading.results import DeviceGrade, LotGrade, MetricGrade
from benchrun.grading.sampling import sampling_plan
from benchrun.grading.uncertainty import (
    Contributor,
    InstrumentInputs,
    UncertaintyBudget,
    bench_inputs,
    metric_budget,
    pooled_std,
    rectangular,
    triangular,
    type_a,
)
from benchrun.grading.worst_case import WorstCaseGrade, grade_worst_case
from benchrun.records import ShotResult, TestPoint, invalid_for_conditions_only
from benchrun.units import format_si

#: Acquisition facts combined over a device's shots by taking the largest (conservative).
ACQUISITION_KEYS = ("sample_interval_s", "current_range_A", "voltage_range_V", "adc_bits")


# ----------------------------------------------------------------------------- matching


def _close(a: float, b: float, rel: float | None) -> bool:
    tolerance = 1e-6 if rel is None else rel
    return abs(a - b) <= tolerance * abs(b)


def point_matches(point: TestPoint, condition: Condition, tol: Tolerances) -> bool:
    """Whether a test point's *requested* values belong to a condition (within tolerance)."""
    if abs(point.temperature_K - condition.temperature) > tol.temperature:
        return False
    if condition.forward_current is not None and not _close(
        point.forward_current_A, condition.forward_current, tol.forward_current
    ):
        return False
    if condition.reverse_voltage is not None and not _close(
        point.bus_voltage_V, condition.reverse_voltage, tol.reverse_voltage
    ):
        return False
    return not (
        condition.didt is not None
        and point.didt_A_per_s is not None
        and not _close(point.didt_A_per_s, condition.didt, tol.didt)
    )


def shot_problems(shot: ShotResult, condition: Condition, tol: Tolerances) -> list[str]:
    """Why a shot cannot be graded at ``condition`` (empty when it is valid).

    A shot the runner marked invalid stays invalid, unless it was invalid for its measured
    conditions only (:func:`benchrun.records.invalid_for_conditions_only`: a condition flag
    ``"condition:..."``, no invalidating flag; warnings do not count): then its measured
    conditions are judged again against the limits file's tolerances, so regrading with
    other tolerances takes effect.
    """
    problems: list[str] = []
    if not shot.valid and not invalid_for_conditions_only(shot.flags):
        flags = f" ({', '.join(shot.flags)})" if shot.flags else ""
        problems.append(f"marked invalid at acquisition{flags}")
    point = shot.point
    checks = [
        ("IF", "if_A", condition.forward_current or point.forward_current_A,
         tol.forward_current, "A"),
        ("VR", "vr_V", condition.reverse_voltage or point.bus_voltage_V,
         tol.reverse_voltage, "V"),
        ("di/dt", "didt_A_per_s", condition.didt or point.didt_A_per_s, tol.didt, "A/s"),
    ]
    for label, key, target, rel, unit in checks:
        if target is None or rel is None:
            continue
        measured = shot.conditions.get(key)
        if measured is None or not math.isfinite(measured):
            problems.append(f"{label} not measured")
        elif abs(measured - target) > rel * abs(target):
            problems.append(
                f"{label} {format_si(measured, unit)} outside {format_si(target, unit)} "
                f"± {rel * 100:g} %"
            )
    measured_t = shot.conditions.get("temperature_K")
    if measured_t is None or not math.isfinite(measured_t):
        problems.append("temperature not measured")
    elif abs(measured_t - condition.temperature) > tol.temperature:
        problems.append(
            f"T {format_si(measured_t, 'K')} outside {format_si(condition.temperature, 'K')} "
            f"± {tol.temperature:g} K"
        )
    return problems


def _match_points(shots: Sequence[ShotResult], spec: LimitsSpec) -> dict[str, TestPoint | None]:
    points: list[TestPoint] = []
    for shot in shots:
        if shot.point not in points:
            points.append(shot.point)
    points.sort(key=lambda p: (p.index, p.temperature_K, p.label))
    chosen: dict[str, TestPoint | None] = {}
    owner: dict[TestPoint, str] = {}
    for condition in spec.conditions:
        matching = [p for p in points if point_matches(p, condition, spec.tolerances)]
        if len(matching) > 1:
            listed = ", ".join(f"#{p.index} ({p.label or 'unlabelled'}, "
                               f"{format_si(p.temperature_K, 'K')}, "
                               f"{format_si(p.forward_current_A, 'A')})" for p in matching)
            raise GradingError(
                f"condition {condition.name!r} matches several test points: {listed}; "
                "name forward_current, reverse_voltage or didt in the limits file to tell "
                "them apart"
            )
        if matching:
            if matching[0] in owner:
                raise GradingError(
                    f"test point #{matching[0].index} matches both condition "
                    f"{owner[matching[0]]!r} and {condition.name!r}"
                )
            owner[matching[0]] = condition.name
        chosen[condition.name] = matching[0] if matching else None
    return chosen


# ----------------------------------------------------------------------------- device


def _finite(value: Any) -> float | None:
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _samples(shots: Sequence[ShotResult]) -> dict[str, list[float]]:
    samples: dict[str, list[float]] = {}
    for shot in shots:
        for key, value in shot.metrics.items():
            number = _finite(value)
            if number is not None:
                samples.setdefault(key, []).append(number)
    return samples


def _capture_u(shots: Sequence[ShotResult], metric: str) -> list[float]:
    """Each shot's capture uncertainty of ``metric`` (``u_<metric>`` among its metrics)."""
    out = []
    for shot in shots:
        number = _finite(shot.metrics.get(CAPTURE_U_PREFIX + metric))
        if number is not None and _finite(shot.metrics.get(metric)) is not None:
            out.append(number)
    return out


def _acquisition(shots: Sequence[ShotResult]) -> dict[str, float]:
    facts: dict[str, float] = {}
    for shot in shots:
        for key in ACQUISITION_KEYS:
            number = _finite(shot.acquisition.get(key))
            if number is not None:
                facts[key] = max(facts.get(key, number), number)
    return facts


def _extra_contributors(
    extras: Iterable[ExtraContributor], metric: str, value: float
) -> list[Contributor]:
    result = []
    for extra in extras:
        if extra.metric != metric:
            continue
        if extra.distribution == "rectangular":
            convert, how = rectangular, "Type B, rectangular a/√3 (JCGM 100:2008 §4.3.7)"
        elif extra.distribution == "triangular":
            convert, how = triangular, "Type B, triangular a/√6 (JCGM 100:2008 §4.3.9)"
        else:
            k = extra.coverage_factor
            def convert(bound: float, k: float = k) -> float:
                return abs(bound) / k
            how = f"Type B, normal U/k with k = {k:g} (JCGM 100:2008 §4.3.3)"
        if extra.relative is not None:
            result.append(Contributor(extra.name, how, convert(extra.relative), "1", value))
        else:
            unit = metric_unit(metric) or "1"
            result.append(Contributor(extra.name, how, convert(extra.absolute or 0.0), unit, 1.0))
    return result


def _inputs(spec: LimitsSpec, bench: BenchConfig | InstrumentInputs) -> InstrumentInputs:
    """Budget inputs: the bench file's instrument and probe accuracies, the limits file's
    integration end fraction."""
    fraction = spec.uncertainty.integration_end_fraction
    if isinstance(bench, InstrumentInputs):
        return replace(bench, integration_end_fraction=fraction)
    return bench_inputs(bench, fraction)


def _worst_of(samples: Sequence[float], limit: MetricLimit) -> float:
    """The shot value nearest to (or farthest beyond) the limits."""
    def margin(x: float) -> float:
        room = []
        if limit.max is not None:
            room.append(limit.max - x)
        if limit.min is not None:
            room.append(x - limit.min)
        return min(room)

    return min(samples, key=lambda x: (margin(x), x))


def _aggregate_budget(
    metric: str, limit: MetricLimit, samples: Sequence[float], means: Mapping[str, float],
    acquisition: Mapping[str, float], inputs: InstrumentInputs, spec: LimitsSpec,
    capture_u: Sequence[float] = (),
    pooled: tuple[float, float] | None = None,
) -> tuple[float, UncertaintyBudget]:
    """Value and budget of ``metric`` under its limit's aggregation (mean or worst shot);
    ``capture_u``: each shot's capture uncertainty, the floor of the repeatability term."""
    k = spec.uncertainty.coverage_factor
    if limit.combine == "mean":
        value = means[metric]
        return value, metric_budget(
            metric, means, acquisition, inputs,
            repeat_samples=samples,
            capture_u=capture_u,
            pooled=pooled,
            extra=_extra_contributors(spec.uncertainty.extra, metric, value),
            coverage_factor=k,
            include_repeatability=spec.uncertainty.repeatability,
        )
    value = _worst_of(samples, limit)
    at_value = {**means, metric: value}
    extra = _extra_contributors(spec.uncertainty.extra, metric, value)
    notes = [f"graded on the worst of {len(samples)} shot(s)"]
    if spec.uncertainty.repeatability:
        evaluated = type_a(list(samples))
        if evaluated is None:
            notes.append("single shot: repeatability not evaluated (Type A needs n ≥ 2)")
        else:
            s_one = evaluated[0]
            extra.insert(0, Contributor(
                f"repeatability of one shot, s = {s_one:.4g} from n = {len(samples)} shots",
                "Type A, s of a single reading, ν = n − 1 (JCGM 100:2008 §4.2.2)", s_one,
                metric_unit(metric) or "1", 1.0, dof=float(len(samples) - 1)))
    caps = [u for u in capture_u if math.isfinite(u)]
    if caps:  # one shot's own capture uncertainty (identical quantised repeats: s = 0)
        u_cap = math.sqrt(math.fsum(u * u for u in caps) / len(caps))
        extra.insert(0, Contributor(
            f"capture (noise, quantisation, timing) of one shot, ū = {u_cap:.4g}",
            "Type B, from the capture itself", u_cap, metric_unit(metric) or "1", 1.0))
    budget = metric_budget(metric, at_value, acquisition, inputs, extra=extra,
                           coverage_factor=k, include_repeatability=False)
    return value, replace(budget, notes=(*notes, *budget.notes))


def _label(metric: str, condition: str) -> str:
    return f"{metric} at {condition}"


def _invalid_grade(metric: str, condition: str, k: float, limit: MetricLimit,
                   reason: str) -> MetricGrade:
    return MetricGrade(metric, condition, metric_unit(metric), None, 0, None, None, k,
                       limit.min, limit.max, None, None, None, INVALID, "not graded", reason,
                       aggregation=limit.combine)


def _hot_cold(spec: LimitsSpec) -> tuple[Condition, Condition] | None:
    ordered = sorted(spec.conditions, key=lambda c: c.temperature)
    cold, hot = ordered[0], ordered[-1]
    if hot.temperature - cold.temperature <= spec.tolerances.temperature:
        return None
    return hot, cold


def _bin(
    spec: LimitsSpec,
    rule: DecisionRule,
    grades: Sequence[MetricGrade],
    values: Mapping[str, Mapping[str, float]],
    samples: Mapping[str, Mapping[str, list[float]]],
    acquisitions: Mapping[str, Mapping[str, float]],
    inputs: InstrumentInputs,
) -> tuple[str | None, str]:
    """Bin class of a conforming device with the decision rule applied at the class edges:
    the value and guard band of the bin metric's grade at the bin condition, or (when that
    metric is not limited there) its mean with its own budget."""
    bins = spec.bins
    assert bins is not None
    condition = bins.condition or spec.conditions[0].name
    metric, unit = bins.metric, metric_unit(bins.metric)
    graded = [g for g in grades if g.metric == metric and g.condition == condition
              and g.value is not None]
    if graded:
        value, w = graded[0].value, graded[0].guard_band or 0.0
    else:
        value = values.get(condition, {}).get(metric)
        w = 0.0
        if value is not None:
            budget = metric_budget(
                metric, values[condition], acquisitions.get(condition, {}), inputs,
                repeat_samples=samples.get(condition, {}).get(metric, ()),
                extra=_extra_contributors(spec.uncertainty.extra, metric, value),
                coverage_factor=spec.uncertainty.coverage_factor,
                include_repeatability=spec.uncertainty.repeatability)
            w = rule.guard_band(budget.expanded)
    assignment = bin_with_guard(value, w, bins.classes, name=f"{metric} at {condition}",
                                unit=unit)
    return assignment.name, assignment.reason


def _grade_device(
    serial: str,
    shots: Sequence[ShotResult],
    spec: LimitsSpec,
    points: Mapping[str, TestPoint | None],
    rule: DecisionRule,
    inputs: InstrumentInputs,
    pooled: Mapping[tuple[str, str], tuple[float, float]] | None = None,
) -> tuple[DeviceGrade, dict[str, dict[str, list[float]]], dict[str, dict[str, float]]]:
    k = spec.uncertainty.coverage_factor
    grades: list[MetricGrade] = []
    reasons: list[str] = []
    outcomes: list[str] = []
    values: dict[str, dict[str, float]] = {}
    counts: dict[str, dict[str, int]] = {}
    invalid_shots: list[str] = []
    all_samples: dict[str, dict[str, list[float]]] = {}
    acquisitions: dict[str, dict[str, float]] = {}
    for condition in spec.conditions:
        name = condition.name
        point = points[name]
        here = sorted(
            (s for s in shots if point is not None and s.point == point),
            key=lambda s: (s.repeat, s.attempt, s.timestamp),
        )
        valid = []
        seen_problems: list[str] = []
        for shot in here:
            problems = shot_problems(shot, condition, spec.tolerances)
            seen_problems += [p for p in problems if p not in seen_problems]
            if problems:
                invalid_shots.append(
                    f"{name} repeat {shot.repeat} attempt {shot.attempt}: {'; '.join(problems)}"
                )
            else:
                valid.append(shot)
        counts[name] = {"valid": len(valid), "invalid": len(here) - len(valid)}
        samples = {k: v for k, v in _samples(valid).items() if k in METRIC_UNITS}
        all_samples[name] = samples
        means = {key: math.fsum(v) / len(v) for key, v in samples.items()}
        values[name] = {key: means[key] for key in sorted(means, key=_metric_order)}
        acquisition = _acquisition(valid)
        acquisitions[name] = acquisition
        if not valid:
            why = "no test point in the results matches it" if point is None else (
                f"none of its {len(here)} shot(s) is valid ({'; '.join(seen_problems)})"
                if here else "no shot recorded")
            reasons.append(f"required condition {name}: {why}")
            outcomes.append(INVALID)
        for limit in spec.limits_at(name):
            metric = limit.metric
            if not valid:
                grades.append(_invalid_grade(metric, name, k, limit,
                                             f"no valid shot at {name}"))
                continue
            if metric not in means:
                grades.append(_invalid_grade(metric, name, k, limit,
                                             f"{metric} not found in any valid shot at {name}"))
                outcomes.append(INVALID)
                reasons.append(f"{_label(metric, name)}: not measured")
                continue
            value, budget = _aggregate_budget(metric, limit, samples[metric], means,
                                              acquisition, inputs, spec,
                                              _capture_u(valid, metric),
                                              (pooled or {}).get((name, metric)))
            label = _label(metric, name)
            if limit.combine == "worst":
                label = f"{metric} (worst shot) at {name}"
            decision = decide(value, budget.expanded, limit.min, limit.max, rule,
                              name=label, unit=metric_unit(metric))
            grades.append(MetricGrade(
                metric, name, metric_unit(metric), value, len(samples[metric]),
                budget.expanded, budget.combined, budget.coverage_factor, limit.min, limit.max,
                decision.acceptance_lower, decision.acceptance_upper, decision.guard_band,
                decision.outcome, decision.statement, decision.reason, budget,
                aggregation=limit.combine, shot_values=tuple(samples[metric]),
            ))
            outcomes.append(decision.outcome)
            if decision.outcome != CONFORMING:
                reasons.append(decision.reason)
    verdict = worst(outcomes)
    if verdict == CONFORMING:
        reasons.insert(0, "every limit met at every required condition")
    chosen_bin = bin_reason = None
    if spec.bins is not None and verdict == CONFORMING:
        chosen_bin, bin_reason = _bin(spec, rule, grades, values, all_samples, acquisitions,
                                      inputs)
        if chosen_bin is None:
            reasons.append(bin_reason)
    ratios: dict[str, float] = {}
    pair = _hot_cold(spec)
    if pair is not None:
        hot, cold = values.get(pair[0].name, {}), values.get(pair[1].name, {})
        for key in hot:
            if key in cold and cold[key] != 0:
                ratios[key] = hot[key] / cold[key]
    device = DeviceGrade(serial, verdict, chosen_bin, tuple(grades), tuple(reasons), values,
                         counts, tuple(invalid_shots), ratios, bin_reason)
    return device, all_samples, acquisitions


def _metric_order(key: str) -> tuple[int, str]:
    keys = list(METRIC_UNITS)
    return (keys.index(key), key) if key in keys else (len(keys), key)


# ----------------------------------------------------------------------------- lot


def _lot_budgets(
    spec: LimitsSpec,
    devices: Sequence[DeviceGrade],
    samples: Mapping[str, Mapping[str, Mapping[str, list[float]]]],
    acquisitions: Mapping[str, Mapping[str, Mapping[str, float]]],
    inputs: InstrumentInputs,
) -> dict[str, UncertaintyBudget]:
    """Representative budget per limited metric and condition: at the lot-mean values, the
    largest acquisition settings, and the pooled within-device standard deviation."""
    budgets: dict[str, UncertaintyBudget] = {}
    for condition in spec.conditions:
        name = condition.name
        per_device = [d.values.get(name, {}) for d in devices]
        keys = {key for values in per_device for key in values}
        means = {}
        for key in sorted(keys, key=_metric_order):
            column = [v[key] for v in per_device if key in v]
            means[key] = math.fsum(column) / len(column)
        acquisition: dict[str, float] = {}
        for device in devices:
            for key, value in acquisitions[device.serial].get(name, {}).items():
                acquisition[key] = max(acquisition.get(key, value), value)
        for limit in spec.limits_at(name):
            metric = limit.metric
            if metric not in means:
                continue
            dof = 0
            total = 0.0
            counts = []
            for device in devices:
                shots = samples[device.serial].get(name, {}).get(metric, [])
                if len(shots) >= 2:
                    counts.append(len(shots))
                    dof += len(shots) - 1
                    total += statistics.variance(shots) * (len(shots) - 1)
            repeat = None
            if dof > 0:
                # a worst-shot grade is one reading: s, not s/√n
                averaged = 1 if limit.combine == "worst" else statistics.median_low(counts)
                repeat = (math.sqrt(total / dof), averaged)
            budget = metric_budget(
                metric, means, acquisition, inputs,
                repeat_std=repeat,
                extra=_extra_contributors(spec.uncertainty.extra, metric, means[metric]),
                coverage_factor=spec.uncertainty.coverage_factor,
                include_repeatability=spec.uncertainty.repeatability,
            )
            if repeat is None and spec.uncertainty.repeatability:
                budget = UncertaintyBudget(
                    budget.metric, budget.value, budget.contributors, budget.combined,
                    budget.coverage_factor, budget.expanded,
                    (*budget.notes, "no device has two valid shots: repeatability not "
                     "evaluated"),
                )
            budgets[f"{metric}@{name}"] = budget
    return budgets


def _has_value(device: DeviceGrade, metric: str, condition: str) -> bool:
    try:
        return device.grade(metric, condition).value is not None
    except KeyError:
        return False


def _lot_statistics(spec: LimitsSpec, devices: Sequence[DeviceGrade]) -> LotStatistics:
    """Counts and, for each graded metric, statistics of the devices' graded values (the
    aggregate each limit names), capability and outliers."""
    count = len(devices)
    tally = {v: sum(1 for d in devices if d.verdict == v)
             for v in (CONFORMING, NONCONFORMING, INDETERMINATE, INVALID)}
    metrics: list[MetricStatistics] = []
    outliers: list[Outlier] = []
    for condition in spec.conditions:
        name = condition.name
        for limit in spec.limits_at(name):
            metric = limit.metric
            graded = [(d.serial, d.grade(limit.metric, name).value) for d in devices
                      if _has_value(d, metric, name)]
            if not graded:
                continue
            serials = [serial for serial, _ in graded]
            column = [float(value) for _, value in graded]  # type: ignore[arg-type]
            metrics.append(summarize(metric, name, column, limit.min, limit.max))
            outliers.extend(find_outliers(metric, name, serials, column))
    ratios: list[RatioStatistics] = []
    pair = _hot_cold(spec)
    if pair is not None:
        hot, cold = pair
        keys = sorted({key for d in devices for key in d.ratios}, key=_metric_order)
        for key in keys:
            if key not in METRIC_UNITS:
                continue
            per_device = {d.serial: d.ratios[key] for d in devices if key in d.ratios}
            mean = math.fsum(per_device.values()) / len(per_device) if per_device else None
            ratios.append(RatioStatistics(key, hot.name, cold.name, per_device, mean))
    yield_fraction = tally[CONFORMING] / count if count else None
    return LotStatistics(count, tally[CONFORMING], tally[NONCONFORMING], tally[INDETERMINATE],
                         tally[INVALID], yield_fraction, tuple(metrics), tuple(ratios),
                         tuple(outliers))


def describe_lot_rule(spec: LimitsSpec) -> str:
    """The lot acceptance rule as a sentence for the report."""
    rule = spec.lot
    text = (f"Accept the lot when at most c = {rule.acceptance_number} of the n = "
            f"{rule.sample_size} sampled device(s) count as non-conforming (lot of N = "
            f"{rule.lot_size}); fewer than n graded devices reject the lot")
    text += (f"; an indeterminate device counts as {rule.indeterminate.replace('non', 'non-')}"
             f", an invalid device is "
             f"{'counted as non-conforming' if rule.invalid == 'nonconforming' else 'excluded'}.")
    return text


def grade_lot(shots: Iterable[ShotResult], limits: LimitsSpec, *,
              bench: BenchConfig | InstrumentInputs,
              analysis_options: Mapping[str, Any] | None = None,
              stray_inductance_by_run: Mapping[str, float] | None = None) -> LotGrade:
    """Grade every device in ``shots`` against ``limits`` (pure).

    Parameters
    ----------
    shots
        Analysed shots of one part (all repeats and retries, valid or not).
    limits
        The limits file, as loaded by :func:`benchrun.config.limits.load_limits`.
    bench
        The bench file the shots were taken on (its instrument and probe accuracies are the
        budgets' inputs, :func:`benchrun.grading.uncertainty.bench_inputs`), or those inputs.
    analysis_options
        The ``RecoveryOptions`` keyword arguments the shots were analysed with (a run's
        ``analysis_options``; None: the defaults). Their Qrr / Err / trr window convention
        must be the limits' ``convention``.
    stray_inductance_by_run
        Run id → the fixture's stray inductance Ls of the bench that made the run, for shots
        from several benches (the worst-case snappiness step forms VR + Ls·di/dt with the Ls
        of the bench that took each shot); None: the ``bench`` file's fixture.

    Raises
    ------
    GradingError
        The shots are of another part, were measured with another window convention
        than the limits assume, a condition cannot be matched to one test point, the
        bench file states no accuracy, or more devices were tested than the lot holds.
    """
    shots = list(shots)
    problem = mismatch(Convention.of(analysis_options),
                       Convention.of(limits.convention.model_dump()))
    if problem is not None:
        raise GradingError(f"cannot grade: {problem}")
    other = sorted({s.part for s in shots if s.part != limits.part})
    if other:
        raise GradingError(f"limits for {limits.part} cannot grade shots of {', '.join(other)}")
    rule = DecisionRule(limits.decision_rule.rule, limits.decision_rule.guard_factor)
    inputs = _inputs(limits, bench)
    points = _match_points(shots, limits)
    by_serial: dict[str, list[ShotResult]] = {}
    for item in shots:
        by_serial.setdefault(item.serial, []).append(item)
    serials = sorted(by_serial)
    if len(serials) > limits.lot.lot_size:
        raise GradingError(
            f"{len(serials)} devices were tested but the limits file's lot rule states a lot "
            f"of N = {limits.lot.lot_size}: a sample larger than the lot is refused; correct "
            "lot.lot_size")
    devices: list[DeviceGrade] = []
    samples: dict[str, dict[str, dict[str, list[float]]]] = {}
    acquisitions: dict[str, dict[str, dict[str, float]]] = {}
    # repeatability pooled over the devices at each condition (within-device scatter,
    # ν = Σ(n_i − 1)): two repeats of one device alone give ν = 1 and a t factor of 14
    first = {serial: _grade_device(serial, by_serial[serial], limits, points, rule, inputs)
             for serial in serials}
    pooled: dict[tuple[str, str], tuple[float, float]] = {}
    for condition in limits.conditions:
        metrics = {m for _, found, _ in first.values() for m in found.get(condition.name, {})}
        for metric in metrics:
            groups = [found[condition.name][metric] for _, found, _ in first.values()
                      if metric in found.get(condition.name, {})]
            value = pooled_std(groups)
            if value is not None:
                pooled[(condition.name, metric)] = value
    for serial in serials:
        device, device_samples, device_acq = _grade_device(
            serial, by_serial[serial], limits, points, rule, inputs, pooled)
        devices.append(device)
        samples[serial] = device_samples
        acquisitions[serial] = device_acq
    devices, worst_case = _apply_worst_case(shots, limits, points, bench, devices,
                                            stray_inductance_by_run)
    verdicts = {d.serial: d.verdict for d in devices}
    decision, reasons = disposition(
        verdicts,
        acceptance_number=limits.lot.acceptance_number,
        sample_size=limits.lot.sample_size,
        indeterminate=limits.lot.indeterminate,
        invalid=limits.lot.invalid,
    )
    conditions = tuple(
        {
            "name": c.name,
            "temperature_K": c.temperature,
            "point_index": None if points[c.name] is None else points[c.name].index,
        }
        for c in limits.conditions
    )
    return LotGrade(
        part=limits.part,
        lots=tuple(sorted({s.lot for s in shots})),
        run_ids=tuple(sorted({s.run_id for s in shots})),
        conditions=conditions,
        devices=devices,
        disposition=decision,
        reasons=reasons,
        statistics=_lot_statistics(limits, devices),
        budgets=_lot_budgets(limits, devices, samples, acquisitions, inputs),
        decision_rule=rule.describe(limits.uncertainty.coverage_factor),
        lot_rule=describe_lot_rule(limits),
        plan=sampling_plan(limits.lot),
        instrument_inputs=inputs.to_dict(),
        limits=_limit_table(limits),
        worst_case=tuple(worst_case),
    )


def _apply_worst_case(shots: Sequence[ShotResult], limits: LimitsSpec,
                      points: Mapping[str, TestPoint | None],
                      bench: BenchConfig | InstrumentInputs,
                      devices: list[DeviceGrade],
                      stray_by_run: Mapping[str, float] | None = None,
                      ) -> tuple[list[DeviceGrade], list[WorstCaseGrade]]:
    """Grade the worst-case snappiness step (:mod:`benchrun.grading.worst_case`) and fold its
    outcome into each device's verdict and reasons."""
    spec = limits.worst_case
    valid: dict[int, bool] = {}
    if spec is not None:
        condition = limits.condition(spec.condition)
        for shot in shots:
            valid[id(shot)] = not shot_problems(shot, condition, limits.tolerances)
    stray: float | Mapping[str, float] | None = (
        stray_by_run if stray_by_run is not None
        else bench.fixture.stray_inductance if isinstance(bench, BenchConfig) else None)
    graded = grade_worst_case(shots, spec, points, stray_inductance_H=stray, valid=valid)
    by_serial = {g.serial: g for g in graded}
    out = []
    for device in devices:
        step = by_serial.get(device.serial)
        if step is None:
            out.append(device)
            continue
        verdict = worst([device.verdict, step.outcome])
        reasons = list(device.reasons)
        if step.outcome != CONFORMING:
            if reasons and reasons[0] == "every limit met at every required condition":
                reasons[0] = "every limit met at every required condition but the worst case"
            reasons.append(step.reason)
        out.append(replace(device, verdict=verdict, reasons=tuple(reasons),
                           bin=device.bin if verdict == CONFORMING else None))
    return out, graded


def _limit_table(spec: LimitsSpec) -> tuple[dict[str, Any], ...]:
    """Every limit in force per condition with its aggregation (for the report and CLI)."""
    rows = []
    for condition in spec.conditions:
        for limit in spec.limits_at(condition.name):
            rows.append({
                "metric": limit.metric, "condition": condition.name,
                "unit": metric_unit(limit.metric), "lower": limit.min, "upper": limit.max,
                "aggregation": limit.combine,
                "aggregation_stated": limit.aggregation is not None,
            })
    return tuple(rows)
