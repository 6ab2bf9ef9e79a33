"""Build :class:`ReportContent` from a stored run (``RunData``) and its ``LotGrade``.

Reads the run folder's configuration files as used (bench, sequence) for instruments,
calibration dates, fixture, tolerances and analysis options; the grades come unchanged from
the ``LotGrade``; the shots' numbers from ``RunData.shots``. Waveforms for the plots are re-read
from the raw record and re-analysed through the same pipeline the runner used.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
from typing import Any

import numpy as np

from benchrun import __version__
from benchrun.records import json_safe
from benchrun.report.facts import (
    METRIC_ORDER,
    Cell,
    DeviceLine,
    ReportContent,
    WaveformRequest,
    label_unit,
    new_report_id,
)
from benchrun.report.facts_method import method_table
from benchrun.report.facts_numbers import (
    column_scale,
    fmt,
    in_column,
    percent,
    significant,
)
from benchrun.report.facts_tables import (
    bins_table,
    limits_table,
    outliers_table,
    record_table,
    setup_table,
    shot_log_table,
    statistics_table,
    traceability_table,
)
from benchrun.report.keys import ReportSigner
from benchrun.report.run_sources import RunSources
from benchrun.units import format_si

#: Company shown when neither the run manifest nor the signer certificate names one.
COMPANY_DEFAULT = ""

#: At most this many failing devices get a waveform plot each (the rest are listed by name).
MAX_FAILING_PLOTS = 60


def _fmt_range(values: list[float], unit: str) -> str:
    if not values:
        return "—"
    mean = math.fsum(values) / len(values)
    text = fmt(mean, unit, 4)
    if len(values) > 1:
        text += f" ({fmt(min(values), unit, 3)} … {fmt(max(values), unit, 3)})"
    return text


def _conditions_table(run: Any, lot: Any, tolerances: Any) -> list[list[str]]:
    rows = [["Condition", "Quantity", "Requested", "Measured mean (min … max)", "Tolerance",
             "Valid shots"]]
    for cond in lot.conditions:
        index = cond.get("point_index")
        shots = [s for s in run.shots if s.point.index == index]
        if not shots:
            rows.append([cond["name"], "—", format_si(cond["temperature_K"], "K"), "no shots",
                         "", "0"])
            continue
        point = shots[0].point
        valid = [s for s in shots if s.valid]
        n = f"{len(valid)} of {len(shots)}"
        tol = tolerances
        quantities = [
            ("temperature", "temperature_K", point.temperature_K, "K",
             f"± {tol.temperature:g} K" if tol else ""),
            ("forward current IF", "if_A", point.forward_current_A, "A",
             f"± {tol.forward_current * 100:g} %" if tol and tol.forward_current else ""),
            ("reverse voltage VR", "vr_V", point.bus_voltage_V, "V",
             f"± {tol.reverse_voltage * 100:g} %" if tol and tol.reverse_voltage else ""),
            ("di/dt", "didt_A_per_s", point.didt_A_per_s, "A/s",
             f"± {tol.didt * 100:g} %" if tol and tol.didt and point.didt_A_per_s else ""),
        ]
        for k, (label, key, requested, unit, tol_text) in enumerate(quantities):
            measured = [float(s.conditions[key]) for s in valid
                        if s.conditions.get(key) is not None
                        and math.isfinite(float(s.conditions[key]))]
            rows.append([cond["name"] if k == 0 else "", label,
                         fmt(requested, unit) if requested is not None else "not set",
                         _fmt_range(measured, unit), tol_text, n if k == 0 else ""])
    return rows


def _fixture_table(bench: Any) -> list[list[str]]:
    if bench is None:
        return [["Item", "Value"], ["bench file", "not available"]]
    f = bench.fixture
    rows = [["Item", "Value"],
            ["bench", bench.name],
            ["load inductance", format_si(f.load_inductance, "H")],
            ["load resistance", format_si(f.load_resistance, "Ω")],
            ["loop stray inductance", format_si(f.stray_inductance, "H")],
            ["inductor saturation current", format_si(f.inductor_saturation_current, "A")],
            ["bus capacitance", format_si(f.bus_capacitance, "F")],
            ["bleeder resistance", format_si(f.bleeder_resistance, "Ω")],
            ["maximum pulse width", format_si(f.max_pulse_width, "s")]]
    for name, probe in bench.probes.items():
        unit = "A/V" if probe.measures_current else "V/V"
        rows.append([f"probe {name}", f"channel {probe.channel}, {probe.kind}, scale "
                     f"{probe.scale:g} {unit}, deskew {format_si(probe.deskew, 's')}"])
    return rows


def _seconds(value: Any) -> str:
    return format_si(float(value), "s") if isinstance(value, (int, float)) else "not stated"


def _thermal_rows(thermal: Any, names: dict[Any, str]) -> list[list[str]]:
    """Rows stating the junction-temperature handling the run used (run.json ``thermal``,
    written by :func:`benchrun.runner.thermal.thermal_record`): the sensor the temperature was
    read from, the fixture's thermal constants, the dwell after a device swap and, per test
    point, the minimum shot interval with its rule."""
    if not isinstance(thermal, dict):
        return [["temperature sensor, swap dwell, shot interval", "not recorded by the run"]]
    sensor = thermal.get("temperature_sensor")
    where = {"plate": "temperature plate (the thermal controller's sensor on the plate)",
             "case": "device case (the thermal controller's sensor on the case)"}
    rth = thermal.get("thermal_resistance_K_per_W")
    rows = [["temperature read from", where.get(sensor, str(sensor or "not recorded"))],
            ["fixture thermal time constant", _seconds(thermal.get("time_constant_s"))],
            ["fixture thermal resistance",
             f"{rth:g} K/W" if isinstance(rth, (int, float)) else "not stated"],
            ["dwell after a device swap", _seconds(thermal.get("swap_dwell_s"))]]
    points = thermal.get("points") if isinstance(thermal.get("points"), dict) else {}
    for index, heat in sorted(points.items(), key=lambda kv: (len(str(kv[0])), str(kv[0]))):
        if not isinstance(heat, dict):
            continue
        name = names.get(int(index)) if str(index).isdigit() else None
        name = name or heat.get("label") or f"point {index}"
        interval = heat.get("min_interval_s")
        energy = heat.get("energy_J")
        text = (_seconds(interval) if interval is not None
                else "none (no thermal time constant and resistance stated)")
        if isinstance(energy, (int, float)):
            text += f"; heat per shot {format_si(energy, 'J')} (upper estimate)"
        rise = heat.get("rise_per_shot_K")
        if isinstance(rise, (int, float)):
            text += f", rise per shot {rise:.2g} K"
        rows.append([f"minimum shot interval, {name}", text])
    if thermal.get("rule"):
        rows.append(["shot interval rule", str(thermal["rule"])])
    return rows


def _u_text(value: float, unit: str) -> str:
    if unit in ("1", ""):
        return percent(value)
    return fmt(value, unit, 2)


_POOLED = re.compile(r"pooled s = ([-+0-9.eE]+)")


def _contributor_name(name: str, unit: str) -> str:
    """A contributor's name with any bare pooled standard deviation given its unit."""
    def with_unit(match: re.Match) -> str:
        try:
            return f"pooled s = {fmt(float(match[1]), unit, 2)}"
        except ValueError:
            return match[0]

    return _POOLED.sub(with_unit, name)


