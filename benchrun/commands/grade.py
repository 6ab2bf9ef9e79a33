"""``benchrun grade RESULTS [--limits FILE] [--bench FILE] [--run-id ID | --lot LOT] [--json]``.

Regrades stored results. RESULTS is a run folder or a results database URL. Without
``--limits`` the run folder's ``limits.yaml`` (the limits the run was made with) is used; pass
a changed limits file to see how the same measurements grade against it. The instrument and
probe accuracies of the uncertainty budgets come from the bench file the run was made on
(the run folder's ``bench.yaml``, or ``--bench FILE``).

With ``--lot LOT`` every run of that lot in the store behind RESULTS is graded as one lot
(:func:`benchrun.store.lotdata.load_lot`: each device's shots from the latest complete run
that tested it, earlier tests listed as superseded); the limits are those of the newest run
that counts unless ``--limits`` names a file, and the budgets take the largest accuracy bound
of the benches involved unless ``--bench`` names one file.

The text output shows each limit with its aggregation (mean or worst shot), the devices'
grades, why a device is unbinned, the sampling plan with its probability of acceptance at the
AQL and its LTPD, and the lot statistics (capability with its lower bound, outliers with the
test used).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from benchrun.commands.report import path_arg
from benchrun.config.bench import BenchConfig, load_bench
from benchrun.config.limits import LimitsSpec, load_limits, metric_unit
from benchrun.errors import GradingError
from benchrun.grading import run_bench
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
    parser.add_argument("--limits", metavar="FILE", type=path_arg,
                        help="limits file (default: the run's)")
    parser.add_argument("--bench", metavar="FILE", type=path_arg, help="bench file with the "
                        "instrument and probe accuracies (default: the run's)")
    parser.add_argument("--run-id", metavar="ID", help="run to grade when the database holds "
                        "several")
    parser.add_argument("--lot", metavar="LOT", help="grade every run of this lot in the "
                        "store as one lot (retest rule: the latest complete test of each "
                        "device counts)")
    parser.add_argument("--runs", action="append", default=[], type=path_arg, metavar="DIR",
                        help="with --lot: a folder holding run folders that are not where "
                             "the store records them (repeat for several)")
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


def _bench_for(args: argparse.Namespace, run: Any) -> BenchConfig:
    if args.bench:
        return load_bench(args.bench)
    return run_bench(run)


def run(args: argparse.Namespace) -> int:
    from benchrun.store.rundata import load_run, pending_warning

    if getattr(args, "lot", None):
        return _run_lot(args)
    data = load_run(args.results, args.run_id)
    if (warning := pending_warning(data)) is not None:
        print(warning, file=sys.stderr)
    limits, path = _limits_for(args, data)
    lot = grade_lot(data.shots, limits, bench=_bench_for(args, data),
                    analysis_options=data.manifest.get("analysis_options"))
    if args.json:
        payload = {"run_id": data.run_id, "limits_file": str(path), **lot.to_dict()}
        print(json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False))
    else:
        print(render_text(lot, run_id=data.run_id, limits_file=str(path)))
    return 0


def _run_lot(args: argparse.Namespace) -> int:
    """``grade RESULTS --lot LOT``: every run of the lot in the store, graded as one lot."""
    from benchrun.grading.across import grade_across
    from benchrun.store.lotdata import RETEST_RULE, counted_runs, load_lot, locate_lot_folders

    lot_data, _ = locate_lot_folders(load_lot(args.results, args.lot), args.runs)
    if lot_data.pending:
        print(f"warning: {len(lot_data.pending)} shot(s) of lot {args.lot} were recorded but "
              "not analysed and are left out; 'benchrun run ... --resume' completes them",
              file=sys.stderr)
    graded = grade_across(counted_runs(lot_data), lot_data.shots, limits_path=args.limits,
                          bench_path=args.bench, lot=args.lot)
    lot, path = graded.grade, graded.limits_path
    if args.json:
        payload = {"lot_runs": lot_data.to_dict(), "limits_file": str(path), **lot.to_dict()}
        print(json.dumps(payload, indent=2, sort_keys=True, ensure_ascii=False))
        return 0
    lines = [f"Lot {lot_data.lot}: {len(lot_data.runs)} run(s) in {lot_data.store_url}"]
    for item in lot_data.to_dict()["runs"]:  # type: ignore[union-attr]
        lines.append(f"  run {item['run_id']}  bench {item['bench_id'] or '—'}  "
                     f"{item['status']}  devices counted: "
                     f"{', '.join(item['counted_devices']) or 'none'}")
    lines.append(f"Retest rule: {RETEST_RULE}")
    for s in lot_data.superseded:
        lines.append(f"  superseded: {s.serial} in run {s.run_id} (bench {s.bench_id or '—'}, "
                     f"{s.shots} shot(s)), replaced by run {s.replaced_by}")
    for serial in lot_data.unfinished:
        lines.append(f"  {serial}: tested only in an unfinished run")
    lines.append("")
    print("\n".join(lines))
    print(render_text(lot, run_id=", ".join(lot.run_ids), limits_file=str(path)))
    return 0


def _value(value: float | None, unit: str) -> str:
    return format_si(value, unit, digits=4) if unit else ("—" if value is None else f"{value:.3g}")


def _limits_lines(lot: LotGrade) -> list[str]:
    """One line per limit in force: bounds, unit and how the shots are combined."""
    if not lot.limits:
        return []
    lines = ["Limits (aggregation: how a device's valid shots are combined; worst = the shot "
             "nearest to or beyond the limit)"]
    for row in lot.limits:
        unit = row["unit"]
        bounds = []
        if row["lower"] is not None:
            bounds.append(f"≥ {_value(row['lower'], unit)}")
        if row["upper"] is not None:
            bounds.append(f"≤ {_value(row['upper'], unit)}")
        source = "stated" if row["aggregation_stated"] else "default"
        lines.append(f"  {row['metric'] + '@' + row['condition']:<20}"
                     f"{' and '.join(bounds):<22}{row['aggregation']} ({source})")
    lines.append("")
    return lines


def render_text(lot: LotGrade, *, run_id: str = "", limits_file: str = "") -> str:
    """Readable summary: devices × graded metrics, then the disposition and statistics."""
    lines = [
        f"Part {lot.part}   lot {', '.join(lot.lots) or '—'}   run {run_id or '—'}",
        f"Limits: {limits_file}" if limits_file else "",
        f"Decision rule: {lot.decision_rule}",
        "",
    ]
    lines += _limits_lines(lot)
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
        row = [device.serial, device.verdict,
               device.bin or ("unbinned" if device.unbinned else "—")]
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
        elif device.unbinned:
            lines.append(f"{device.serial}: unbinned: {device.bin_reason}")
    stats = lot.statistics
    yield_text = "—" if stats.yield_fraction is None else f"{100 * stats.yield_fraction:.1f} %"
    lines += [
        "",
        f"Devices {stats.count}: conforming {stats.conforming}, non-conforming "
        f"{stats.nonconforming}, indeterminate {stats.indeterminate}, invalid {stats.invalid}; "
        f"yield {yield_text}",
        f"Lot rule: {lot.lot_rule}",
    ]
    if lot.plan is not None:
        lines.append(f"Sampling plan: {lot.plan.describe()}")
    lines += [f"LOT DISPOSITION: {lot.disposition.upper()}"]
    lines += [f"  - {reason}" for reason in lot.reasons]
    if stats.metrics:
        lines += ["", "Statistics of the graded values (per device: the aggregate each limit "
                      "names)",
                  "metric@condition      n   mean        s           min         max"
                  "         Cpk    Cpk lower"]
        for item in stats.metrics:
            unit = metric_unit(item.metric)
            cpk = "—" if item.cpk is None else f"{item.cpk:.2f}"
            low = "—" if item.cpk_lower is None else f"{item.cpk_lower:.2f}"
            lines.append(
                f"{item.metric + '@' + item.condition:<20}{item.n:>3}   "
                f"{_value(item.mean, unit):<12}{_value(item.std, unit):<12}"
                f"{_value(item.minimum, unit):<12}{_value(item.maximum, unit):<12}"
                f"{cpk:<7}{low}" + (f"   ({item.capability_note})"
                                    if item.capability_note else "")
            )
        lines.append(f"Capability: {stats.capability_method}")
    for ratio in stats.ratios:
        if ratio.metric == "qrr_C" and ratio.mean is not None:
            lines.append(f"Qrr {ratio.hot}/{ratio.cold}: lot mean ratio {ratio.mean:.3g}")
    lines += ["", f"Outliers ({stats.outlier_test}):"]
    if stats.outliers:
        lines.append("  serial        metric@condition      value         modified z")
        for o in stats.outliers:
            lines.append(f"  {o.serial:<14}{o.metric + '@' + o.condition:<22}"
                         f"{_value(o.value, metric_unit(o.metric)):<14}{o.z:+.1f}")
    else:
        lines.append("  none")
    return "\n".join(line for line in lines if line is not None)
