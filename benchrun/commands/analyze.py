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
import re
from dataclasses import dataclass
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
    parser.add_argument("--time-unit", choices=sorted(TIME_UNITS), default=None,
                        help="unit of the time column when its header does not name one")
    parser.add_argument("--json", action="store_true", help="print one JSON object (SI units)")
    parser.set_defaults(func=run)


#: Lines read to find the delimiter, the header and the first data row.
SNIFF_LINES = 200
#: Consecutive numeric rows that mark the start of the data.
DATA_RUN = 5
#: Unit suffixes recognised in a header such as ``Time (us)`` or ``i_f [mA]``, by role.
UNIT_SCALES = {
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6, "ns": 1e-9,
             "ps": 1e-12},
    "voltage": {"v": 1.0, "mv": 1e-3, "kv": 1e3},
    "current": {"a": 1.0, "ma": 1e-3, "ka": 1e3},
}
_UNIT = re.compile(r"[(\[]\s*([A-Za-zµμ]+)\s*[)\]]\s*$")
#: A unit at the end of a name after ``_``, ``/``, ``-`` or a space (``time_us``, ``t / ns``).
_UNIT_SUFFIX = re.compile(r"(?:^|[_/\s-])\s*([A-Za-zµμ]+)\s*$")
#: Time units accepted by ``--time-unit`` and recognised in a header (``second`` as some scopes
#: write it).
TIME_UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "ns": 1e-9, "ps": 1e-12}
_TIME_WORDS = {"second": 1.0, "seconds": 1.0, "sec": 1.0}
#: Longest line accepted while looking for the header and the data (one row per sample is
#: far shorter; a file without line breaks is refused instead of read into memory whole).
MAX_LINE = 65_536
#: Slowest sampling accepted for a time column whose unit is not named: one sample per µs
#: (a capture at under 1 MS/s cannot resolve a recovery; a column in µs or ns read as seconds
#: would look this slow).
MAX_UNNAMED_STEP = 1e-6
_DELIMITERS = (",", ";", "\t", None)  # None: runs of white space


def _split(line: str, delimiter: str | None) -> list[str]:
    fields = line.split(delimiter)
    while fields and not fields[-1].strip():
        fields.pop()  # a trailing delimiter
    return [f.strip().strip('"').strip("'").strip() for f in fields]


def _number(text: str, decimal_comma: bool) -> bool:
    if decimal_comma:
        text = text.replace(",", ".")
    try:
        float(text)
    except ValueError:
        return False
    return True


def _split_header(line: str, delimiter: str | None, count: int) -> list[str] | None:
    """Header names; delimiters inside quotes or brackets (``V(anode,cathode)``) do not split."""
    names = _split(line, delimiter)
    if len(names) == count:
        return names
    if delimiter is None:
        return None
    fields, depth, quote, current = [], 0, "", []
    for char in line.rstrip("\r\n"):
        if quote:
            quote = "" if char == quote else quote
        elif char in "\"'":
            quote = char
        elif char in "([{":
            depth += 1
        elif char in ")]}":
            depth = max(0, depth - 1)
        elif char == delimiter and depth == 0:
            fields.append("".join(current))
            current = []
            continue
        current.append(char)
    fields.append("".join(current))
    names = [f.strip().strip('"').strip("'").strip() for f in fields]
    while names and not names[-1]:
        names.pop()
    return names if len(names) == count else None


@dataclass(frozen=True)
class _Layout:
    delimiter: str | None
    decimal_comma: bool
    first_data_line: int  # 0-based line index of the first data row
    columns: int  # data columns (empty separator columns left out)
    names: list[str] | None
    keep: tuple[int, ...] = ()  # file column of each data column


def _numeric_row(row: list[str], decimal_comma: bool) -> tuple[int, ...] | None:
    """Positions of the non-empty fields when all of them are numbers (at least two)."""
    filled = tuple(k for k, f in enumerate(row) if f)
    if len(filled) < 2 or not all(_number(row[k], decimal_comma) for k in filled):
        return None
    return filled


