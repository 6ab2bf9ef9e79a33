"""``benchrun compact RUN_DIR``: compress the raw record of a finished run.

The record is rewritten with HDF5's standard deflate filter (:mod:`benchrun.store.compact`),
every shot read back and checked against its SHA-256 before the original is replaced, and
the run's manifest (``run.json`` and the database copy) updated with the new file hash.
Refused for a run that is still running, and for a run a report was already made from (its
signed manifest names the file hash of the record as it was): compact before reporting.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from benchrun.errors import StoreError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "compact",
        help="compress the raw record of a finished run (before reporting)",
        description="Rewrites RUN_DIR/raw.h5 compressed (HDF5 deflate, readable by any HDF5 "
        "tool), checks every shot against its SHA-256, replaces the file and records its new "
        "hash in the run's manifest. Only for a finished run that has no report yet.",
    )
    parser.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="run folder")
    parser.set_defaults(func=run)


def compact_run(run_dir: Path) -> Any:
    """Compact the raw record of the finished, not yet reported run in ``run_dir`` and
    record the new file hash; returns the :class:`~benchrun.store.compact.CompactResult`.

    Raises
    ------
    StoreError
        Not a run folder, a run still running or already reported, or the compaction failed
        (the record is then unchanged).
    """
    from benchrun.store.compact import compact_record
    from benchrun.store.results import ResultsStore
    from benchrun.store.rundata import (
        RAW_FILE,
        hash_run_files,
        read_manifest,
        store_url_for,
        write_manifest,
    )

    manifest = read_manifest(run_dir)
    run_id = manifest.get("run_id")
    if manifest.get("status") in (None, "running"):
        raise StoreError(f"run {run_id} is not finished (status {manifest.get('status')!r}): "
                         "a record is compacted after its run, never during it (resume or "
                         "finish the run first)")
    if not (run_dir / RAW_FILE).is_file():
        raise StoreError(f"{run_dir} has no {RAW_FILE}")
    url = store_url_for(run_dir, manifest)
    with ResultsStore(url) as store:
        if store.reports(run_id) or any(run_dir.glob("*.pdf")):
            raise StoreError(f"run {run_id} already has a report, whose signed manifest names "
                             f"the hash of {RAW_FILE} as it is: compacting would make that "
                             "report fail verification (compact before reporting)")
        result = compact_record(run_dir / RAW_FILE)
        manifest["files"] = hash_run_files(run_dir)
        manifest["compacted"] = {"bytes_before": result.bytes_before,
                                 "bytes_after": result.bytes_after}
        write_manifest(run_dir, manifest)
        store.update_run(run_id, manifest=manifest)
    return result


def run(args: argparse.Namespace) -> int:
    result = compact_run(args.run_dir)
    print(f"{args.run_dir}: {result.shots} shots, {result.bytes_before / 1e6:.2f} MB → "
          f"{result.bytes_after / 1e6:.2f} MB ({result.ratio:.1f}x smaller) in "
          f"{result.seconds:.2f} s; every shot matches its SHA-256")
    return 0
