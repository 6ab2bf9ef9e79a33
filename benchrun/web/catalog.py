"""What the web application reads: the lots (runs) of one or more results stores, read-only.

RESULTS is a run folder, a folder holding run folders (searched three levels deep, as
``benchrun demo --out DIR`` lays them out), a SQLite file or a database URL. Each distinct
results database is opened once, read-only: SQLite through ``mode=ro``, PostgreSQL with
``default_transaction_read_only``, so nothing on these pages can change the store.
"""

from __future__ import annotations

import json
import os
import re
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, func, select
from sqlalchemy.engine import Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError, NoSuchModuleError, SQLAlchemyError

from benchrun.errors import StoreError
from benchrun.records import ShotResult, TestPoint
from benchrun.store.results import normalize_url
from benchrun.store.rows import report_record, shot_from_row
from benchrun.store.rundata import (
    BENCH_FILE,
    LIMITS_FILE,
    RAW_FILE,
    RUN_MANIFEST,
    read_manifest,
    store_url_for,
)
from benchrun.store.schema import ReportRecord, reports_table, runs_table, shots_table

#: Run identifiers, shot keys and part names accepted in a URL (anything else is a 404).
SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._+-]{0,199}$")
#: How deep below RESULTS run folders are looked for.
SCAN_DEPTH = 3
#: Seconds between two scans of a folder of runs for new run folders.
RESCAN_S = 5.0


def safe_name(text: str) -> bool:
    """True when ``text`` may name a run, a part or a shot (no path separators, no dots
    first, no control characters)."""
    return bool(SAFE_NAME.match(text)) and ".." not in text


def read_only_engine(url: str) -> Engine:
    """A SQLAlchemy engine that can only read ``url``."""
    url = normalize_url(url)
    try:
        parsed = make_url(url)
    except ArgumentError as exc:
        raise StoreError(f"not a database URL: {url!r}") from exc
    backend = parsed.get_backend_name()
    try:
        if backend == "sqlite":
            db = parsed.database or ""
            if not Path(db).is_file():
                raise StoreError(f"results database {db} does not exist")
            return create_engine(f"sqlite:///file:{Path(db).resolve()}?mode=ro&uri=true",
                                 connect_args={"timeout": 10})
        if backend == "postgresql":
            return create_engine(url, pool_pre_ping=True, connect_args={
                "options": "-c default_transaction_read_only=on"})
        return create_engine(url)
    except (ArgumentError, NoSuchModuleError, ImportError) as exc:
        raise StoreError(f"cannot open {parsed.render_as_string(hide_password=True)}: "
                         f"{exc}") from exc


@dataclass
class Store:
    """One results database, opened read-only."""

    url: str
    engine: Engine
    folders: dict[str, Path] = field(default_factory=dict)  # run_id → run folder found

    @property
    def public_url(self) -> str:
        return make_url(self.url).render_as_string(hide_password=True)

    @contextmanager
    def connect(self) -> Iterator[Connection]:
        try:
            with self.engine.connect() as conn:
                yield conn
        except SQLAlchemyError as exc:
            raise StoreError(f"cannot read {self.public_url}: "
                             f"{str(exc).splitlines()[0]}") from exc


@dataclass(frozen=True)
class LotRow:
    """One line of the lots page."""

    run_id: str
    part: str
    lot: str
    started: str
    finished: str | None
    status: str
    report_id: str | None
    disposition: str | None
    signer: str | None
    store: Store = field(repr=False, compare=False)


@dataclass(frozen=True)
class Lot:
    """One lot with what its page needs."""

    row: LotRow
    manifest: dict[str, Any]
    run_dir: Path | None
    report: ReportRecord | None

    @property
    def bench(self) -> str:
        return str(self.manifest.get("bench_name") or "—")

    @property
    def limits_path(self) -> Path | None:
        if self.run_dir is None or not (self.run_dir / LIMITS_FILE).is_file():
            return None
        return self.run_dir / LIMITS_FILE

    @property
    def bench_path(self) -> Path | None:
        """The run folder's ``bench.yaml`` (as ``RunData.bench_path``), or ``None``."""
        if self.run_dir is None or not (self.run_dir / BENCH_FILE).is_file():
            return None
        return self.run_dir / BENCH_FILE

    @property
    def raw_path(self) -> Path | None:
        if self.run_dir is None or not (self.run_dir / RAW_FILE).is_file():
            return None
        return self.run_dir / RAW_FILE


