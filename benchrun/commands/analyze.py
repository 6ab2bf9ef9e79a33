"""``benchrun analyze FILE.csv``: recovery metrics of one capture stored as CSV.

The CSV has a header row; by default the first three columns are time [s], anode-cathode
voltage [V] and forward current [A]. ``--time/--voltage/--current`` pick columns by header
name or 0-based index. Prints a table with engineering units, or one JSON object (SI units)
with ``--json``. Bad input raises :class:`InputDataError` / :class:`NoEventError`, which the
CLI prints as one line with a non-zero exit code.
"""

from __future__ import annotations

import argparse
import json
import math
from pathlib import Path

import numpy as np

from benchrun.analysis import analyze_recovery
from benchrun.analysis.metrics_meta import METRICS
from benchrun.analysis.recovery import MIN_SAMPLES, RecoveryMetrics
from benchrun.errors import InputDataError
from benchrun.units import format_si


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "analyze",
        help="recovery metrics of a capture stored as CSV",
        description="Find the diode recovery event in a CSV capture and print its metrics.",
    )
    parser.add_argument("file", type=Path, metavar="FILE.csv")
    parser.add_argument("--time", default="0", metavar="COL",
                        help="time column [s]: header name or 0-based index (default 0)")
    parser.add_argument("--voltage", default="1", metavar="COL",
                        help="anode-cathode voltage column [V] (default 1)")
    parser.add_argument("--current", default="2", metavar="COL",
                        help="forward current column [A], anode→cathode positive (default 2)")
    parser.add_argument("--json", action="store_true", help="print one JSON object (SI units)")
    parser.set_defaults(func=run)


def _column(frame, spec: str, role: str, path: Path) -> np.ndarray:
    columns = [str(c) for c in frame.columns]
    if spec in columns:
        name = frame.columns[columns.index(spec)]
    elif spec.lstrip("-").isdigit() and 0 <= int(spec) < len(columns):
        name = frame.columns[int(spec)]
    else:
        raise InputDataError(
            f"{path}: no {role} column {spec!r} (columns: {', '.join(columns)})"
        )
    import pandas as pd

    values = pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=np.float64)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        row = int(bad[0]) + 2  # 1-based line number, after the header line
        raise InputDataError(
            f"{path}: {role} column {str(name)!r} has a missing or non-numeric value at line {row}"
        )
    return values


def read_capture(path: Path, time: str, voltage: str, current: str):
    """Read (t, v, i) from a CSV file; raises InputDataError with one clear line."""
    import pandas as pd

    try:
        frame = pd.read_csv(path)
    except FileNotFoundError:
        raise InputDataError(f"{path}: no such file") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError,
            OSError) as exc:
        message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputDataError(f"{path}: not a readable CSV file ({message})") from exc
    if len(frame) < MIN_SAMPLES:
        raise InputDataError(
            f"{path}: too short: {len(frame)} data rows, need at least {MIN_SAMPLES}"
        )
    t = _column(frame, time, "time", path)
    v = _column(frame, voltage, "voltage", path)
    i = _column(frame, current, "current", path)
    steps = np.diff(t)
    if not np.all(steps > 0):
        row = int(np.argmin(steps > 0)) + 3
        raise InputDataError(f"{path}: time is not strictly increasing at line {row}")
    return t, v, i


def _json_ready(metrics: RecoveryMetrics) -> dict:
    data = metrics.to_dict()
    for key, value in data.items():
        if isinstance(value, float) and not math.isfinite(value):
            data[key] = None
    return data


def format_table(metrics: RecoveryMetrics) -> str:
    """Readable table with engineering units."""
    lines = []
    for key in RecoveryMetrics.metric_keys():
        meta = METRICS[key]
        value = getattr(metrics, key)
        text = format_si(value, meta.unit) if meta.unit else (
            "—" if value is None else f"{value:.4g}"
        )
        lines.append(f"{meta.name:<9} {text:>14}   {meta.description}")
    lines.append("flags     " + (", ".join(metrics.flags) if metrics.flags else "none"))
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    t, v, i = read_capture(args.file, args.time, args.voltage, args.current)
    metrics = analyze_recovery(t, v, i)
    if args.json:
        print(json.dumps(_json_ready(metrics)))
    else:
        print(format_table(metrics))
    return 0