def _budget_tables(lot: Any) -> list[tuple[str, list[list[str]]]]:
    """One table per metric and condition; the contribution column in one unit."""
    tables = []
    for key, budget in lot.budgets.items():
        metric, _, condition = key.partition("@")
        label, unit = label_unit(metric)
        values = [abs(c.contribution) for c in budget.contributors] + [budget.expanded]
        scale, shown = column_scale(values, unit)
        head = f"|cᵢ|·u(xᵢ) ({shown})" if shown else "|cᵢ|·u(xᵢ)"
        rows = [["Contributor", "Evaluation", "u(xᵢ)", head]]
        for c in budget.contributors:
            rows.append([_contributor_name(c.name, unit), c.evaluation,
                         _u_text(c.standard_uncertainty, c.input_unit),
                         in_column(abs(c.contribution), scale, unit, 2)])
        rows.append(["combined standard uncertainty u_c", "", "",
                     in_column(budget.combined, scale, unit, 2)])
        k = significant(budget.coverage_factor, 2)
        rows.append([f"expanded uncertainty U = k·u_c, k = {k}", "", "",
                     in_column(budget.expanded, scale, unit, 2)])
        tables.append((f"{label} at {condition}", rows))
    return tables


def _column_units(lot: Any, columns: list[str]) -> dict[str, tuple[float, str]]:
    """One unit prefix per device-table column, from the largest value graded in it."""
    units = {}
    for key in columns:
        values = [g.value for d in lot.devices for g in d.grades
                  if g.metric == key and g.value is not None]
        units[key] = column_scale(values, label_unit(key)[1])
    return units


