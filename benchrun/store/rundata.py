"""Run folders and loading a stored run for grading, loss estimation, reports and verification.

A run folder ``<out>/<run_id>/`` holds::

    run.json        manifest (see :func:`write_manifest`)
    sequence.yaml   the sequence file as used
    bench.yaml      the bench file as used
    limits.yaml     the limits file as used
    raw.h5          raw record (:mod:`benchrun.store.raw`)
    results.db      results database (SQLite), unless the manifest names another ``store_url``
    run.log         the run's log
    report.pdf      the signed report

Manifest keys read here: ``run_id`` (required in a run folder) and ``store_url`` (optional;
absent or ``null`` means ``<run_dir>/results.db``; a relative SQLite path is taken relative to
the run folder, so a copied folder stays loadable). Every file of a run is found relative to
the folder it is in now, never by a path recorded when it ran, so a run folder can be moved
or copied. When a run is loaded from a SQLite file inside a run folder of the same run, that
folder is :attr:`RunData.run_dir`; from another database URL, the manifest is the copy kept in
the ``runs`` table, and its ``run_dir`` becomes :attr:`RunData.run_dir` if that folder still
exists and still holds the run.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError

from benchrun.errors import StoreError
from benchrun.records import ShotResult
from benchrun.store.raw import RawRecord, file_sha256
from benchrun.store.results import ResultsStore, RunRecord, normalize_url

RUN_MANIFEST = "run.json"
SEQUENCE_FILE = "sequence.yaml"
BENCH_FILE = "bench.yaml"
LIMITS_FILE = "limits.yaml"
RAW_FILE = "raw.h5"
RESULTS_DB = "results.db"
LOG_FILE = "run.log"
REPORT_FILE = "report.pdf"

#: Files whose SHA-256 a report manifest lists (the database is covered by its row digest).
HASHED_FILES = (RAW_FILE, SEQUENCE_FILE, BENCH_FILE, LIMITS_FILE)


@dataclass(frozen=True)
class RunData:
    """A stored run as the downstream packages see it.

    Attributes
    ----------
    run_id
        The run's identifier.
    manifest
        ``run.json`` of the run folder, or the manifest kept in the database.
    shots
        Every stored, analysed shot, in the order stored.
    run_dir
        The run folder, or ``None`` when loaded from a database without a reachable folder.
    store_url
        Database URL the shots came from (without password).
    run
        The ``runs`` table row (status, start and end), when available.
    pending
        Shots recorded but not analysed yet (``ShotResult.pending``: the run stopped between
        a shot and its analysis; ``benchrun run --resume`` completes them). They are kept out
        of ``shots``, so grading and reports see only analysed shots.
    """

    run_id: str
    manifest: dict[str, Any]
    shots: list[ShotResult]
    run_dir: Path | None
    store_url: str
    run: RunRecord | None = None
    pending: list[ShotResult] = field(default_factory=list)

    def _file(self, name: str) -> Path | None:
        return None if self.run_dir is None else self.run_dir / name

    @property
    def manifest_path(self) -> Path | None:
        """``run.json``, or ``None`` without a run folder."""
        return self._file(RUN_MANIFEST)

    @property
    def raw_path(self) -> Path | None:
        """The raw HDF5 record, or ``None`` without a run folder."""
        return self._file(RAW_FILE)

    @property
    def sequence_path(self) -> Path | None:
        """The sequence file as used, or ``None`` without a run folder."""
        return self._file(SEQUENCE_FILE)

    @property
    def bench_path(self) -> Path | None:
        """The bench file as used, or ``None`` without a run folder."""
        return self._file(BENCH_FILE)

    @property
    def limits_path(self) -> Path | None:
        """The limits file as used, or ``None`` without a run folder."""
        return self._file(LIMITS_FILE)

    @property
    def log_path(self) -> Path | None:
        """The run log, or ``None`` without a run folder."""
        return self._file(LOG_FILE)

    @property
    def report_path(self) -> Path | None:
        """The default report location, or ``None`` without a run folder."""
        return self._file(REPORT_FILE)

    def open_raw(self) -> RawRecord:
        """Open the raw record read-only (use as a context manager).

        Raises
        ------
        StoreError
            No run folder, or the record is missing or damaged.
        """
        if self.raw_path is None:
            raise StoreError(f"run {self.run_id!r} was loaded without its run folder")
        return RawRecord(self.raw_path, "r")

    def open_store(self) -> ResultsStore:
        """Open the results database the run came from (use as a context manager)."""
        return ResultsStore(self.store_url, create=False)


def default_store_url(run_dir: str | os.PathLike[str]) -> str:
    """``sqlite:///<run_dir>/results.db`` with an absolute path."""
    return f"sqlite:///{(Path(run_dir) / RESULTS_DB).resolve()}"


def store_url_for(run_dir: str | os.PathLike[str], manifest: dict[str, Any]) -> str:
    """The results database URL of a run folder, from its manifest (see module docstring)."""
    url = manifest.get("store_url")
    if not url:
        return default_store_url(run_dir)
    url = normalize_url(str(url)) if "://" in str(url) else str(url)
    if "://" not in url:  # a bare path in the manifest: relative to the run folder
        return f"sqlite:///{(Path(run_dir) / url).resolve()}"
    try:
        parsed = make_url(url)
    except ArgumentError as exc:
        raise StoreError(f"{Path(run_dir) / RUN_MANIFEST}: bad store_url {url!r}") from exc
    if parsed.get_backend_name() == "sqlite" and parsed.database:
        db = Path(parsed.database)
        if not db.is_absolute():
            return f"sqlite:///{(Path(run_dir) / db).resolve()}"
    return url


