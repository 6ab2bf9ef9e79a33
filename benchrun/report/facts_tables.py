"""The report's tables as rows of strings, built from plain inputs (pure).

Limits per condition (with decision rule, aggregation and window convention), bins, test set-up
per condition, traceability (instruments, probes, people, files, software), the log of shots
left out, retaken or flagged, statistics and outliers. Numbers follow
:mod:`benchrun.report.facts_numbers` (GUM 7.2.6 rounding, one prefix per column).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

from benchrun.report.facts import label_unit
from benchrun.report.facts_method import window_convention
from benchrun.report.facts_numbers import column_scale, fmt, in_column, scaled, significant

#: Aggregation stated when the grading does not say how shots are combined (its behaviour
#: before limits could choose: the mean of the device's valid shots).
DEFAULT_AGGREGATION = "mean of the device's valid shots"

#: Words for the aggregation modes a limit may name.
AGGREGATION_WORDS = {
    "mean": "mean of the device's valid shots",
    "worst": "worst valid shot of the device (the one nearest the limit)",
    "max": "largest valid shot of the device",
    "min": "smallest valid shot of the device",
}

NOT_RECORDED = "not recorded"


def _get(obj: Any, *names: str) -> Any:
    """The first attribute (or mapping key) of ``names`` that ``obj`` has and is set."""
    for name in names:
        value = obj.get(name) if isinstance(obj, dict) else getattr(obj, name, None)
        if value not in (None, ""):
            return value
    return None


def _text(value: Any) -> str:
    if value in (None, ""):
        return NOT_RECORDED
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return str(value)


def aggregation_text(grade: Any) -> str:
    """How a limit combines a device's shots, in words."""
    mode = _get(grade, "aggregation")
    if mode is None:
        return DEFAULT_AGGREGATION
    return AGGREGATION_WORDS.get(str(mode), str(mode))


def compact(value: float) -> str:
    """A set value as written (up to 4 significant digits, no trailing zeros)."""
    text = significant(value, 4)
    return text.rstrip("0").rstrip(".") if "." in text else text


def limit_value(value: float | None, unit: str) -> str:
    """A limit or bin edge with its own prefix, without trailing zeros (``2.5 µC``)."""
    if value is None:
        return "—"
    scale, shown = column_scale([value], unit)
    return f"{compact(scaled(value, scale, unit))} {shown}".strip()


def _limit_text(lower: float | None, upper: float | None, unit: str) -> tuple[str, str]:
    return limit_value(lower, unit), limit_value(upper, unit)


def decision_text(rule: dict[str, Any] | None, grade: Any) -> str:
    """The decision rule as it applies to one limit (ILAC-G8:09/2019 wording)."""
    name = (rule or {}).get("rule")
    factor = (rule or {}).get("guard_factor")
    sides = " and ".join(x for x in (
        "value ≥ lower limit + w" if grade.lower is not None else "",
        "value ≤ upper limit − w" if grade.upper is not None else "") if x)
    if name == "simple":
        return "simple acceptance (w = 0): conforming when the value is within the limit"
    if factor is None:
        return f"guarded: conforming when {sides}; w = guard band of each device"
    return (f"{name}, w = {compact(float(factor))}·U of each device: conforming when "
            f"{sides}")


def limits_table(lot: Any, options: dict[str, Any],
                 rule: dict[str, Any] | None = None) -> list[list[str]]:
    """One row per limit and condition: limits, decision rule, aggregation, convention."""
    rows = [["Condition", "Metric", "Lower limit", "Upper limit", "Decision rule",
             "Aggregation of shots", "Window convention"]]
    seen: dict[tuple[str, str], Any] = {}
    for device in lot.devices:
        for g in device.grades:
            seen.setdefault((g.condition, g.metric), g)
    order = [c["name"] for c in lot.conditions]
    for (condition, metric), g in sorted(
            seen.items(), key=lambda kv: (order.index(kv[0][0]) if kv[0][0] in order else 99,
                                          kv[0][1])):
        label, unit = label_unit(metric)
        lower, upper = _limit_text(g.lower, g.upper, unit)
        rows.append([condition, label, lower, upper, decision_text(rule, g),
                     aggregation_text(g), window_convention(metric, options)])
    return rows


def bins_table(bins: Any) -> list[list[str]]:
    """The bin classes a limits file defines (``None``: no bins)."""
    if bins is None:
        return []
    label, unit = label_unit(bins.metric)
    where = bins.condition or "the first condition"
    rows = [["Bin", "Metric at condition", "From (≥)", "Below or at (≤)"]]
    for item in bins.classes:
        rows.append([item.name, f"{label} at {where}",
                     limit_value(item.min, unit), limit_value(item.max, unit)])
    return rows