def _device_lines(lot: Any) -> tuple[list[DeviceLine], list[str]]:
    graded = {g.metric for d in lot.devices for g in d.grades}
    columns = [k for k in METRIC_ORDER if k in graded] + sorted(graded - set(METRIC_ORDER))
    lines: list[DeviceLine] = []
    for device in lot.devices:
        for cond in lot.conditions:
            name = cond["name"]
            cells = {}
            for g in device.grades:
                if g.condition != name:
                    continue
                limit = " ".join(x for x in (
                    f"≥ {fmt(g.lower, g.unit)}" if g.lower is not None else "",
                    f"≤ {fmt(g.upper, g.unit)}" if g.upper is not None else "") if x)
                cells[g.metric] = Cell(g.value, g.expanded_uncertainty, g.outcome, limit)
            note = "; ".join(r for r in device.reasons if name in r)
            unbinned = bool(getattr(device, "unbinned", False))
            lines.append(DeviceLine(device.serial, name, cells,
                                    device.bin or ("unbinned" if unbinned else ""),
                                    device.verdict, note))
    return lines, columns


def _shot_rows(run: Any, lot: Any) -> list[dict[str, Any]]:
    """Every shot as ``ShotResult.to_dict()`` plus its condition name (JSON-safe)."""
    by_index = {c.get("point_index"): c["name"] for c in lot.conditions}
    return [json_safe({**s.to_dict(), "condition": by_index.get(s.point.index, "")})
            for s in run.shots]


def _figures(run: Any, lot: Any, columns: list[str]) -> tuple[list, list, list]:
    """Distributions and trends of the graded device values (what the limits judge)."""
    limits: dict[tuple[str, str], tuple[float | None, float | None]] = {}
    for d in lot.devices:
        for g in d.grades:
            limits.setdefault((g.metric, g.condition), (g.lower, g.upper))
    temperatures = {c["name"]: c["temperature_K"] for c in lot.conditions}
    dists, trends = [], []
    for key in columns:
        label, unit = label_unit(key)
        groups: dict[str, list[float | None]] = {c["name"]: [] for c in lot.conditions}
        per_device: dict[str, list[tuple[float, float]]] = {}
        for device in lot.devices:
            for g in device.grades:
                if g.metric != key or g.value is None or g.condition not in groups:
                    continue
                groups[g.condition].append(g.value)
                per_device.setdefault(device.serial, []).append(
                    (temperatures[g.condition], g.value))
        groups = {c: v for c, v in groups.items() if v}
        lims = {c: limits.get((key, c), (None, None)) for c in groups}
        dists.append({"label": label, "unit": unit, "groups": groups, "limits": lims})
        if len(set(temperatures.values())) > 1:
            trends.append({"label": label, "unit": unit, "per_device": per_device})
    log = [(n, s.conditions.get("temperature_K"), s.point.temperature_K)
           for n, s in enumerate(sorted(run.shots, key=lambda s: (s.timestamp, s.raw_ref)))]
    return dists, trends, log


def _waveform_requests(run: Any, lot: Any) -> list[WaveformRequest]:
    names = {c.get("point_index"): c["name"] for c in lot.conditions}
    valid = [s for s in run.shots if s.valid and s.raw_ref and s.point.index in names]
    requests: list[WaveformRequest] = []
    conforming = [d.serial for d in lot.devices if d.verdict == "conforming"]
    if valid:
        # representative: the conforming device whose trr (else Qrr) is closest to the median
        key = next((k for k in ("trr_s", "qrr_C", "irrm_A")
                    if any(s.metrics.get(k) is not None for s in valid)), None)
        pool = [s for s in valid if s.serial in conforming] or valid
        if key is not None:
            vals = [s for s in pool if s.metrics.get(key) is not None]
            if vals:
                median = float(np.median([s.metrics[key] for s in vals]))
                pool = sorted(vals, key=lambda s: abs(s.metrics[key] - median))
        pick = pool[0]
        requests.append(WaveformRequest(pick.raw_ref, pick.serial, names[pick.point.index],
                                        "representative device"))
    failing = [d for d in lot.devices if d.verdict != "conforming"]
    for device in failing[:MAX_FAILING_PLOTS]:
        bad_conditions = [g.condition for g in device.grades if g.outcome != "conforming"]
        shots = [s for s in run.shots if s.serial == device.serial and s.raw_ref
                 and names.get(s.point.index) in (bad_conditions or names.values())]
        if not shots:
            continue
        shot = sorted(shots, key=lambda s: (not s.valid, s.repeat, s.attempt))[0]
        requests.append(WaveformRequest(shot.raw_ref, device.serial,
                                        names.get(shot.point.index, ""), device.verdict))
    return requests


