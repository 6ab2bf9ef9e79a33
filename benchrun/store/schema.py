"""Tables of the results database and the records read from them (SQLAlchemy 2.0 Core).

See :mod:`benchrun.store.results` for what each table holds. JSON-valued columns are
``Text`` holding canonical JSON (:func:`canonical_json`), not a JSON column type, so every
backend stores exactly the characters written and floats round-trip bit-exactly.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import (
    Boolean,
    Column,
    Double,
    ForeignKey,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()


# column kinds shared by the tables (every column is NOT NULL unless ``nullable=True``)
def _name(key: str, *args: Any, nullable: bool = False, **kw: Any) -> Column[Any]:
    """Identifiers, part numbers, lots, serials, labels: up to 200 characters."""
    return Column(key, String(200), *args, nullable=nullable, **kw)


def _time(key: str, nullable: bool = False) -> Column[Any]:
    """An ISO 8601 UTC time (:func:`utc_now`)."""
    return Column(key, String(40), nullable=nullable)


def _word(key: str) -> Column[Any]:
    """A state or kind word (status, disposition ...): up to 40 characters."""
    return Column(key, String(40), nullable=False)


def _text(key: str, nullable: bool = False) -> Column[Any]:
    """Unbounded text: canonical JSON (:func:`canonical_json`), paths, messages."""
    return Column(key, Text, nullable=nullable)


def _run_ref() -> Column[Any]:
    """The run a row belongs to (``runs.run_id``), indexed."""
    return _name("run_id", ForeignKey("runs.run_id"), index=True)


runs_table = Table(
    "runs",
    metadata,
    _name("run_id", primary_key=True),
    _name("part"),
    _name("lot"),
    _time("started"),
    _time("finished", nullable=True),
    _word("status"),
    _text("manifest"),
    _name("bench_id", nullable=True, index=True),
)

shots_table = Table(
    "shots",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    _run_ref(),
    _name("part"),
    _name("lot"),
    _name("serial"),
    Column("point_index", Integer, nullable=False),
    Column("repeat", Integer, nullable=False),
    Column("attempt", Integer, nullable=False),
    _time("timestamp"),
    Column("temperature_K", Double, nullable=True),
    Column("bus_voltage_V", Double, nullable=True),
    Column("forward_current_A", Double, nullable=True),
    _text("point"),
    _text("conditions"),
    _text("metrics"),
    _text("flags"),
    Column("valid", Boolean, nullable=False),
    Column("raw_ref", String(400), nullable=False),
    _text("acquisition"),
    _text("extra"),
    _name("bench_id", nullable=True),
    UniqueConstraint("run_id", "serial", "point_index", "repeat", "attempt", name="uq_shot"),
)

reports_table = Table(
    "reports",
    metadata,
    _name("report_id", primary_key=True),
    _run_ref(),
    _text("path"),
    Column("sha256", String(64), nullable=False),
    _time("created"),
    _text("signer"),
    _word("disposition"),
    _text("details"),
)

#: Live state of a run in progress, one row per run, written by the runner's progress
#: reporter (:mod:`benchrun.store.live`) and read by ``benchrun serve``.
live_runs_table = Table(
    "live_runs",
    metadata,
    _name("run_id", primary_key=True),
    _name("bench"),
    _name("part"),
    _name("lot"),
    _word("state"),
    _time("updated"),
    _time("started"),
    _text("status_text"),
    _name("serial", nullable=True),
    Column("temperature_K", Double, nullable=True),
    _name("point_label", nullable=True),
    Column("done", Integer, nullable=False),
    Column("total", Integer, nullable=False),
    Column("eta_s", Double, nullable=True),
    _text("last_shot", nullable=True),
)

#: Retries, invalid shots, safe-state reports and other log lines of a run in progress.
live_events_table = Table(
    "live_events",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    _name("run_id", index=True),
    _time("time"),
    _word("kind"),
    Column("level", String(20), nullable=False),
    _text("message"),
)

#: Columns added after the first release, per table: databases made before them are given the
#: columns by :func:`add_missing_columns` (NULL in existing rows). Additive only: a column is
#: never removed or changed, so an older benchrun still reads and writes a migrated database.
ADDED_COLUMNS: dict[str, tuple[str, ...]] = {
    "runs": ("bench_id",),
    "shots": ("bench_id",),
}


def missing_columns(conn: Any) -> list[tuple[Table, Column[Any]]]:
    """``(table, column)`` of every :data:`ADDED_COLUMNS` entry an existing table lacks
    (tables that do not exist yet are not listed: ``create_all`` makes them whole)."""
    from sqlalchemy import inspect

    inspector = inspect(conn)
    out = []
    for name, columns in ADDED_COLUMNS.items():
        if not inspector.has_table(name):
            continue
        present = {c["name"] for c in inspector.get_columns(name)}
        table = metadata.tables[name]
        out.extend((table, table.c[col]) for col in columns if col not in present)
    return out


def add_missing_columns(engine: Any) -> list[str]:
    """Add the :data:`ADDED_COLUMNS` an existing database lacks (``ALTER TABLE ... ADD
    COLUMN``, nullable, so existing rows keep their values and get NULL). Safe when several
    processes migrate one database at once: a column another process added meanwhile is
    taken as added. Returns ``"table.column"`` of each column added here."""
    from sqlalchemy.exc import SQLAlchemyError

    with engine.connect() as conn:
        todo = missing_columns(conn)
    added = []
    for table, column in todo:
        kind = column.type.compile(dialect=engine.dialect)
        exists = " IF NOT EXISTS" if engine.dialect.name == "postgresql" else ""
        statement = f'ALTER TABLE {table.name} ADD COLUMN{exists} "{column.name}" {kind}'
        try:
            with engine.begin() as conn:
                conn.exec_driver_sql(statement)
            added.append(f"{table.name}.{column.name}")
        except SQLAlchemyError:
            with engine.connect() as conn:  # another process added it meanwhile?
                if any(t is table and c is column for t, c in missing_columns(conn)):
                    raise
    return added


#: ShotResult fields stored in their own column (everything else goes to ``extra``).
SHOT_COLUMNS = (
    "run_id", "part", "lot", "serial", "repeat", "attempt", "timestamp",
    "conditions", "metrics", "flags", "valid", "raw_ref", "acquisition", "point",
)  # fmt: skip


def utc_now() -> str:
    """The current time as an ISO 8601 UTC string."""
    return _dt.datetime.now(_dt.UTC).isoformat()


@dataclass(frozen=True)
class RunRecord:
    """One row of the ``runs`` table."""

    run_id: str
    part: str
    lot: str
    started: str
    finished: str | None
    status: str
    manifest: dict[str, Any] = field(default_factory=dict)
    #: the bench the run ran on (``None`` for runs stored before bench ids were recorded)
    bench_id: str | None = None


@dataclass(frozen=True)
class ReportRecord:
    """One row of the ``reports`` table.

    ``disposition`` is the lot disposition stated in the report (``"accept"``/``"reject"``);
    ``details`` holds anything else worth listing (row digest, signer role ...).
    """

    report_id: str
    run_id: str
    path: str
    sha256: str
    created: str
    signer: str
    disposition: str
    details: dict[str, Any] = field(default_factory=dict)


