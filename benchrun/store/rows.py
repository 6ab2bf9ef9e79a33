"""Rows of the results database and the shot records they hold: conversions both ways and
the WHERE clauses that select one shot (used by :mod:`benchrun.store.results`)."""

from __future__ import annotations

import json
import math
from dataclasses import fields
from typing import Any

from sqlalchemy import bindparam

from benchrun.records import FLAG_ANALYSIS_PENDING, ShotResult
from benchrun.store.canonical import canonical_json
from benchrun.store.schema import SHOT_COLUMNS, ReportRecord, RunRecord, shots_table


def run_record(row: Any) -> RunRecord:
    """A ``runs`` row as a :class:`RunRecord`."""
    return RunRecord(
        run_id=row["run_id"],
        part=row["part"],
        lot=row["lot"],
        started=row["started"],
        finished=row["finished"],
        status=row["status"],
        manifest=json.loads(row["manifest"]),
        bench_id=row.get("bench_id"),
    )


def shot_row(shot: ShotResult, bench_id: str | None = None) -> dict[str, Any]:
    """The ``shots`` row of a shot (dict-valued fields as canonical JSON text), recorded as
    taken on bench ``bench_id``."""
    # the values of shot.to_dict(), without its deep copy (everything is serialised here)
    data = {f.name: getattr(shot, f.name) for f in fields(shot)}
    data["point"] = {f.name: getattr(shot.point, f.name) for f in fields(shot.point)}
    if not data["point"].get("qualification"):  # added later: rows without one stay as they were
        data["point"].pop("qualification", None)
    data["flags"] = list(shot.flags)
    point = data["point"]
    extra = {k: v for k, v in data.items() if k not in SHOT_COLUMNS}
    return {
        "run_id": shot.run_id,
        "part": shot.part,
        "lot": shot.lot,
        "serial": shot.serial,
        "point_index": int(shot.point.index),
        "repeat": int(shot.repeat),
        "attempt": int(shot.attempt),
        "timestamp": shot.timestamp,
        "temperature_K": query_float(point.get("temperature_K")),
        "bus_voltage_V": query_float(point.get("bus_voltage_V")),
        "forward_current_A": query_float(point.get("forward_current_A")),
        "point": canonical_json(point),
        "conditions": canonical_json(data["conditions"]),
        "metrics": canonical_json(data["metrics"]),
        "flags": canonical_json(data["flags"]),
        "valid": bool(shot.valid),
        "raw_ref": shot.raw_ref,
        "acquisition": canonical_json(data["acquisition"]),
        "extra": canonical_json(extra),
        "bench_id": bench_id,
    }


def shot_from_row(row: Any) -> ShotResult:
    """A ``shots`` row back as the :class:`ShotResult` it was made from."""
    data: dict[str, Any] = json.loads(row["extra"])
    data.update(
        run_id=row["run_id"],
        part=row["part"],
        lot=row["lot"],
        serial=row["serial"],
        repeat=row["repeat"],
        attempt=row["attempt"],
        timestamp=row["timestamp"],
        point=json.loads(row["point"]),
        conditions=json.loads(row["conditions"]),
        metrics=json.loads(row["metrics"]),
        flags=json.loads(row["flags"]),
        valid=bool(row["valid"]),
        raw_ref=row["raw_ref"],
        acquisition=json.loads(row["acquisition"]),
    )
    return ShotResult.from_dict(data)


def report_record(row: Any) -> ReportRecord:
    """A ``reports`` row as a :class:`ReportRecord`."""
    values = dict(row)
    values["details"] = json.loads(values["details"])
    return ReportRecord(**values)


#: the columns that identify a shot row (unique together)
IDENTITY_COLUMNS = ("run_id", "serial", "point_index", "repeat", "attempt")


def identity(*, pending: bool = False) -> list[Any]:
    """WHERE clauses selecting one shot row, its identity given as the statement parameters
    :func:`identity_params` makes; with ``pending``, only while it is a pending row. Built
    once per statement (the statement is then reused), not once per shot."""
    c = shots_table.c
    clauses = [c[name] == bindparam(f"key_{name}") for name in IDENTITY_COLUMNS]
    if pending:
        clauses.append(c.flags == canonical_json([FLAG_ANALYSIS_PENDING]))
    return clauses


def identity_params(key: tuple[str, str, int, int, int]) -> dict[str, Any]:
    """Statement parameters of :func:`identity` for the shot ``(run_id, serial,
    point_index, repeat, attempt)``."""
    return {f"key_{name}": value for name, value in zip(IDENTITY_COLUMNS, key, strict=True)}


def query_float(value: Any) -> float | None:
    """A target value for the query-only columns (SQLite cannot hold NaN: stored as NULL)."""
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def stored_is(existing: Any, row: dict[str, Any]) -> bool:
    """True when the stored ``shots`` row ``existing`` (a result row, its ``id`` aside)
    holds exactly the values of ``row``."""
    return same_row({k: v for k, v in existing._mapping.items() if k != "id"}, row)


def same_row(stored: dict[str, Any], row: dict[str, Any]) -> bool:
    """True when a stored ``shots`` row holds exactly the values of ``row``."""
    if set(stored) != set(row):
        return False
    for key, value in row.items():
        other = stored[key]
        if key == "valid":
            if bool(other) != bool(value):
                return False
        elif other != value:
            return False
    return True