def build_content(run: Any, lot: Any, signer: ReportSigner, sources: RunSources, *,
                  now: _dt.datetime | None = None) -> ReportContent:
    """Everything the report prints, from a run, its grades and the files they rest on.

    Pure: reads nothing, writes nothing; ``sources`` holds what was read from the run folder
    (:func:`benchrun.report.run_sources.run_sources`).
    """
    now = now or _dt.datetime.now(_dt.UTC).replace(microsecond=0)
    manifest = run.manifest or {}
    bench, sequence, options = sources.bench, sources.sequence, sources.analysis_options
    limits = sources.limits
    rule = limits.decision_rule.model_dump() if limits is not None else None
    bins = getattr(lot, "bins", None) or (limits.bins if limits is not None else None)
    names = {c.get("point_index"): c["name"] for c in lot.conditions}
    settings = {names[i]: v for i, v in sources.shot_settings.items() if i in names}
    software = str(manifest.get("software_version") or __version__)
    devices, columns = _device_lines(lot)
    stats = lot.statistics
    dists, trends, log = _figures(run, lot, columns)
    record = getattr(run, "run", None)
    started = manifest.get("started") or (record.started if record else "")
    finished = manifest.get("finished") or (record.finished if record else "")
    window = f"{started} to {finished}" if started and finished else str(started or "")
    content = ReportContent(
        report_id=new_report_id(run.run_id, now),
        generated_utc=now.strftime("%Y-%m-%d %H:%M:%S UTC"),
        company=manifest.get("company") or signer.organisation or COMPANY_DEFAULT,
        part=lot.part,
        lot=", ".join(lot.lots),
        run_id=run.run_id,
        software_version=software,
        disposition=lot.disposition,
        disposition_reasons=list(lot.reasons),
        signer_name=signer.name,
        signer_role=signer.role,
        signer_organisation=signer.organisation,
        signer_fingerprint=signer.cert_fingerprint_sha256,
        run_window=window,
        conditions_table=_conditions_table(run, lot, sequence.tolerances if sequence else None),
        instruments_table=traceability_table(run, bench),
        fixture_table=_fixture_table(bench) + _thermal_rows(manifest.get("thermal"), names),
        definitions_table=method_table(options),
        decision_rule=[lot.decision_rule, lot.lot_rule],
        budget_tables=_budget_tables(lot),
        metric_columns=columns,
        devices=devices,
        counts={"devices": stats.count, "conforming": stats.conforming,
                "non-conforming": stats.nonconforming, "indeterminate": stats.indeterminate,
                "invalid": stats.invalid},
        statistics_table=statistics_table(stats),
        outliers_table=outliers_table(stats),
        outlier_test=("modified z-score |M| > 3.5 over the lot's device values, M = "
                      "0.6745·(x − median)/MAD (Iglewicz and Hoaglin 1993)"),
        distributions=dists,
        trends=trends,
        temperature_log=log,
        waveforms=_waveform_requests(run, lot),
        manifest=[dict(e) for e in sources.manifest],
        shots=_shot_rows(run, lot),
        lot_grade=lot.to_dict(),
        analysis_options=options,
        code_sha256=sources.code_sha256,
        limits_table=limits_table(lot, options, rule),
        bins_table=bins_table(bins),
        bins_rule=_bins_rule(lot, bins),
        setup_table=setup_table(run, lot, settings, sequence, bench),
        record_table=record_table(run, sequence, limits, sources.manifest,
                                  software, sources.code_sha256,
                                  signer.cert_fingerprint_sha256, window),
        shot_log_table=shot_log_table(run, lot),
        column_units=_column_units(lot, columns),
    )
    return content


def _bins_rule(lot: Any, bins: Any) -> str:
    """How a device's bin follows from its value (the grading's own statement when it has
    one, else the behaviour of a bin assignment without uncertainty)."""
    stated = getattr(lot, "bin_rule", None)
    if stated:
        return str(stated)
    if bins is None:
        return ""
    if not any(getattr(d, "bin_reason", None) is not None for d in lot.devices) and \
            not hasattr(lot.devices[0] if lot.devices else None, "bin_reason"):
        return ("A conforming device falls in the first class (in the order listed) whose "
                "bounds contain its value; the value's uncertainty is not applied to the "
                "class edges.")
    return ("A conforming device falls in the first class (in the order listed) whose bounds "
            "contain its value, bounds included. The decision rule applies to the class edges "
            "as to the limits (ILAC-G8:09/2019 §4.2): every value within the guard band w of "
            "the device's value must lie in the same class; when a class edge lies inside, the "
            "device is unbinned and the reason names the edge.")