def _sniff(path: Path, lines: list[str]) -> _Layout:
    """Delimiter, header and first data row from the first lines of the file.

    Metadata lines before the header are skipped: the data start at the first run of
    :data:`DATA_RUN` lines (or all remaining lines) that are numeric with the same number of
    fields (at least two); the line just before, when not numeric, is the header.
    """
    best: _Layout | None = None
    for delimiter in _DELIMITERS:
        for decimal_comma in (False, True) if delimiter != "," else (False,):
            rows = [_split(line, delimiter) for line in lines]
            # a row of numbers; empty fields are allowed where every data row has them (an
            # empty column between channel groups, as some scopes export)
            filled = [_numeric_row(r, decimal_comma) for r in rows]
            for k in range(len(rows)):
                run = range(k, min(len(rows), k + DATA_RUN))
                if filled[k] is None or not all(filled[j] == filled[k] for j in run):
                    continue
                keep = filled[k]
                names = None
                if k > 0 and filled[k - 1] is None:
                    header = _split_header(lines[k - 1], delimiter, len(rows[k]))
                    if header is not None:
                        names = [header[c] for c in keep]
                layout = _Layout(delimiter, decimal_comma, k, len(keep), names, keep)
                if best is None or (layout.columns, layout.names is not None) > (
                    best.columns, best.names is not None
                ):
                    best = layout
                break
    if best is None:
        raise InputDataError(
            f"{path}: no rows of numbers found (expected a header line, then rows of "
            "time, voltage and current separated by commas, semicolons, tabs or spaces)"
        )
    return best


def _column_index(layout: _Layout, spec: str, role: str, path: Path) -> tuple[int, float]:
    """Column index and unit scale for ``--time/--voltage/--current``."""
    names = layout.names or []
    index = None
    if spec in names:
        index = names.index(spec)
    else:
        folded = [n.casefold() for n in names]
        if spec.strip().casefold() in folded:
            index = folded.index(spec.strip().casefold())
        elif spec.lstrip("-").isdigit() and 0 <= int(spec) < layout.columns:
            index = int(spec)
    if index is None:
        shown = ", ".join(names) if names else f"{layout.columns} unnamed columns"
        raise InputDataError(f"{path}: no {role} column {spec!r} (columns: {shown})")
    return index, _header_scale(names[index] if names else "", role)


def _header_scale(name: str, role: str) -> float | None:
    """SI scale of the unit a column name ends with; None when it names no known unit."""
    units = UNIT_SCALES[role]
    for pattern in (_UNIT, _UNIT_SUFFIX):
        match = pattern.search(name)
        if match:
            unit = match.group(1).casefold().replace("μ", "µ")
            if unit in units:
                return units[unit]
            if role == "time" and unit in _TIME_WORDS:
                return _TIME_WORDS[unit]
    if role == "time" and name.strip().casefold() in _TIME_WORDS:
        return 1.0
    return None


def _read_head(path: Path) -> list[str]:
    """The first :data:`SNIFF_LINES` lines, each at most :data:`MAX_LINE` characters."""
    head: list[str] = []
    with open(path, encoding="utf-8-sig", errors="replace") as handle:
        for number in range(1, SNIFF_LINES + 1):
            line = handle.readline(MAX_LINE + 1)
            if not line:
                break
            if len(line) > MAX_LINE and not line.endswith("\n"):
                raise InputDataError(
                    f"{path}: line {number} is longer than {MAX_LINE} characters (no line "
                    "breaks?): a capture CSV holds one row per sample"
                )
            head.append(line)
    return head