def _spread(values: Sequence[float], unit: str, digits: int = 4) -> str:
    values = [v for v in values if v is not None and math.isfinite(v)]
    if not values:
        return NOT_RECORDED
    lo, hi = min(values), max(values)
    if math.isclose(lo, hi, rel_tol=1e-9, abs_tol=0.0):
        return fmt(lo, unit, digits)
    scale, shown = column_scale([lo, hi], unit)
    return f"{in_column(lo, scale, unit, digits)} … {in_column(hi, scale, unit, digits)} {shown}"


def setup_table(run: Any, lot: Any, settings: dict[str, dict[str, Any]], sequence: Any,
                bench: Any) -> list[list[str]]:
    """Per condition: the settings and measured quantities that define the result."""
    rows = [["Condition", "Quantity", "Value", "Source"]]
    probes = dict(getattr(bench, "probes", {}) or {}) if bench is not None else {}
    for cond in lot.conditions:
        name, index = cond["name"], cond.get("point_index")
        shots = [s for s in run.shots if s.point.index == index]
        valid = [s for s in shots if s.valid]
        taken = settings.get(name) or {}
        first = name
        point = shots[0].point if shots else None

        def add(quantity: str, value: str, source: str) -> None:
            nonlocal first
            rows.append([first, quantity, value, source])
            first = ""

        gate = getattr(point, "gate_resistance_ohm", None) if point else None
        gate = gate if gate is not None else taken.get("gate_resistance_ohm")
        add("gate resistance", fmt(gate, "Ω") if gate is not None else NOT_RECORDED,
            "sequence file (test point)")
        for key, label in (("first_pulse_s", "first pulse width"),
                           ("off_time_s", "off time between pulses"),
                           ("second_pulse_s", "second pulse width"),
                           ("record_start_s", "record start (from the second turn-on)"),
                           ("sample_interval_s", "sample interval")):
            value = taken.get(key)
            add(label, fmt(value, "s") if value is not None else NOT_RECORDED,
                "raw record, shot settings")
        length = taken.get("record_length")
        add("record length", f"{int(length)} samples" if length else NOT_RECORDED,
            "raw record, shot settings")
        add("switch under test", _switch_text(bench, sequence), "bench and sequence files")
        for channel, span in sorted((taken.get("ranges") or {}).items()):
            unit = "A" if "current" in channel else "V"
            lo, hi = span
            scale, shown = column_scale([lo, hi], unit)
            add(f"range {channel.replace('_', ' ')}",
                f"{in_column(lo, scale, unit, 3)} … {in_column(hi, scale, unit, 3)} {shown}",
                "raw record, shot settings (representative shot)")
        for channel, unit, key in (("diode current", "A", "current_range_A"),
                                   ("diode voltage", "V", "voltage_range_V")):
            spans = [s.acquisition.get(key) for s in valid if s.acquisition.get(key)]
            if spans:
                add(f"full scale {channel}, valid shots", _spread(spans, unit, 3),
                    "results rows (acquisition)")
        for channel, probe in sorted(probes.items()):
            bandwidth = _get(probe, "bandwidth", "bandwidth_hz")
            add(f"bandwidth {channel.replace('_', ' ')}",
                fmt(bandwidth, "Hz") if bandwidth is not None else
                NOT_RECORDED + " in the bench file", "bench file (probe)")
        bits = {s.acquisition.get("adc_bits") for s in valid if s.acquisition.get("adc_bits")}
        if bits:
            add("ADC resolution", ", ".join(f"{int(b)} bit" for b in sorted(bits)),
                "results rows (acquisition)")
        didt = [float(s.conditions["didt_A_per_s"]) for s in valid
                if s.conditions.get("didt_A_per_s") is not None]
        add("di/dt measured (mean, min … max)",
            (fmt(sum(didt) / len(didt), "A/s") + f" ({_spread(didt, 'A/s')})") if didt
            else NOT_RECORDED,
            "analysis of each valid shot: (0.5·IF + 0.5·Irrm)/Δt between +0.5·IF and "
            "−0.5·Irrm (method table)")
        requested = getattr(point, "didt_A_per_s", None) if point else None
        add("di/dt requested", fmt(requested, "A/s") if requested else
            "not set (follows from gate resistance and loop)", "sequence file")
    return rows


