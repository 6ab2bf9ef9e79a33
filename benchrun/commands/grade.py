"""``benchrun grade RESULTS [--limits FILE] [--run-id ID] [--json]``: regrade stored results.

RESULTS is a run folder or a results database URL. Without ``--limits`` the run folder's
``limits.yaml`` (the limits the run was made with) is used; pass a changed limits file to see
how the same measurements grade against it.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from benchrun.config.limits import LimitsSpec, load_limits
from benchrun.errors import GradingError
from benchrun.grading.grade import LotGrade, grade_lot
from benchrun.units import format_si


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "grade",
        help="grade stored results against a limits file",
        description="RESULTS is a run folder or a results database URL. Without --limits the "
        "run folder's limits.yaml (the limits the run was made with) is used; pass a changed "
        "limits file to see how the same measurements grade against it.",
    )
    parser.add_argument("results", metavar="RESULTS", help="run folder or results database URL")
    parser.add_argument("--limits", metavar="FILE", help="limits file (default: the run's)")
    parser.add_argument("--run-id", metavar="ID", help="run to grade when the database holds "
                        "several")
    parser.add_argument("--json", action="store_true", help="print the grades as JSON")
    parser.set_defaults(func=run)


def _limits_for(args: argparse.Namespace, run: Any) -> tuple[LimitsSpec, Path]:
    if args.limits:
        path = Path(args.limits)
    else:
        path = run.limits_path
        if path is None or not path.is_file():
            raise GradingError("the run has no limits.yaml; name one with --limits FILE")
    return load_limits(path), path


def run(args: argparse.Namespace) -> int:
    from benchrun.store.rundata import load_run, pending_warning

    data = load_run(args.results, args.run_id)
    if (warning := pending_warning(data)) is not None:
        print(warning, file=sys.stderr)
    limits, path = _limits_for(args, data)
    lot = grade_lot(data.shots, limits)
    if args.json:
        payload = {"run_id": data.run_id, "limits_file": str(path), **lot.to_dict()}
        print(json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False))
    else:
        print(render_text(lot, run_id=data.run_id, limits_file=str(path)))
    return 0


def _value(value: float | None, unit: str) -> str:
    return format_si(value, unit, digits=4) if unit else ("—" if value is None else f"{value:.3g}")


def render_text(lot: LotGrade, *, run_id: str = "", limits_file: str = "") -> str:
    """Readable summary: devices × graded metrics, then the disposition and statistics."""
    lines = [
        f"Part {lot.part}   lot {', '.join(lot.lots) or '—'}   run {run_id or '—'}",
        f"Limits: {limits_file}" if limits_file else "",
        f"Decision rule: {lot.decision_rule}",
        "",
    ]
    columns: list[tuple[str, str]] = []
    for device in lot.devices:
        for grade in device.grades:
            key = (grade.metric, grade.condition)
            if key not in columns:
                columns.append(key)
    header = ["serial", "verdict", "bin"] + [f"{m}@{c}" for m, c in columns]
    rows = [header]
    marks = {"conforming": "", "non-conforming": " ✗", "indeterminate": " ?", "invalid": " –"}
    for device in lot.devices:
        row = [device.serial, device.verdict, device.bin or "—"]
        for metric, condition in columns:
            try:
                grade = device.grade(metric, condition)
            except KeyError:
                row.append("")
                continue
            if grade.value is None:
                row.append("invalid")
                continue
            text = _value(grade.value, grade.unit)
            if grade.expanded_uncertainty is not None:
                text += f" ±{_value(grade.expanded_uncertainty, grade.unit)}"
            row.append(text + marks.get(grade.outcome, ""))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    for row in rows:
        lines.append("  ".join(cell.ljust(width) for cell, width in zip(row, widths,
                                                                          strict=True)).rstrip())
    lines.append("(±U expanded uncertainty; ✗ non-conforming, ? indeterminate, – invalid)")
    lines.append("")
    for device in lot.devices:
        if device.verdict != "conforming":
            lines.append(f"{device.serial}: {device.verdict}: {'; '.join(device.reasons)}")
    stats = lot.statistics
    yield_text = "—" if stats.yield_fraction is None else f"{100 * stats.yield_fraction:.1f} %"
    lines += [
        "",
        f"Devices {stats.count}: conforming {stats.conforming}, non-conforming "
        f"{stats.nonconforming}, indeterminate {stats.indeterminate}, invalid {stats.invalid}; "
        f"yield {yield_text}",
        f"Lot rule: {lot.lot_rule}",
        f"LOT DISPOSITION: {lot.disposition.upper()}",
    ]
    lines += [f"  - {reason}" for reason in lot.reasons]
    limited = [m for m in stats.metrics if m.lower is not None or m.upper is not None]
    if limited:
        lines += ["", "metric@condition      n   mean        σ           min         max"
                      "         Cpk"]
        from benchrun.config.limits import metric_unit

        for item in limited:
            unit = metric_unit(item.metric)
            cpk = "—" if item.cpk is None else f"{item.cpk:.2f}"
            lines.append(
                f"{item.metric + '@' + item.condition:<20}{item.n:>3}   "
                f"{_value(item.mean, unit):<12}{_value(item.std, unit):<12}"
                f"{_value(item.minimum, unit):<12}{_value(item.maximum, unit):<12}{cpk}"
            )
    for ratio in stats.ratios:
        if ratio.metric == "qrr_C" and ratio.mean is not None:
            lines.append(f"Qrr {ratio.hot}/{ratio.cold}: lot mean ratio {ratio.mean:.3g}")
    if stats.outliers:
        lines.append("Outliers (modified z-score > 3.5, Iglewicz & Hoaglin 1993): " + ", ".join(
            f"{o.serial} {o.metric}@{o.condition} (z = {o.z:.1f})" for o in stats.outliers))
    return "\n".join(line for line in lines if line is not None)
