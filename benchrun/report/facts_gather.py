"""Build :class:`ReportContent` from a stored run (``RunData``) and its ``LotGrade``.

Reads the run folder's configuration files as used (bench, sequence) for instruments,
calibration dates, fixture, tolerances and analysis options; the grades come unchanged from
the ``LotGrade``; the shots' numbers from ``RunData.shots``. Waveforms for the plots are re-read
from the raw record and re-analysed through the same pipeline the runner used.
"""

from __future__ import annotations

import datetime as _dt
import math
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
from benchrun.report.facts_numbers import fmt
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


def _instruments_table(run: Any, bench: Any) -> list[list[str]]:
    rows = [["Role", "Identity (*IDN?)", "Command table", "Resource", "Calibration due"]]
    identities = (run.manifest or {}).get("instruments") or {}
    roles = [r for r, _ in bench.instruments.items()] if bench else list(identities)
    for role in roles:
        entry = dict(bench.instruments.items()).get(role) if bench else None
        ident = identities.get(role) if isinstance(identities, dict) else None
        if isinstance(ident, dict):
            text = ident.get("idn") or ", ".join(
                str(ident[k]) for k in ("manufacturer", "model", "serial", "firmware")
                if ident.get(k))
            due = ident.get("calibration_due")
        else:
            text, due = (str(ident) if ident else "not recorded"), None
        if due is None and entry is not None and entry.calibration_due is not None:
            due = entry.calibration_due.isoformat()
        rows.append([role, text or "not recorded", entry.family if entry else "",
                     entry.resource if entry else "", str(due) if due else "not given"])
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


def _u_text(value: float, unit: str) -> str:
    if unit in ("1", ""):
        return f"{value * 100:.3g} %"
    return fmt(value, unit, 3)


def _budget_table(lot: Any) -> list[list[str]]:
    rows = [["Metric @ condition", "Contributor", "Evaluation", "u(xᵢ)", "|cᵢ|·u(xᵢ)"]]
    for key, budget in lot.budgets.items():
        metric, _, condition = key.partition("@")
        unit = label_unit(metric)[1]
        label = f"{label_unit(metric)[0]} @ {condition}"
        for k, c in enumerate(budget.contributors):
            rows.append([label if k == 0 else "", c.name, c.evaluation,
                         _u_text(c.standard_uncertainty, c.input_unit),
                         fmt(abs(c.contribution), unit, 3)])
        rows.append(["", "combined u_c; expanded U", f"k = {budget.coverage_factor:g}",
                     fmt(budget.combined, unit, 3), fmt(budget.expanded, unit, 3)])
    return rows


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
                    f"≥ {format_si(g.lower, g.unit)}" if g.lower is not None else "",
                    f"≤ {format_si(g.upper, g.unit)}" if g.upper is not None else "") if x)
                cells[g.metric] = Cell(g.value, g.expanded_uncertainty, g.outcome, limit)
            note = "; ".join(r for r in device.reasons if name in r)[:160]
            lines.append(DeviceLine(device.serial, name, cells, device.bin or "",
                                    device.verdict, note))
    return lines, columns


def _shot_rows(run: Any, lot: Any) -> list[dict[str, Any]]:
    """Every shot as ``ShotResult.to_dict()`` plus its condition name (JSON-safe)."""
    by_index = {c.get("point_index"): c["name"] for c in lot.conditions}
    return [json_safe({**s.to_dict(), "condition": by_index.get(s.point.index, "")})
            for s in run.shots]