def _switch_text(bench: Any, sequence: Any) -> str:
    parts = []
    fixture = getattr(bench, "fixture", None)
    named = _get(fixture, "switch", "switch_part", "switch_device") if fixture else None
    if isinstance(named, dict) or hasattr(named, "part"):
        part, serial = _get(named, "part"), _get(named, "serial")
        named = (f"{part or 'part not stated'}, serial {serial or 'not stated'}"
                 if part or serial else None)
    parts.append(f"switch {named}" if named else "switch not named in the bench file")
    on = getattr(fixture, "switch_on_voltage", None) if fixture else None
    if on is not None:
        parts.append(f"on-state voltage {fmt(on, 'V')}")
    measured = getattr(sequence, "switch_voltage", None) if sequence is not None else None
    if measured is not None:
        parts.append("switch voltage recorded" if measured else "switch voltage not recorded")
    return "; ".join(parts)


def traceability_table(run: Any, bench: Any) -> list[list[str]]:
    """Every instrument and probe: identity, serial, calibration date, due date, certificate."""
    rows = [["Item", "Identity", "Serial", "Calibrated", "Calibration due", "Certificate"]]
    identities = (run.manifest or {}).get("instruments") or {}
    entries = dict(bench.instruments.items()) if bench is not None else {}
    roles = list(entries) or list(identities)
    for role in roles:
        entry = entries.get(role)
        ident = identities.get(role) if isinstance(identities, dict) else None
        ident = ident if isinstance(ident, dict) else {}
        identity = str(ident.get("idn") or "").replace(",", ", ") or " ".join(
            str(ident[k]) for k in ("manufacturer", "model") if ident.get(k)) or NOT_RECORDED
        if ident.get("firmware"):
            identity += f", firmware {ident['firmware']}"
        due = _get(ident, "calibration_due") or _get(entry, "calibration_due")
        accuracy = _get(entry, "accuracy") if entry is not None else None
        vertical = _get(accuracy, "vertical") if accuracy is not None else None
        if vertical is not None:
            identity += f"; vertical accuracy {compact(vertical * 100)} % of full scale"
        rows.append([f"{role} ({entry.family})" if entry is not None else role, identity,
                     _text(_get(ident, "serial") or _get(entry, "serial")),
                     _text(_get(accuracy, "calibrated") if accuracy is not None else None),
                     _text(due),
                     _text(_get(accuracy, "certificate") if accuracy is not None else None)])
    probes = dict(getattr(bench, "probes", {}) or {}) if bench is not None else {}
    for name, probe in sorted(probes.items()):
        unit = "A/V" if getattr(probe, "measures_current", False) else "V/V"
        accuracy = _get(probe, "accuracy")
        identity = (f"{probe.kind}, channel {probe.channel}, scale "
                    f"{compact(float(probe.scale))} {unit}, deskew {fmt(probe.deskew, 's')}")
        if accuracy is not None and _get(accuracy, "scale") is not None:
            identity += f"; scale tolerance {compact(accuracy.scale * 100)} %"
            skew = _get(accuracy, "skew")
            if skew:
                identity += f", residual skew {fmt(skew, 's', 2)}"
        rows.append([f"probe {name.replace('_', ' ')}", identity,
                     _text(_get(probe, "serial")),
                     _text(_get(accuracy, "calibrated") if accuracy is not None else None),
                     _text(_get(probe, "calibration_due")),
                     _text(_get(accuracy, "certificate") if accuracy is not None else None)])
    return rows


def ambient_text(ambient: Any) -> str | None:
    """``"23 °C, 45 % relative humidity (bench file (site), as stated by the lab)"``."""
    if not isinstance(ambient, dict):
        return ambient
    parts = []
    if ambient.get("temperature_degC") is not None:
        parts.append(f"{compact(float(ambient['temperature_degC']))} °C")
    if ambient.get("relative_humidity_percent") is not None:
        parts.append(f"{compact(float(ambient['relative_humidity_percent']))} % "
                     "relative humidity")
    parts += [f"{k} {v}" for k, v in ambient.items()
              if k not in ("temperature_degC", "relative_humidity_percent", "source")]
    if not parts:
        return None
    source = ambient.get("source")
    return ", ".join(parts) + (f" ({source})" if source else "")