def read_manifest(run_dir: str | os.PathLike[str]) -> dict[str, Any]:
    """Read ``<run_dir>/run.json``.

    Raises
    ------
    StoreError
        Missing, unreadable or not a JSON object.
    """
    path = Path(run_dir) / RUN_MANIFEST
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise StoreError(f"{run_dir} is not a run folder: {RUN_MANIFEST} is missing") from exc
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StoreError(f"cannot read {path}: {exc}") from exc
    if not isinstance(data, dict):
        raise StoreError(f"{path} does not hold a JSON object")
    return data


def write_manifest(run_dir: str | os.PathLike[str], manifest: dict[str, Any]) -> Path:
    """Write ``<run_dir>/run.json`` atomically and durably.

    The JSON goes to a temporary file in the same folder, is ``fsync``-ed, renamed over
    ``run.json`` with ``os.replace`` (atomic on POSIX) and the folder is ``fsync``-ed, so a
    crash leaves either the old or the new manifest, never a half-written one.

    Suggested keys: ``run_id``, ``part``, ``lot``, ``status``, ``started``, ``finished``,
    ``software_version``, ``instruments`` (identities), ``files`` (name → SHA-256, see
    :func:`hash_run_files`), ``store_url`` (omit for the folder's own ``results.db``).

    Returns
    -------
    Path
        The manifest path.
    """
    folder = Path(run_dir)
    path = folder / RUN_MANIFEST
    tmp = folder / f".{RUN_MANIFEST}.{os.getpid()}.tmp"
    try:
        text = json.dumps(manifest, indent=2, sort_keys=True, allow_nan=True) + "\n"
    except (TypeError, ValueError) as exc:
        raise StoreError(f"manifest cannot be written as JSON: {exc}") from exc
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        dir_fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise StoreError(f"cannot write {path}: {exc}") from exc
    return path


def hash_run_files(
    run_dir: str | os.PathLike[str], names: tuple[str, ...] = HASHED_FILES
) -> dict[str, str]:
    """SHA-256 of each named file of a run folder that exists (name → hex digest)."""
    folder = Path(run_dir)
    return {name: file_sha256(folder / name) for name in names if (folder / name).is_file()}


def _folder_beside(db_file: Path, run_id: str) -> Path | None:
    """The run folder that holds ``db_file`` (its own ``results.db``), if its manifest names
    ``run_id``: a moved or copied folder is found where it is now, not where it was made."""
    folder = db_file.resolve().parent
    try:
        manifest = read_manifest(folder)
    except StoreError:
        return None
    return folder if manifest.get("run_id") == run_id else None


def _load_from_store(
    url: str, run_id: str | None, run_dir: Path | None, manifest: dict[str, Any] | None
) -> RunData:
    parsed = make_url(url)
    is_sqlite_file = parsed.get_backend_name() == "sqlite" and bool(parsed.database)
    if is_sqlite_file and not Path(str(parsed.database)).is_file():
        raise StoreError(f"results database {parsed.database} does not exist")
    with ResultsStore(url, create=False) as store:
        if run_id is None:
            runs = store.runs()
            if len(runs) != 1:
                raise StoreError(
                    f"{store.public_url} holds {len(runs)} runs; name the run to load"
                )
            run_id = runs[0].run_id
        record = store.get_run(run_id)
        if record is None:
            raise StoreError(f"no run {run_id!r} in {store.public_url}")
        shots = store.shots(run_id)
        public_url = store.public_url
    if manifest is None:
        manifest = dict(record.manifest)
        beside = _folder_beside(Path(str(parsed.database)), run_id) if is_sqlite_file else None
        folder = manifest.get("run_dir")
        if run_dir is None and beside is not None:
            run_dir = beside
            manifest = read_manifest(beside)
        elif run_dir is None and folder and Path(folder).is_dir() \
                and _folder_beside(Path(folder) / RESULTS_DB, run_id) is not None:
            run_dir = Path(folder)
    return RunData(
        run_id=run_id,
        manifest=manifest,
        shots=[s for s in shots if not s.pending],
        run_dir=run_dir,
        store_url=public_url,
        run=record,
        pending=[s for s in shots if s.pending],
    )


def pending_warning(run: RunData) -> str | None:
    """A line for the user when a run holds shots not analysed yet (None otherwise)."""
    if not run.pending:
        return None
    return (f"warning: {len(run.pending)} shot(s) of run {run.run_id} were recorded but not "
            "analysed (the run stopped between a shot and its analysis) and are left out; "
            "'benchrun run SEQUENCE --bench BENCH --resume' completes them")


def load_run(source: str | os.PathLike[str], run_id: str | None = None) -> RunData:
    """Load a stored run.

    Parameters
    ----------
    source
        A run folder (holding ``run.json``), a SQLite file, or a database URL.
    run_id
        Which run; needed for a database holding more than one run. For a run folder it must
        match the manifest when given.

    Raises
    ------
    StoreError
        Not a run folder or database, unknown run, or a database error.
    """
    text = os.fspath(source)
    if "://" in text:
        return _load_from_store(normalize_url(text), run_id, None, None)
    path = Path(text)
    if path.is_dir():
        manifest = read_manifest(path)
        found = manifest.get("run_id")
        if not found:
            raise StoreError(f"{path / RUN_MANIFEST} does not name its run_id")
        if run_id is not None and run_id != found:
            raise StoreError(f"{path} holds run {found!r}, not {run_id!r}")
        return _load_from_store(store_url_for(path, manifest), found, path.resolve(), manifest)
    if path.is_file():
        return _load_from_store(normalize_url(str(path)), run_id, None, None)
    raise StoreError(f"{source} is neither a run folder, a results database nor a database URL")