def _find_run_folders(root: Path, depth: int = SCAN_DEPTH) -> list[Path]:
    found: list[Path] = []

    def walk(folder: Path, level: int) -> None:
        if (folder / RUN_MANIFEST).is_file():
            found.append(folder)
            return
        if level >= depth:
            return
        try:
            children = sorted(p for p in folder.iterdir()
                              if p.is_dir() and not p.name.startswith("."))
        except OSError:
            return
        for child in children:
            walk(child, level + 1)

    walk(root, 0)
    return found


class Catalog:
    """Every results store under RESULTS, opened read-only, with the lots they hold.

    Parameters
    ----------
    source
        A run folder, a folder of run folders, a SQLite file or a database URL.
    """

    def __init__(self, source: str | os.PathLike[str]) -> None:
        self.source = os.fspath(source)
        self.root: Path | None = None
        self._stores: dict[str, Store] = {}
        self._lock = threading.Lock()
        self._scanned = 0.0
        text = self.source
        if "://" in text:
            self._add(normalize_url(text), None, None)
        else:
            path = Path(text)
            if path.is_dir():
                self.root = path.resolve()
                self._scan()
                if not self._stores:
                    raise StoreError(f"{path} holds no run folder (no {RUN_MANIFEST} found "
                                     f"within {SCAN_DEPTH} levels)")
            elif path.is_file():
                self.root = path.resolve().parent
                self._add(normalize_url(str(path)), None, None)
            else:
                raise StoreError(f"{text} is neither a run folder, a folder of runs, a "
                                 "results database nor a database URL")

    # -- stores --------------------------------------------------------------------------
    def _add(self, url: str, run_id: str | None, folder: Path | None) -> None:
        store = self._stores.get(url)
        if store is None:
            store = Store(url, read_only_engine(url))
            self._stores[url] = store
        if run_id and folder is not None:
            store.folders[run_id] = folder

    def _scan(self) -> None:
        if self.root is None:
            return
        for folder in _find_run_folders(self.root):
            try:
                manifest = read_manifest(folder)
                url = store_url_for(folder, manifest)
                self._add(url, str(manifest.get("run_id") or ""), folder.resolve())
            except StoreError:
                continue  # a half-written or foreign folder: skipped
        self._scanned = time.monotonic()

    def refresh(self) -> None:
        """Look again for new run folders (at most every :data:`RESCAN_S` seconds)."""
        if self.root is None or "://" in self.source or Path(self.source).is_file():
            return
        with self._lock:
            if time.monotonic() - self._scanned >= RESCAN_S:
                self._scan()

    @property
    def stores(self) -> list[Store]:
        return list(self._stores.values())

    def close(self) -> None:
        for store in self._stores.values():
            store.engine.dispose()

    # -- lots ----------------------------------------------------------------------------
    def lots(self) -> list[LotRow]:
        """Every lot of every store, with its latest report's disposition and signer."""
        self.refresh()
        rows: list[LotRow] = []
        r, rep = runs_table.c, reports_table.c
        latest = (select(rep.run_id, func.max(rep.created).label("created"))
                  .group_by(rep.run_id).subquery())
        query = (select(r.run_id, r.part, r.lot, r.started, r.finished, r.status,
                        rep.report_id, rep.disposition, rep.signer)
                 .select_from(runs_table
                              .outerjoin(latest, latest.c.run_id == r.run_id)
                              .outerjoin(reports_table, (rep.run_id == r.run_id)
                                         & (rep.created == latest.c.created))))
        seen: set[str] = set()
        for store in self.stores:
            with store.connect() as conn:
                for row in conn.execute(query):
                    if row.run_id in seen:
                        continue
                    seen.add(row.run_id)
                    rows.append(LotRow(row.run_id, row.part, row.lot, row.started,
                                       row.finished, row.status, row.report_id,
                                       row.disposition, row.signer, store))
        return rows

    def benches(self, rows: list[LotRow]) -> dict[str, str]:
        """Run id → bench name (from each manifest), one query per store."""
        out: dict[str, str] = {}
        by_store: dict[str, list[LotRow]] = {}
        for row in rows:
            by_store.setdefault(row.store.url, []).append(row)
        r = runs_table.c
        for group in by_store.values():
            ids = [row.run_id for row in group]
            with group[0].store.connect() as conn:
                for run_id, text in conn.execute(select(r.run_id, r.manifest)
                                                 .where(r.run_id.in_(ids))):
                    try:
                        out[run_id] = str(json.loads(text).get("bench_name") or "—")
                    except (ValueError, AttributeError):
                        out[run_id] = "—"
        return out

    def find(self, run_id: str) -> LotRow | None:
        """The lot of run ``run_id``, or ``None`` (also for a name no run can have)."""
        if not safe_name(run_id):
            return None
        r, rep = runs_table.c, reports_table.c
        for store in self.stores:
            with store.connect() as conn:
                row = conn.execute(select(r.run_id, r.part, r.lot, r.started, r.finished,
                                          r.status).where(r.run_id == run_id)).first()
                if row is None:
                    continue
                report = conn.execute(select(rep.report_id, rep.disposition, rep.signer)
                                      .where(rep.run_id == run_id)
                                      .order_by(rep.created.desc())).first()
            return LotRow(row.run_id, row.part, row.lot, row.started, row.finished,
                          row.status, report.report_id if report else None,
                          report.disposition if report else None,
                          report.signer if report else None, store)
        self.refresh()
        return None

    def lot(self, run_id: str) -> Lot | None:
        """A lot with its manifest, run folder and latest report."""
        row = self.find(run_id)
        if row is None:
            return None
        r, rep = runs_table.c, reports_table.c
        with row.store.connect() as conn:
            text = conn.execute(select(r.manifest).where(r.run_id == run_id)).scalar_one()
            report_row = conn.execute(select(reports_table).where(rep.run_id == run_id)
                                      .order_by(rep.created.desc())).mappings().first()
        try:
            manifest = json.loads(text)
        except ValueError:
            manifest = {}
        folder = row.store.folders.get(run_id)
        if folder is None and manifest.get("run_dir"):
            candidate = Path(str(manifest["run_dir"]))
            if candidate.is_dir() and (candidate / RUN_MANIFEST).is_file():
                folder = candidate.resolve()
        report = report_record(report_row) if report_row is not None else None
        return Lot(row, manifest, folder, report)

    def shots(self, lot: LotRow) -> list[ShotResult]:
        """Every analysed shot of a lot, in the order stored (pending rows left out)."""
        s = shots_table.c
        with lot.store.connect() as conn:
            rows = conn.execute(select(shots_table).where(s.run_id == lot.run_id)
                                .order_by(s.id)).mappings().all()
        shots = [shot_from_row(row) for row in rows]
        return [shot for shot in shots if not shot.pending]

    def shot_metrics(self, store: Store, part: str, run_ids: set[str]
                     ) -> Iterator[tuple[str, tuple[str, TestPoint, dict[str, Any], bool]]]:
        """``(run_id, (serial, point, metrics, valid))`` of every shot of ``part`` in
        ``store`` whose run is in ``run_ids``, in one query (for the part history)."""
        s = shots_table.c
        points: dict[str, TestPoint] = {}
        query = select(s.run_id, s.serial, s.point, s.metrics, s.valid).where(s.part == part)
        if len(run_ids) <= 500:
            query = query.where(s.run_id.in_(sorted(run_ids)))
        with store.connect() as conn:
            for run_id, serial, point_text, metrics_text, valid in conn.execute(query):
                if run_id not in run_ids:
                    continue
                point = points.get(point_text)
                if point is None:
                    point = points[point_text] = TestPoint(**json.loads(point_text))
                yield run_id, (serial, point, json.loads(metrics_text) if valid else {},
                               bool(valid))

    def shot_ids(self, lot: LotRow) -> dict[str, int]:
        """Raw reference → row id, for links to each shot's page."""
        s = shots_table.c
        with lot.store.connect() as conn:
            return {ref: sid for sid, ref in conn.execute(
                select(s.id, s.raw_ref).where(s.run_id == lot.run_id))}

    def shot(self, lot: LotRow, shot_id: int) -> ShotResult | None:
        """One shot of a lot by its row id."""
        s = shots_table.c
        with lot.store.connect() as conn:
            row = conn.execute(select(shots_table).where(
                s.run_id == lot.run_id, s.id == shot_id)).mappings().first()
        return None if row is None else shot_from_row(row)

    def shot_count(self, lot: LotRow) -> int:
        s = shots_table.c
        with lot.store.connect() as conn:
            return int(conn.execute(select(func.count()).select_from(shots_table)
                                    .where(s.run_id == lot.run_id)).scalar_one())

    def allowed_file(self, lot: Lot, path: str | os.PathLike[str]) -> Path | None:
        """``path`` resolved, when it lies inside the lot's run folder (or below RESULTS);
        ``None`` otherwise, so a tampered path in the store cannot reach other files."""
        try:
            resolved = Path(path).resolve(strict=True)
        except (OSError, RuntimeError):
            return None
        roots = [p for p in (lot.run_dir, self.root) if p is not None]
        for root in roots:
            if resolved.is_relative_to(root) and resolved.is_file():
                return resolved
        return None