def _figures(run: Any, lot: Any, columns: list[str]) -> tuple[list, list, list]:
    limits: dict[tuple[str, str], tuple[float | None, float | None]] = {}
    for d in lot.devices:
        for g in d.grades:
            limits.setdefault((g.metric, g.condition), (g.lower, g.upper))
    names = {c.get("point_index"): c["name"] for c in lot.conditions}
    dists, trends = [], []
    for key in columns:
        label, unit = label_unit(key)
        groups: dict[str, list[float | None]] = {}
        per_device: dict[str, list[tuple[float, float]]] = {}
        for s in run.shots:
            cond = names.get(s.point.index)
            if cond is None or not s.valid:
                continue
            groups.setdefault(cond, []).append(s.metrics.get(key))
            value = s.metrics.get(key)
            temperature = s.conditions.get("temperature_K") or s.point.temperature_K
            if value is not None:
                per_device.setdefault(s.serial, []).append((temperature, value))
        lims = {c: limits.get((key, c), (None, None)) for c in groups}
        dists.append({"label": label, "unit": unit, "groups": groups, "limits": lims})
        if len({c["temperature_K"] for c in lot.conditions}) > 1:
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
    devices, columns = _device_lines(lot)
    stats = lot.statistics
    dists, trends, log = _figures(run, lot, columns)
    record = getattr(run, "run", None)
    started = manifest.get("started") or (record.started if record else "")
    finished = manifest.get("finished") or (record.finished if record else "")
    content = ReportContent(
        report_id=new_report_id(run.run_id, now),
        generated_utc=now.strftime("%Y-%m-%d %H:%M:%S UTC"),
        company=manifest.get("company") or signer.organisation or COMPANY_DEFAULT,
        part=lot.part,
        lot=", ".join(lot.lots),
        run_id=run.run_id,
        software_version=str(manifest.get("software_version") or __version__),
        disposition=lot.disposition,
        disposition_reasons=list(lot.reasons),
        signer_name=signer.name,
        signer_role=signer.role,
        signer_organisation=signer.organisation,
        signer_fingerprint=signer.cert_fingerprint_sha256,
        run_window=f"{started} to {finished}" if started and finished else str(started or ""),
        conditions_table=_conditions_table(run, lot, sequence.tolerances if sequence else None),
        instruments_table=_instruments_table(run, bench),
        fixture_table=_fixture_table(bench),
        definitions_table=method_table(options),
        decision_rule=[lot.decision_rule, lot.lot_rule],
        budget_table=_budget_table(lot),
        metric_columns=columns,
        devices=devices,
        counts={"devices": stats.count, "conforming": stats.conforming,
                "non-conforming": stats.nonconforming, "indeterminate": stats.indeterminate,
                "invalid": stats.invalid},
        statistics_table=_statistics_table(stats),
        distributions=dists,
        trends=trends,
        temperature_log=log,
        waveforms=_waveform_requests(run, lot),
        manifest=[dict(e) for e in sources.manifest],
        shots=_shot_rows(run, lot),
        lot_grade=lot.to_dict(),
        analysis_options=options,
        code_sha256=sources.code_sha256,
    )
    return content


def _statistics_table(stats: Any) -> list[list[str]]:
    rows = [["Metric", "Condition", "n", "Mean", "σ", "Min", "Max", "Cpk"]]
    for m in stats.metrics:
        label, unit = label_unit(m.metric)
        rows.append([label, m.condition, str(m.n), fmt(m.mean, unit, 4),
                     fmt(m.std, unit, 3), fmt(m.minimum, unit, 4),
                     fmt(m.maximum, unit, 4),
                     "—" if m.cpk is None else f"{m.cpk:.2f}"])
    if stats.yield_fraction is not None:
        rows.append(["yield", "", str(stats.count), f"{stats.yield_fraction * 100:.1f} %",
                     "", "", "", ""])
    for r in stats.ratios:
        label, _ = label_unit(r.metric)
        rows.append([f"{label} ratio {r.hot}/{r.cold}", "", str(len(r.per_device)),
                     "—" if r.mean is None else f"{r.mean:.3f}", "", "", "", ""])
    for o in stats.outliers[:40]:
        label, unit = label_unit(o.metric)
        rows.append([f"outlier {o.serial}", o.condition, "", f"{label} "
                     f"{fmt(o.value, unit, 4)}", f"z = {o.z:.1f}", "", "", ""])
    return rows
