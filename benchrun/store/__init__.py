"""benchrun.store: the raw HDF5 record, the results database and loading stored runs.

- :mod:`benchrun.store.raw`: :class:`RawRecord` (one HDF5 file per run, flushed per shot).
- :mod:`benchrun.store.results`: :class:`ResultsStore` (SQLite or PostgreSQL via SQLAlchemy).
- :mod:`benchrun.store.rundata`: :func:`load_run`, :class:`RunData`, :func:`write_manifest`.
"""

from benchrun.store.raw import RawRecord, RawShot, file_sha256, shot_digest
from benchrun.store.results import ReportRecord, ResultsStore, RunRecord, canonical_json
from benchrun.store.rundata import (
    BENCH_FILE,
    HASHED_FILES,
    LIMITS_FILE,
    LOG_FILE,
    RAW_FILE,
    REPORT_FILE,
    RESULTS_DB,
    RUN_MANIFEST,
    SEQUENCE_FILE,
    RunData,
    default_store_url,
    hash_run_files,
    load_run,
    read_manifest,
    store_url_for,
    write_manifest,
)

__all__ = [
    "BENCH_FILE",
    "HASHED_FILES",
    "LIMITS_FILE",
    "LOG_FILE",
    "RAW_FILE",
    "REPORT_FILE",
    "RESULTS_DB",
    "RUN_MANIFEST",
    "SEQUENCE_FILE",
    "RawRecord",
    "RawShot",
    "ReportRecord",
    "ResultsStore",
    "RunData",
    "RunRecord",
    "canonical_json",
    "default_store_url",
    "file_sha256",
    "hash_run_files",
    "load_run",
    "read_manifest",
    "shot_digest",
    "store_url_for",
    "write_manifest",
]