def record_table(run: Any, sequence: Any, limits: Any, manifest_entries: Iterable[dict],
                 software_version: str, code_sha256: str, signer_fingerprint: str,
                 run_window: str) -> list[list[str]]:
    """Who, where, under which procedure, limits revision and software the run was made."""
    manifest = run.manifest or {}
    hashes = {m.get("name"): m.get("sha256") for m in manifest_entries}
    ambient = ambient_text(manifest.get("ambient"))
    procedure = manifest.get("procedure") or (getattr(sequence, "name", "") or "")
    limits_revision = getattr(limits, "revision", None) or manifest.get("limits_revision")
    return [
        ["Item", "Value"],
        ["operator", _text(manifest.get("operator"))],
        ["ambient", _text(ambient)],
        ["run", f"{run.run_id} ({run_window})" if run_window else run.run_id],
        ["procedure (sequence)", procedure or NOT_RECORDED],
        ["sequence.yaml SHA-256", hashes.get("sequence.yaml") or NOT_RECORDED],
        ["limits revision", str(limits_revision) if limits_revision else NOT_RECORDED],
        ["limits.yaml SHA-256", hashes.get("limits.yaml") or NOT_RECORDED],
        ["software", f"benchrun {software_version}"],
        ["analysis and grading code SHA-256", code_sha256 or NOT_RECORDED],
        ["signer certificate SHA-256", signer_fingerprint or NOT_RECORDED],
    ]


def shot_log_table(run: Any, lot: Any) -> list[list[str]]:
    """Every shot left out of grading, retaken or carrying an analysis flag, per device."""
    rows = [["Serial", "Condition", "Shot", "State", "Reason"]]
    names = {c.get("point_index"): c["name"] for c in lot.conditions}
    problems: dict[tuple[str, str, int, int], str] = {}
    for device in lot.devices:
        for text in getattr(device, "invalid_shots", ()) or ():
            head, _, why = str(text).partition(": ")
            parts = head.split()
            try:
                key = (device.serial, parts[0], int(parts[2]), int(parts[4]))
            except (IndexError, ValueError):
                continue
            problems[key] = why
    attempts: dict[tuple[str, int, int], int] = {}
    for s in run.shots:
        k = (s.serial, s.point.index, s.repeat)
        attempts[k] = max(attempts.get(k, 0), s.attempt)
    for s in sorted(run.shots, key=lambda s: (s.serial, s.point.index, s.repeat, s.attempt)):
        condition = names.get(s.point.index)
        where = condition or f"{s.point.label or 'test point'} (not graded)"
        why = problems.get((s.serial, condition or "", s.repeat, s.attempt))
        retaken = s.attempt < attempts[(s.serial, s.point.index, s.repeat)]
        if s.valid and not why and not s.flags and not retaken:
            continue
        if retaken:
            state = f"retaken (attempt {s.attempt + 1} follows)"
        elif not s.valid or why:
            state = "left out of grading" if condition else "left out"
        else:
            state = "used"
        reasons = [*s.flags] + ([why] if why and why not in s.flags else [])
        if not reasons and retaken:
            reasons.append("the shot was fired again")
        shot = f"repeat {s.repeat}, attempt {s.attempt} ({s.raw_ref or 'no raw record'})"
        rows.append([s.serial, where, shot, state, "; ".join(reasons) or "—"])
    return rows


def statistics_table(stats: Any) -> list[list[str]]:
    """n, mean, σ, min, max and Cpk per graded metric and condition (one prefix per row)."""
    rows = [["Metric", "Condition", "n", "Unit", "Mean", "σ", "Min", "Max", "Cpk"]]
    for m in stats.metrics:
        label, unit = label_unit(m.metric)
        scale, shown = column_scale([m.mean, m.minimum, m.maximum], unit)
        spread_scale = 1.0 if unit == "K" else scale  # a spread in K is the same in °C
        rows.append([label, m.condition, str(m.n), shown or "1",
                     in_column(m.mean, scale, unit), in_column(m.std, spread_scale, "", 3),
                     in_column(m.minimum, scale, unit), in_column(m.maximum, scale, unit),
                     "—" if m.cpk is None else significant(float(m.cpk), 2)])
    if stats.yield_fraction is not None:
        rows.append(["yield", "", str(stats.count), "%",
                     significant(stats.yield_fraction * 100, 3), "", "", "", ""])
    for r in stats.ratios:
        label, _ = label_unit(r.metric)
        rows.append([f"{label} ratio {r.hot}/{r.cold}", "", str(len(r.per_device)), "1",
                     "—" if r.mean is None else significant(float(r.mean), 3), "", "", "", ""])
    return rows


def outliers_table(stats: Any) -> list[list[str]]:
    """Device values flagged as outliers, with the test that flagged them."""
    outliers = list(getattr(stats, "outliers", ()) or ())
    if not outliers:
        return []
    rows = [["Serial", "Metric", "Condition", "Value", "Modified z-score"]]
    for o in outliers:
        label, unit = label_unit(o.metric)
        rows.append([o.serial, label, o.condition, fmt(o.value, unit),
                     significant(float(o.z), 2)])
    return rows