def read_capture(path: Path, time: str, voltage: str, current: str,
                 time_unit: str | None = None):
    """Read (t, v, i) in SI units from a CSV file; raises InputDataError with one clear line.

    The delimiter (comma, semicolon, tab or white space; a decimal comma with the others),
    metadata lines before the header, and the header itself are found from the first lines.
    Empty columns (between channel groups) are skipped: column indices count the data
    columns only. A unit at the end of a column name (``Time (us)``, ``I [mA]``, ``time_ns``)
    scales the column to SI; a time column whose name gives no unit is read in
    ``time_unit`` when given, else in seconds only when its step is at most
    :data:`MAX_UNNAMED_STEP` (otherwise the file is refused with a message naming
    ``--time-unit``). A line longer than :data:`MAX_LINE` among the first lines is refused.
    """
    import pandas as pd

    try:
        head = _read_head(path)
    except FileNotFoundError:
        raise InputDataError(f"{path}: no such file") from None
    except OSError as exc:
        raise InputDataError(f"{path}: cannot read ({exc.strerror or exc})") from exc
    layout = _sniff(path, [line.rstrip("\r\n") for line in head])
    picks = [
        (role, *_column_index(layout, spec, role, path))
        for role, spec in (("time", time), ("voltage", voltage), ("current", current))
    ]
    try:
        frame = pd.read_csv(
            path,
            sep=layout.delimiter if layout.delimiter is not None else r"\s+",
            decimal="," if layout.decimal_comma else ".",
            header=None,
            skiprows=layout.first_data_line,
            usecols=sorted({layout.keep[index] for _, index, _ in picks}),
            encoding="utf-8-sig",
            skip_blank_lines=True,
            engine="c",
        )
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError,
            OSError) as exc:
        message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputDataError(f"{path}: not a readable CSV file ({message})") from exc
    if len(frame) < MIN_SAMPLES:
        raise InputDataError(
            f"{path}: too short: {len(frame)} data rows, need at least {MIN_SAMPLES}"
        )
    out = []
    for role, index, scale in picks:
        column = layout.keep[index]
        values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=np.float64)
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            row = layout.first_data_line + int(bad[0]) + 1  # 1-based line number
            name = layout.names[index] if layout.names else f"column {index}"
            raise InputDataError(
                f"{path}: {role} column {name!r} has a missing or non-numeric value at line {row}"
            )
        if role == "time" and time_unit is not None:
            scale = TIME_UNITS[time_unit]
        elif role == "time" and scale is None and values.size > 1:
            step = float(np.median(np.diff(values[: 1 << 16])))
            if step > MAX_UNNAMED_STEP:
                name = layout.names[index] if layout.names else f"column {index}"
                raise InputDataError(
                    f"{path}: the time column {name!r} names no unit and its step is "
                    f"{step:.4g}: read as seconds that is under 1 MS/s, too slow for a "
                    "recovery; give --time-unit (s, ms, us, ns, ps) or a unit in the header "
                    "such as 'Time (us)'"
                )
        scale = 1.0 if scale is None else scale
        out.append(values * scale if scale != 1.0 else values)
    t, v, i = out
    steps = np.diff(t)
    if not np.all(steps > 0):
        row = layout.first_data_line + int(np.argmin(steps > 0)) + 2
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
        u = metrics.u.get(key)
        u_text = "" if u is None else ("u " + (format_si(u, meta.unit, 2) if meta.unit
                                               else f"{u:.2g}"))
        lines.append(f"{meta.name:<9} {text:>14} {u_text:>12}   {meta.description}")
    c = metrics.corrections
    if c:
        lines.append(f"offsets   current {format_si(c.get('current_offset_A'), 'A')} "
                     f"({c.get('current_offset_rule')}); voltage "
                     f"{format_si(c.get('voltage_offset_V'), 'V')} "
                     f"({c.get('voltage_offset_rule')})")
    lines.append("flags     " + (", ".join(metrics.flags) if metrics.flags else "none"))
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    t, v, i = read_capture(args.file, args.time, args.voltage, args.current,
                           getattr(args, "time_unit", None))
    metrics = analyze_recovery(t, v, i)
    if args.json:
        print(json.dumps(_json_ready(metrics)))
    else:
        print(format_table(metrics))
    return 0
