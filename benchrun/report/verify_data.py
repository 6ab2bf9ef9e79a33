"""Verification of the data behind a report: the run folder is found and loaded, and the
manifest's hashes (FIPS 180-4 SHA-256) are recomputed over its files and result rows.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.report.manifest import ManifestEntry, check_manifest
from benchrun.report.verify_checks import CHECK_MANIFEST, Check


def find_run_dir(pdf_path: Path, data: Path | None) -> Path | None:
    if data is not None:
        return data
    if (pdf_path.parent / "run.json").is_file():
        return pdf_path.parent
    return None


def load_run_folder(run_dir: Path | None) -> tuple[Any, str | None]:
    if run_dir is None:
        return None, "no run folder: give the raw data with --data RUN_DIR"
    try:
        from benchrun.store.rundata import load_run

        return load_run(run_dir), None
    except BenchrunError as exc:
        return None, f"cannot load the run from {run_dir}: {exc}"


def manifest_check(attachment: dict[str, Any] | None, run: Any, run_dir: Path | None,
                    load_error: str | None) -> Check:
    if attachment is None:
        return Check(CHECK_MANIFEST, False, "the report carries no readable embedded data")
    try:
        entries = [ManifestEntry.from_dict(m) for m in attachment.get("manifest", [])]
    except (KeyError, TypeError, ValueError):
        return Check(CHECK_MANIFEST, False, "the embedded manifest is malformed")
    if not entries:
        return Check(CHECK_MANIFEST, False, "the report lists no manifest")
    if run_dir is None or (run is None and load_error):
        files_only = [e for e in entries if e.kind == "file"]
        checks = check_manifest(files_only, None, run_dir) if run_dir else []
        reason = load_error or "no run data"
        return Check(CHECK_MANIFEST, False, reason,
                     tuple(f"{c.name}: {'yes' if c.ok else 'no'} — {c.reason}" for c in checks))
    checks = check_manifest(entries, run, run_dir)
    bad = [c for c in checks if not c.ok]
    details = tuple(f"{c.name}: {'yes' if c.ok else 'no'} — {c.reason}" for c in checks)
    if bad:
        return Check(CHECK_MANIFEST, False,
                     "; ".join(f"{c.name}: {c.reason}" for c in bad), details)
    return Check(CHECK_MANIFEST, True, f"all {len(checks)} hashes match", details)
