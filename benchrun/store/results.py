"""The results database: runs, analysed shots and issued reports, through SQLAlchemy 2.0 Core.

A SQLite file is the default (``sqlite:///<run_dir>/results.db``); a PostgreSQL URL
(``postgresql+psycopg://user@host/db``) lets several benches share one store. Three tables:

``runs``
    one row per run: ``run_id`` (key), ``part``, ``lot``, ``started``, ``finished``,
    ``status``, ``manifest`` (JSON text), ``bench_id`` (the bench it ran on).
``shots``
    one row per shot: analysed, or *pending* (recorded before its analysis finished, flag
    ``analysis_pending``; :meth:`ResultsStore.complete_shot` replaces it by the analysed
    shot); unique on ``(run_id, serial, point_index, repeat, attempt)`` so a
    resumed run can never store a shot twice. Dict-valued fields of
    :class:`~benchrun.records.ShotResult` are JSON text (floats written with ``repr``, so they
    round-trip bit-exactly on every backend); the target columns ``temperature_K``,
    ``bus_voltage_V``, ``forward_current_A`` are copies of the point for SQL queries;
    ``bench_id`` names the bench that fired the shot.
``reports``
    one row per issued report: ``report_id`` (key), ``run_id``, ``path``, ``sha256``,
    ``created``, ``signer``, ``disposition``, ``details`` (JSON text).

Every write is its own transaction, committed before the method returns. SQLite runs in WAL
mode; with ``durability="power-loss"`` (the default) ``synchronous=FULL``, so a committed
shot survives a crash or power loss; with ``durability="process"`` ``synchronous=NORMAL``,
which in WAL mode skips the sync at each commit: a committed shot survives the *process*
being killed but may roll back after a power loss or operating-system crash, and the
database stays consistent either way (SQLite documentation, "Write-Ahead Logging" and
"PRAGMA synchronous": "transactions are durable across application crashes regardless of
the synchronous setting or journal mode"). A PostgreSQL server keeps its own durability
settings in both modes (a commit is acknowledged by the server, so killing the bench process
loses nothing). Every SQLAlchemy error is translated to :class:`~benchrun.errors.StoreError`.

Schema changes are additive: a column added after the first release
(:data:`~benchrun.store.schema.ADDED_COLUMNS`, so far ``bench_id``) is added to an existing
database when a store opens it, NULL in the rows already there.

Times are ISO 8601 UTC strings; they sort chronologically as text on every backend.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import fields
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, delete, event, insert, select, update
from sqlalchemy.engine import Connection, Engine, make_url
from sqlalchemy.exc import (
    ArgumentError,
    IntegrityError,
    InterfaceError,
    NoSuchModuleError,
    OperationalError,
    SQLAlchemyError,
)

from benchrun.errors import StoreError, StoreUnavailable
from benchrun.records import ShotResult
from benchrun.store.canonical import canonical_json
from benchrun.store.raw import DURABILITY_POWER_LOSS, check_durability
from benchrun.store.rows import (
    identity,
    identity_params,
    report_record,
    run_record,
    shot_from_row,
    shot_row,
    stored_is,
)
from benchrun.store.schema import (
    ADDED_COLUMNS,
    ReportRecord,
    RunRecord,
    add_missing_columns,
    metadata,
    reports_table,
    runs_table,
    shots_table,
    utc_now,
)


def normalize_url(url: str) -> str:
    """Complete a database URL: a bare ``postgresql://`` gets the psycopg 3 driver.

    A plain file path (no ``://``) is taken as a SQLite file.
    """
    if "://" not in url:
        return f"sqlite:///{Path(url).resolve()}"
    for prefix in ("postgresql://", "postgres://"):
        if url.startswith(prefix):
            return "postgresql+psycopg://" + url[len(prefix) :]
    return url


def db_error_text(exc: BaseException) -> str:
    """One line for the user from a database error: the driver's message without
    SQLAlchemy's statement echo and "Background on this error" link."""
    orig = getattr(exc, "orig", None)
    text = str(orig if orig is not None else exc)
    text = re.sub(r"\s*\(Background on this error at: [^)]*\)", "", text)
    lines = [line.strip() for line in text.splitlines() if line.strip()]
    lines = [line for line in lines if not line.startswith(("[SQL:", "[parameters:"))]
    return " ".join(lines) or exc.__class__.__name__


def _sqlite_pragmas(durability: str) -> Any:
    """A connect hook setting WAL mode and the sync level of ``durability``."""
    synchronous = "FULL" if durability == DURABILITY_POWER_LOSS else "NORMAL"

    def set_pragmas(dbapi_connection: Any, _record: Any) -> None:
        cursor = dbapi_connection.cursor()
        try:
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute(f"PRAGMA synchronous={synchronous}")
            cursor.execute("PRAGMA foreign_keys=ON")
            cursor.execute("PRAGMA busy_timeout=10000")
        finally:
            cursor.close()

    return set_pragmas


#: Key of the PostgreSQL advisory lock that serialises creating the tables of a new store.
SCHEMA_LOCK_KEY = 0x62656E6368  # "bench"


def _create_tables(engine: Engine) -> None:
    """Create the tables that do not exist yet. On PostgreSQL under a transaction-level
    advisory lock: two benches preparing a new shared store at the same moment would both
    find a table missing and both create it, and the second ``CREATE TABLE`` fails
    ("relation already exists"); with the lock the second waits, then finds the tables."""
    with engine.begin() as conn:
        if engine.dialect.name == "postgresql":
            conn.exec_driver_sql(f"SELECT pg_advisory_xact_lock({SCHEMA_LOCK_KEY})")
        metadata.create_all(conn)


class ResultsStore:
    """Runs, shots and reports in a SQL database.

    Parameters
    ----------
    url
        SQLAlchemy URL: ``sqlite:///path/results.db`` (default kind), or
        ``postgresql+psycopg://user@host:port/db``. A bare ``postgresql://`` URL is given the
        psycopg 3 driver; a plain path is a SQLite file. Keep passwords out of URLs that are
        written to ``run.json``: libpq reads ``PGPASSWORD`` and ``~/.pgpass``.
    create
        Create missing tables (default). The SQLite file's folder must exist.
    durability
        ``"power-loss"`` (default) or ``"process"``: how far a committed write must have gone
        before a method returns (see the module docstring; only SQLite is affected).
    bench_id
        The bench this store writes for: recorded with every shot row it writes (``None``
        for stores that only read).

    Raises
    ------
    StoreError
        Bad URL, missing driver, unreachable server or any database error.
    """

    def __init__(self, url: str, *, create: bool = True,
                 durability: str = DURABILITY_POWER_LOSS,
                 bench_id: str | None = None) -> None:
        self.url = normalize_url(str(url))
        self.bench_id = bench_id
        self.durability = check_durability(durability)
        try:
            parsed = make_url(self.url)
        except ArgumentError as exc:
            raise StoreError(f"not a database URL: {url!r} ({exc})") from exc
        self.backend = parsed.get_backend_name()
        if self.backend == "sqlite" and parsed.database and parsed.database != ":memory:":
            folder = Path(parsed.database).parent
            if not folder.is_dir():
                raise StoreError(f"cannot open results database {parsed.database}: "
                                 f"folder {folder} is missing")
        #: The URL without its password, fit to be written into a manifest.
        self.public_url = parsed._replace(password=None).render_as_string(hide_password=False)
        try:
            engine: Engine = create_engine(self.url, pool_pre_ping=self.backend != "sqlite")
        except (ArgumentError, NoSuchModuleError, ImportError) as exc:
            hint = ""
            if isinstance(exc, ImportError) and self.backend == "postgresql":
                hint = (" (pip install 'benchrun[postgres]' installs psycopg 3, used by "
                        "postgresql:// and postgresql+psycopg:// URLs)")
            raise StoreError(f"cannot use database URL {self.public_url}: {exc}{hint}") from exc
        if self.backend == "sqlite":
            event.listen(engine, "connect", _sqlite_pragmas(self.durability))
        self._engine = engine
        #: the columns of ADDED_COLUMNS are known to exist (checked at the first connection)
        self._migrated = False
        # statements built once and reused for every shot (the identity as parameters)
        self._insert_shot = insert(shots_table)
        self._select_shot = select(shots_table).where(*identity())
        self._update_pending = update(shots_table).where(*identity(pending=True))
        self._delete_pending = delete(shots_table).where(*identity(pending=True))
        if create:
            with self._errors(f"cannot prepare the results tables in {self.public_url}"):
                _create_tables(engine)
                add_missing_columns(engine)
                self._migrated = True

    # -- plumbing ------------------------------------------------------------------------
    @contextmanager
    def _errors(self, what: str) -> Iterator[None]:
        try:
            yield
        except StoreError:
            raise
        except SQLAlchemyError as exc:
            raise self._translate(what, exc) from exc

    def _translate(self, what: str, exc: SQLAlchemyError) -> StoreError:
        """The :class:`StoreError` of a database error; :class:`StoreUnavailable` when a
        database server cannot be reached (connection refused, dropped or reset)."""
        text = f"{what}: {db_error_text(exc)}"
        if self.unreachable(exc):
            return StoreUnavailable(f"{what}: the database server at {self.public_url} cannot "
                                    f"be reached ({db_error_text(exc)})")
        return StoreError(text)

    def unreachable(self, exc: BaseException) -> bool:
        """True when ``exc`` means the database server cannot be reached (a server backend
        only: a SQLite file is never "unreachable" in this sense)."""
        if self.backend == "sqlite":
            return False
        if isinstance(exc, StoreUnavailable):
            return True
        if isinstance(exc, OperationalError | InterfaceError):
            return True
        return bool(getattr(exc, "connection_invalidated", False))

    def _connect(self) -> Any:
        """``engine.begin()``, after adding the columns an older database lacks (once)."""
        if not self._migrated:
            add_missing_columns(self._engine)
            self._migrated = True
        return self._engine.begin()

    @contextmanager
    def _begin(self, what: str) -> Iterator[Connection]:
        with self._errors(what), self._connect() as conn:
            yield conn

    def close(self) -> None:
        """Release every pooled connection."""
        self._engine.dispose()

    def __enter__(self) -> ResultsStore:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"ResultsStore({self.public_url!r})"

    # -- runs ----------------------------------------------------------------------------
    def create_run(
        self,
        run_id: str,
        part: str,
        lot: str,
        manifest: dict[str, Any] | None = None,
        *,
        started: str | None = None,
        status: str = "running",
        bench_id: str | None = None,
    ) -> RunRecord:
        """Insert a new run (taken on bench ``bench_id``, default the store's); an existing
        ``run_id`` is an error (use :meth:`get_run` to resume)."""
        bench_id = bench_id if bench_id is not None else self.bench_id
        record = RunRecord(
            run_id=run_id,
            part=part,
            lot=lot,
            started=started or utc_now(),
            finished=None,
            status=status,
            manifest=dict(manifest or {}),
            bench_id=bench_id,
        )
        values = {
            "run_id": run_id, "part": part, "lot": lot, "started": record.started,
            "finished": None, "status": status, "manifest": canonical_json(record.manifest),
            "bench_id": bench_id,
        }  # fmt: skip
        try:
            with self._connect() as conn:
                conn.execute(insert(runs_table).values(**values))
        except IntegrityError as exc:
            raise StoreError(f"run {run_id!r} already exists in {self.public_url}") from exc
        except SQLAlchemyError as exc:
            raise self._translate(f"cannot create run {run_id!r}", exc) from exc
        return record

    def get_run(self, run_id: str) -> RunRecord | None:
        """The run's row, or ``None`` when there is no such run."""
        with self._begin(f"cannot read run {run_id!r}") as conn:
            row = conn.execute(select(runs_table).where(runs_table.c.run_id == run_id)).first()
        return None if row is None else run_record(row._mapping)

    def update_run(
        self,
        run_id: str,
        *,
        status: str | None = None,
        finished: str | None = None,
        manifest: dict[str, Any] | None = None,
    ) -> RunRecord:
        """Change a run's status, end time and/or manifest; returns the updated row."""
        values: dict[str, Any] = {}
        if status is not None:
            values["status"] = status
        if finished is not None:
            values["finished"] = finished
        if manifest is not None:
            values["manifest"] = canonical_json(manifest)
        with self._begin(f"cannot update run {run_id!r}") as conn:
            if values:
                result = conn.execute(
                    update(runs_table).where(runs_table.c.run_id == run_id).values(**values)
                )
                if result.rowcount == 0:
                    raise StoreError(f"no run {run_id!r} in {self.public_url}")
        record = self.get_run(run_id)
        if record is None:
            raise StoreError(f"no run {run_id!r} in {self.public_url}")
        return record

    def runs(self, *, lot: str | None = None, part: str | None = None) -> list[RunRecord]:
        """Every run (of one lot and/or part, when given), oldest first."""
        query = select(runs_table).order_by(runs_table.c.started, runs_table.c.run_id)
        if lot is not None:
            query = query.where(runs_table.c.lot == lot)
        if part is not None:
            query = query.where(runs_table.c.part == part)
        with self._begin("cannot list runs") as conn:
            rows = conn.execute(query).all()
        return [run_record(r._mapping) for r in rows]

    # -- shots ---------------------------------------------------------------------------
    def _stored_row(self, conn: Connection, key: tuple[str, str, int, int, int]) -> Any:
        return conn.execute(self._select_shot, identity_params(key)).first()

    def add_shot(self, shot: ShotResult) -> bool:
        """Store one shot in its own transaction, committed before returning.

        Idempotent: storing the identical shot again does nothing.

        Returns
        -------
        bool
            True when the row was inserted, False when the identical row was already there.

        Raises
        ------
        StoreError
            The run does not exist, a *different* shot is already stored under the same
            ``(run_id, serial, point_index, repeat, attempt)``, or a database error.
        """
        row = shot_row(shot, self.bench_id)
        key = (row["run_id"], row["serial"], row["point_index"], row["repeat"], row["attempt"])
        try:
            with self._connect() as conn:
                conn.execute(self._insert_shot, row)
            return True
        except IntegrityError as exc:
            with self._begin("cannot check an existing shot") as conn:
                existing = self._stored_row(conn, key)
                run_exists = conn.execute(
                    select(runs_table.c.run_id).where(runs_table.c.run_id == shot.run_id)
                ).first()
            if existing is None:
                if run_exists is None:
                    raise StoreError(
                        f"run {shot.run_id!r} is not in {self.public_url}; create_run first"
                    ) from exc
                raise StoreError(f"cannot store shot {key}: {exc}") from exc
            if stored_is(existing, row):
                return False
            raise StoreError(
                f"a different shot is already stored for run {key[0]!r}, serial {key[1]!r}, "
                f"point {key[2]}, repeat {key[3]}, attempt {key[4]}"
            ) from exc
        except SQLAlchemyError as exc:
            raise self._translate(f"cannot store shot {key}", exc) from exc

    def complete_shot(self, shot: ShotResult) -> bool:
        """Replace the *pending* row of ``shot``'s identity (stored by :meth:`add_shot` with
        the single flag :data:`~benchrun.records.FLAG_ANALYSIS_PENDING` before the shot was
        analysed) by the analysed ``shot``, in one committed transaction.

        Idempotent: completing with the identical analysed shot again does nothing.

        Returns
        -------
        bool
            True when the pending row was replaced, False when the identical row was already
            there.

        Raises
        ------
        StoreError
            No row of that identity, a *different* analysed shot already stored under it,
            ``shot`` itself still pending, or a database error.
        """
        if shot.pending:
            raise StoreError("complete_shot needs an analysed shot, not a pending one")
        row = shot_row(shot, self.bench_id)
        key = (row["run_id"], row["serial"], row["point_index"], row["repeat"], row["attempt"])
        with self._begin(f"cannot complete shot {key}") as conn:
            replaced = conn.execute(self._update_pending,
                                    {**row, **identity_params(key)}).rowcount
            existing = None if replaced else self._stored_row(conn, key)
        if replaced:
            return True
        if existing is None:
            raise StoreError(f"cannot complete shot {key}: it is not stored")
        if stored_is(existing, row):
            return False
        raise StoreError(
            f"cannot complete shot {key}: a different analysed shot is already stored for run "
            f"{key[0]!r}, serial {key[1]!r}, point {key[2]}, repeat {key[3]}, attempt {key[4]}"
        )

    def record_pending(self, shot: ShotResult) -> None:
        """Store a *pending* row (``shot.pending``), replacing a pending row of the same
        identity (a shot fired again after an instrument fault), in one committed
        transaction.

        Raises
        ------
        StoreError
            ``shot`` is not pending, an analysed shot is stored under its identity, the run
            does not exist, or a database error.
        """
        if not shot.pending:
            raise StoreError("record_pending needs a pending shot")
        row = shot_row(shot, self.bench_id)
        key = (row["run_id"], row["serial"], row["point_index"], row["repeat"], row["attempt"])
        try:
            with self._connect() as conn:
                conn.execute(self._delete_pending, identity_params(key))
                conn.execute(self._insert_shot, row)
        except IntegrityError as exc:
            raise StoreError(f"cannot record pending shot {key}: an analysed shot is stored "
                             f"under it, or run {key[0]!r} does not exist") from exc
        except SQLAlchemyError as exc:
            raise self._translate(f"cannot record pending shot {key}", exc) from exc

    def discard_pending_shot(self, shot: ShotResult) -> bool:
        """Delete the *pending* row of ``shot``'s identity (a shot recorded while its raw
        entry was being written, which a crash kept from ever becoming visible). Returns
        whether a row was deleted; an analysed row is never touched."""
        key = (shot.run_id, shot.serial, int(shot.point.index), int(shot.repeat),
               int(shot.attempt))
        with self._begin(f"cannot discard pending shot {key}") as conn:
            deleted = conn.execute(self._delete_pending, identity_params(key)).rowcount
        return bool(deleted)

    def shots(self, run_id: str) -> list[ShotResult]:
        """Every shot of a run, in the order they were stored."""
        with self._begin(f"cannot read the shots of run {run_id!r}") as conn:
            rows = conn.execute(
                select(shots_table)
                .where(shots_table.c.run_id == run_id)
                .order_by(shots_table.c.id)
            ).all()
        try:
            return [shot_from_row(r._mapping) for r in rows]
        except (ValueError, TypeError, KeyError) as exc:
            raise StoreError(f"a stored shot of run {run_id!r} cannot be decoded: {exc}") from exc

    def tested_keys(
        self, run_id: str, *, max_attempts: int | None = None
    ) -> set[tuple[str, int, int]]:
        """``(serial, point_index, repeat)`` of every test that needs no further shot.

        Parameters
        ----------
        max_attempts
            ``None``: any stored shot completes its test. Otherwise a test is complete when
            one of its shots is valid or ``max_attempts`` shots were stored (so a resumed run
            still fires the retry of an invalid shot interrupted by a crash).
        """
        c = shots_table.c
        with self._begin(f"cannot read the shots of run {run_id!r}") as conn:
            rows = conn.execute(
                select(c.serial, c.point_index, c.repeat, c.attempt, c.valid).where(
                    c.run_id == run_id
                )
            ).all()
        attempts: dict[tuple[str, int, int], list[bool]] = {}
        for serial, point_index, repeat, _attempt, valid in rows:
            attempts.setdefault((serial, point_index, repeat), []).append(bool(valid))
        if max_attempts is None:
            return set(attempts)
        return {k for k, v in attempts.items() if any(v) or len(v) >= max_attempts}

    def next_attempts(self, run_id: str) -> dict[tuple[str, int, int], int]:
        """``{(serial, point_index, repeat): next attempt number}`` of every test of a run
        with a stored shot (one query; a test not listed starts at attempt 0)."""
        c = shots_table.c
        with self._begin(f"cannot read the shots of run {run_id!r}") as conn:
            rows = conn.execute(
                select(c.serial, c.point_index, c.repeat, c.attempt).where(c.run_id == run_id)
            ).all()
        out: dict[tuple[str, int, int], int] = {}
        for serial, point_index, repeat, attempt in rows:
            key = (serial, int(point_index), int(repeat))
            out[key] = max(out.get(key, 0), int(attempt) + 1)
        return out

    def next_attempt(self, run_id: str, serial: str, point_index: int, repeat: int) -> int:
        """The attempt number for the next shot of this test (0 when none is stored)."""
        c = shots_table.c
        with self._begin(f"cannot read the shots of run {run_id!r}") as conn:
            done = conn.execute(
                select(c.attempt).where(
                    c.run_id == run_id,
                    c.serial == serial,
                    c.point_index == point_index,
                    c.repeat == repeat,
                )
            ).all()
        return max((a for (a,) in done), default=-1) + 1

    def row_digest(self, run_id: str) -> str:
        """SHA-256 (hex) over every stored column of every shot row of a run.

        Each row (all columns but the surrogate ``id``) becomes a JSON object with sorted
        keys; rows are sorted by ``(serial, point_index, repeat, attempt)`` and the list is
        hashed as canonical JSON. Any edit to any stored value of the run's shots (including
        the query-only target columns) changes the digest. The digest does not depend on the
        backend: the same rows give the same digest in SQLite and PostgreSQL. A column added
        later (:data:`~benchrun.store.schema.ADDED_COLUMNS`) enters a row only when it holds
        a value, so the digest of rows stored before the column existed does not change.
        """
        with self._begin(f"cannot read the shots of run {run_id!r}") as conn:
            rows = conn.execute(
                select(shots_table).where(shots_table.c.run_id == run_id)
            ).all()
        canon = []
        for r in rows:
            m = {k: v for k, v in r._mapping.items()
                 if k != "id" and not (v is None and k in ADDED_COLUMNS["shots"])}
            m["valid"] = bool(m["valid"])
            canon.append(m)
        canon.sort(key=lambda m: (m["serial"], m["point_index"], m["repeat"], m["attempt"]))
        payload = {"run_id": run_id, "shots": canon}
        return hashlib.sha256(canonical_json(payload).encode()).hexdigest()

    # -- reports -------------------------------------------------------------------------
    def add_report(
        self,
        report_id: str,
        run_id: str,
        path: str,
        sha256: str,
        *,
        signer: str,
        disposition: str,
        created: str | None = None,
        details: dict[str, Any] | None = None,
    ) -> ReportRecord:
        """Register an issued report; an existing ``report_id`` is an error."""
        record = ReportRecord(
            report_id=report_id,
            run_id=run_id,
            path=str(path),
            sha256=sha256,
            created=created or utc_now(),
            signer=signer,
            disposition=disposition,
            details=dict(details or {}),
        )
        values = {f.name: getattr(record, f.name) for f in fields(record)}
        values["details"] = canonical_json(record.details)
        try:
            with self._connect() as conn:
                conn.execute(insert(reports_table).values(**values))
        except IntegrityError as exc:
            raise StoreError(
                f"cannot register report {report_id!r}: the id is already used or run "
                f"{run_id!r} is not in {self.public_url}"
            ) from exc
        except SQLAlchemyError as exc:
            raise self._translate(f"cannot register report {report_id!r}", exc) from exc
        return record

    def reports(self, run_id: str | None = None) -> list[ReportRecord]:
        """Every registered report (of one run, when given), oldest first."""
        query = select(reports_table).order_by(
            reports_table.c.created, reports_table.c.report_id
        )
        if run_id is not None:
            query = query.where(reports_table.c.run_id == run_id)
        with self._begin("cannot list reports") as conn:
            rows = conn.execute(query).all()
        return [report_record(r._mapping) for r in rows]

    def report(self, report_id: str) -> ReportRecord | None:
        """One report's row, or ``None`` when there is no such report."""
        with self._begin(f"cannot read report {report_id!r}") as conn:
            row = conn.execute(
                select(reports_table).where(reports_table.c.report_id == report_id)
            ).first()
        return None if row is None else report_record(row._mapping)



__all__ = [
    "ReportRecord",
    "ResultsStore",
    "RunRecord",
    "canonical_json",
    "metadata",
    "normalize_url",
    "utc_now",
]
