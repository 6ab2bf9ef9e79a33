"""Text of the qualification verdicts for the characterisation report and the demo (pure).

Tables are lists of rows of strings, header row first, one column per device (a
characterisation sample is a few devices; :func:`device_groups` splits a longer list so a
table stays inside the page).  Values are in SI with an engineering prefix
(:func:`benchrun.units.format_si`), di/dt in A/µs.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from benchrun.analysis.flags import FLAG_RRSF_UNRESOLVED
from benchrun.analysis.metrics_meta import METRICS
from benchrun.characterize.qualification import Qualification
from benchrun.config.limits import Condition
from benchrun.grading.results import MetricGrade
from benchrun.grading.worst_case import WorstCaseGrade
from benchrun.units import format_si

__all__ = ["NOT_MEASURED", "condition_reasons", "condition_rows", "condition_text",
           "device_groups", "summary_lines", "worst_case_limits_text", "worst_case_rows"]

#: Cell text of a finding the capture did not yield.
NOT_MEASURED = "—"
#: Devices per table (columns after the finding and the limit).
DEVICES_PER_TABLE = 4


def device_groups(serials: Sequence[str], size: int = DEVICES_PER_TABLE) -> list[list[str]]:
    """``serials`` in groups of at most ``size`` (one table each)."""
    return [list(serials[i:i + size]) for i in range(0, len(serials), size)] or [[]]


def _didt(value: float | None) -> str:
    return NOT_MEASURED if value is None else f"{abs(value) / 1e6:.4g} A/µs"


def _pct(value: float | None, signed: bool = False) -> str:
    if value is None:
        return NOT_MEASURED
    return f"{100 * value:+.1f} %" if signed else f"{100 * value:.1f} %"


def condition_text(condition: Condition) -> str:
    """``"25 °C, 30 A, 600 V"`` (and di/dt when the condition names one)."""
    parts = [f"{condition.temperature - 273.15:g} °C"]
    if condition.forward_current is not None:
        parts.append(f"{condition.forward_current:g} A")
    if condition.reverse_voltage is not None:
        parts.append(f"{condition.reverse_voltage:g} V")
    if condition.didt is not None:
        parts.append(_didt(condition.didt))
    return ", ".join(parts)


def worst_case_rows(q: Qualification, serials: Sequence[str]) -> list[list[str]]:
    """Findings of each device's worst shot at the worst-case point, with the limits:
    header ``[finding, limit, *serials]``."""
    spec = None if q.limits is None else q.limits.worst_case
    grades: list[WorstCaseGrade | None] = [q.worst_case_of(s) for s in serials]
    found = [None if g is None else g.assessment for g in grades]
    shots = [q.worst_shots.get(s) for s in serials]
    flags = [[] if shot is None else list(dict.fromkeys(f.split(":", 1)[0].strip()
                                                        for f in shot.flags))
             for shot in shots]

    def row(name: str, limit: str, cell: Callable[[Any], str]) -> list[str]:
        return [name, limit] + [NOT_MEASURED if a is None else cell(a) for a in found]

    ls = q.stray_inductance_H
    avalanche = clamp = snap = ""
    if spec is not None:
        avalanche = (f"VRM ≥ {format_si(spec.avalanche_fraction * spec.rated_voltage, 'V')} "
                     f"({100 * spec.avalanche_fraction:g} % of VRRM "
                     f"{format_si(spec.rated_voltage, 'V')}) held within 2 % for "
                     f"≥ {format_si(spec.clamp_time, 's')} fails")
        clamp = spec.rated_voltage
        snap = "snap allowed" if spec.allow_snap else "snap fails"
    rows = [["finding", "limit (worst_case block)", *serials],
            ["outcome", "", *[NOT_MEASURED if g is None else g.outcome for g in grades]],
            ["valid shots at the point", "",
             *[NOT_MEASURED if g is None else str(g.n) for g in grades]],
            ["worst shot (graded)", "",
             *[NOT_MEASURED if g is None or not g.shot else g.shot for g in grades]],
            row("VR after the recovery", "", lambda a: format_si(a.vr_V, "V")),
            row("di/dt (the analysis' di/dt metric)", "", lambda a: _didt(a.didt_A_per_s)),
            row("VR + Ls·di/dt", "" if ls is None else f"Ls = {format_si(ls, 'H')}",
                lambda a: format_si(a.vrm_expected_V, "V")),
            row("VRM (peak reverse voltage)", "", lambda a: format_si(a.vrm_V, "V")),
            row("overshoot: VRM over VR + Ls·di/dt",
                "" if spec is None else f"≤ +{100 * spec.max_overshoot_excess:g} %",
                lambda a: _pct(a.overshoot_excess, signed=True)),
            row("oscillation after the recovery (of Irrm)",
                "" if spec is None else f"≤ {100 * spec.max_ring_amplitude:g} % of Irrm",
                lambda a: NOT_MEASURED if a.ring_amplitude_A is None else
                f"{format_si(a.ring_amplitude_A, 'A', 3)} ({_pct(a.ring_fraction)})"),
            row("oscillation decay time constant",
                "" if spec is None else f"≤ {format_si(spec.max_ring_decay, 's')}",
                lambda a: format_si(a.ring_decay_s, "s", 3)),
            ["RRSF; snap (RRSF < 1/3)", snap,
             *[NOT_MEASURED if a is None else
               (NOT_MEASURED if a.rrsf is None else f"{a.rrsf:.3g}")
               + (" (unresolved)" if FLAG_RRSF_UNRESOLVED in names else "")
               + ("; snap" if a.snap else "; no snap")
               for a, names in zip(found, flags, strict=True)]],
            row("ringing flag", "", lambda a: "yes" if a.ringing else "no"),
            row("dynamic avalanche suspected", avalanche,
                lambda a: ("yes" if a.avalanche_suspected else "no")
                + ("" if a.vrm_V is None or not clamp
                   else f" (VRM {100 * a.vrm_V / clamp:.0f} % of VRRM)")),
            ["flags of the worst shot", "",
             *[NOT_MEASURED if a is None else ", ".join(names) or "none"
               for a, names in zip(found, flags, strict=True)]]]
    return rows


def worst_case_limits_text(q: Qualification) -> str:
    """The limits and the Ls the worst-case step used, as a sentence."""
    spec = None if q.limits is None else q.limits.worst_case
    if spec is None:
        return ("The limits file has no worst_case block: the worst-case snappiness step is "
                "not graded.")
    condition = next((c for c in q.conditions() if c.name == spec.condition), None)
    where = "" if condition is None else f" ({condition_text(condition)})"
    ls = ("not known (no bench file value): the step is invalid" if q.stray_inductance_H is None
          else f"{format_si(q.stray_inductance_H, 'H')}, the bench fixture's stray inductance "
          "(the run's bench file)")
    return (f"Limits: the worst_case block of {q.limits_source or 'the limits file'}, "
            f"condition {spec.condition}{where}; each device graded on its worst valid shot "
            "there (the one nearest to or beyond a limit). Expected peak VR + Ls·di/dt "
            f"(Kirchhoff's voltage law round the commutation loop), Ls = {ls}. "
            "Overshoot: (VRM − (VR + Ls·di/dt)) / (VR + Ls·di/dt). "
            "di/dt: the analysis' commutation-slope metric of the shot (the step forms "
            "Ls·di/dt with it), not the runner's condition di/dt of the test points table. "
            f"{NOT_MEASURED}: not found in the capture; flag names as in curves.csv.")


def _limit(lower: float | None, upper: float | None, unit: str) -> str:
    if lower is not None and upper is not None:
        return f"{format_si(lower, unit, 3)} … {format_si(upper, unit, 3)}"
    if upper is not None:
        return f"≤ {format_si(upper, unit, 3)}"
    if lower is not None:
        return f"≥ {format_si(lower, unit, 3)}"
    return ""


def _grade_cell(g: MetricGrade | None) -> str:
    if g is None:
        return NOT_MEASURED
    if g.value is None:
        return f"{g.outcome} ({g.reason})"
    u = ("" if g.expanded_uncertainty is None
         else f" ± {format_si(g.expanded_uncertainty, g.unit, 3)}")
    return f"{format_si(g.value, g.unit, 4)}{u} (n = {g.n}): {g.outcome}"


def condition_rows(q: Qualification, serials: Sequence[str]) -> list[list[str]]:
    """Every limit at every limits condition per device (value ± U, n, outcome), the verdict
    at each condition and the device verdict.  A row with one cell heads a condition."""
    rows = [["limit", "limit value", *serials]]
    if q.limits is None:
        return rows
    how = {g.condition: g.how for g in q.selection}
    for condition in q.conditions():
        name = condition.name
        rows.append([f"condition {name} ({condition_text(condition)}): "
                     f"{how.get(name, 'not graded')}"])
        for limit in q.limits.limits_at(name):
            meta = METRICS.get(limit.metric)
            label = meta.name if meta is not None else limit.metric
            combine = "worst shot" if limit.combine == "worst" else "mean"
            cells = []
            for serial in serials:
                grade = next((g for g in q.verdict(serial, name).grades
                              if g.metric == limit.metric), None)
                cells.append(_grade_cell(grade))
            rows.append([f"{label} ({combine})",
                         _limit(limit.min, limit.max, _unit(limit.metric)), *cells])
        rows.append([f"verdict at {name}", "",
                     *[q.verdict(serial, name).outcome for serial in serials]])
    if q.limits.worst_case is not None:
        rows.append(["worst-case snappiness step", "table above",
                     *[NOT_MEASURED if q.worst_case_of(s) is None
                       else q.worst_case_of(s).outcome for s in serials]])
    rows.append(["device verdict (every condition and the worst-case step)", "",
                 *[NOT_MEASURED if q.device(s) is None else q.device(s).verdict
                   for s in serials]])
    return rows


def condition_reasons(q: Qualification) -> list[str]:
    """Why each device is not conforming at a condition: ``"serial at condition: ..."``."""
    out = []
    for serial in q.serials:
        for condition in q.conditions():
            verdict = q.verdict(serial, condition.name)
            if verdict.outcome != "conforming":
                out.append(f"{serial} at {condition.name}: {verdict.outcome} — "
                           + "; ".join(verdict.reasons))
    return out


def _unit(metric: str) -> str:
    from benchrun.config.limits import metric_unit

    return metric_unit(metric)


def summary_lines(q: Qualification) -> list[str]:
    """One line per device: its verdict at each nominal condition and the worst-case step
    (the demo's printed summary)."""
    if q.lot is None:
        return [f"qualification not graded: {q.not_graded}"]
    lines = []
    for serial in q.serials:
        parts = []
        for name in q.nominal_conditions:
            verdict = q.verdict(serial, name)
            text = f"{name}: {verdict.outcome}"
            if verdict.outcome != "conforming" and verdict.reasons:
                text += f" ({'; '.join(verdict.reasons)})"
            parts.append(text)
        step = q.worst_case_of(serial)
        if step is not None:
            text = f"worst-case snappiness: {step.outcome}"
            if step.assessment is not None:
                text += f" (worst of {step.n} shot{'' if step.n == 1 else 's'}: {step.shot}"
                text += "".join(f"; {r}" for r in step.assessment.reasons) + ")"
            else:
                text += f" ({step.reason})"
            parts.append(text)
        lines.append(f"{serial}  " + "; ".join(parts))
    return lines
