"""SHA-256 manifest of everything a report's numbers rest on.

The manifest lists the run's raw record (``raw.h5``), the sequence, bench and limits files as
used, the run's manifest (``run.json``), one digest over the result rows behind the report and
one over the run's row of the results store's runs table (its copy of the run manifest).
It is printed in the report and embedded in its JSON attachment; :mod:`benchrun.report.
verify_data` recomputes it.

Hashes follow FIPS 180-4 SHA-256 (``hashlib``). The row digest is SHA-256 over canonical JSON
(sorted keys, no whitespace) of the shots' ``ShotResult.to_dict()`` rows, sorted by raw
record key, serial, test point, repeat and attempt: any changed value, added or removed row
changes it.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError

#: Files of a run folder (DEVELOPERS.md, store contract) that a report rests on.
RUN_FILES = ("raw.h5", "sequence.yaml", "bench.yaml", "limits.yaml", "run.json")

#: Name of the row digest method implemented here.
ROW_DIGEST_LOCAL = "shot-rows-canonical-json-sha256/1"
#: Name used when the results store computed the digest itself.
ROW_DIGEST_STORE = "ResultsStore.row_digest"
#: Name of the digest over the run's row of the runs table (implemented here).
RUN_ROW_DIGEST = "runs-row-canonical-json-sha256/1"


@dataclass(frozen=True)
class ManifestEntry:
    """One hashed item: a run file, or the result rows in the database."""

    name: str
    kind: str  # "file" or "rows"
    sha256: str
    size: int | None = None
    method: str = "sha256"

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "kind": self.kind,
            "sha256": self.sha256,
            "size": self.size,
            "method": self.method,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ManifestEntry:
        return cls(
            name=str(data["name"]),
            kind=str(data["kind"]),
            sha256=str(data["sha256"]),
            size=data.get("size"),
            method=str(data.get("method", "sha256")),
        )


@dataclass(frozen=True)
class ManifestCheck:
    """Outcome of re-hashing one manifest entry."""

    name: str
    ok: bool
    reason: str


def file_sha256(path: str | Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def _row_sort_key(row: dict[str, Any]) -> tuple:
    point = row.get("point") or {}
    return (
        str(row.get("raw_ref", "")),
        str(row.get("serial", "")),
        int(point.get("index", 0)),
        float(point.get("temperature_K", 0.0)),
        int(row.get("repeat", 0)),
        int(row.get("attempt", 0)),
    )


def shots_digest(shots: Iterable[Any]) -> str:
    """SHA-256 over the canonical JSON rows of ``ShotResult`` objects (order independent)."""
    rows = sorted((shot.to_dict() for shot in shots), key=_row_sort_key)
    digest = hashlib.sha256()
    for row in rows:
        digest.update(
            json.dumps(row, sort_keys=True, separators=(",", ":"), allow_nan=True).encode()
        )
        digest.update(b"\n")
    return digest.hexdigest()


def row_digest(run: Any) -> tuple[str, str]:
    """Digest of the result rows behind ``run`` and the method used.

    Uses ``ResultsStore.row_digest(run_id)`` (store contract: every stored column of every
    shot row) when the run came from a results store; otherwise :func:`shots_digest` over the
    loaded shots.
    """
    url = getattr(run, "store_url", None)
    if url:
        from benchrun.store.results import ResultsStore

        with ResultsStore(url, create=False) as store:
            return str(store.row_digest(run.run_id)), ROW_DIGEST_STORE
    return shots_digest(run.shots), ROW_DIGEST_LOCAL


def run_row_digest(run: Any) -> str | None:
    """SHA-256 over canonical JSON of the run's row in the runs table (all its columns,
    the run manifest included); ``None`` when the run has no results store."""
    url = getattr(run, "store_url", None)
    if not url:
        return None
    from dataclasses import asdict

    from benchrun.store.results import ResultsStore

    with ResultsStore(url, create=False) as store:
        record = store.get_run(run.run_id)
    if record is None:
        return hashlib.sha256(b"no run row").hexdigest()
    text = json.dumps(asdict(record), sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def code_digest(packages: tuple[str, ...] = ("benchrun.analysis", "benchrun.grading")) -> str:
    """SHA-256 over the source files of the packages that turn raw data into grades.

    Recorded in the report so that a verifier can tell "the data changed" from "the software
    that re-analyses them changed".
    """
    import importlib

    digest = hashlib.sha256()
    for name in packages:
        module = importlib.import_module(name)
        for folder in getattr(module, "__path__", []):
            for path in sorted(Path(folder).rglob("*.py")):
                digest.update(f"{name}/{path.relative_to(folder).as_posix()}\n".encode())
                digest.update(path.read_bytes())
    return digest.hexdigest()


def build_manifest(run: Any) -> list[ManifestEntry]:
    """Hash the run's files (those present) and its result rows."""
    entries: list[ManifestEntry] = []
    run_dir = Path(run.run_dir) if getattr(run, "run_dir", None) else None
    if run_dir is not None:
        for name in RUN_FILES:
            path = run_dir / name
            if path.is_file():
                entries.append(
                    ManifestEntry(name, "file", file_sha256(path), path.stat().st_size)
                )
    digest, method = row_digest(run)
    entries.append(
        ManifestEntry(f"result rows of run {run.run_id}", "rows", digest, len(run.shots), method)
    )
    run_row = run_row_digest(run)
    if run_row is not None:
        entries.append(ManifestEntry(f"runs-table row of run {run.run_id}", "run-row", run_row,
                                     None, RUN_ROW_DIGEST))
    return entries


def check_manifest(entries: list[ManifestEntry], run: Any | None,
                   run_dir: Path | None) -> list[ManifestCheck]:
    """Re-hash every entry against the stored data; one :class:`ManifestCheck` each."""
    checks: list[ManifestCheck] = []
    for entry in entries:
        if entry.kind == "file":
            if run_dir is None:
                checks.append(ManifestCheck(entry.name, False, "no run folder to check against"))
                continue
            path = run_dir / entry.name
            if not path.is_file():
                checks.append(ManifestCheck(entry.name, False, f"{path} is missing"))
                continue
            actual = file_sha256(path)
            if actual == entry.sha256:
                checks.append(ManifestCheck(entry.name, True, "SHA-256 matches"))
            else:
                checks.append(ManifestCheck(
                    entry.name, False,
                    f"SHA-256 differs: report {entry.sha256[:16]}…, file now {actual[:16]}…"))
        elif entry.kind == "rows":
            if run is None:
                checks.append(ManifestCheck(entry.name, False, "result rows not available"))
                continue
            try:
                if entry.method == ROW_DIGEST_STORE:
                    actual, _ = row_digest(run)
                else:
                    actual = shots_digest(run.shots)
            except BenchrunError as exc:
                checks.append(ManifestCheck(entry.name, False, f"cannot read the rows: {exc}"))
                continue
            if actual == entry.sha256:
                checks.append(ManifestCheck(entry.name, True, "row digest matches"))
            else:
                checks.append(ManifestCheck(
                    entry.name, False,
                    f"database rows changed: digest {actual[:16]}… ≠ report {entry.sha256[:16]}…"))
        elif entry.kind == "run-row":
            if run is None:
                checks.append(ManifestCheck(entry.name, False, "the run's row is not available"))
                continue
            try:
                actual = run_row_digest(run)
            except BenchrunError as exc:
                checks.append(ManifestCheck(entry.name, False, f"cannot read the row: {exc}"))
                continue
            if actual == entry.sha256:
                checks.append(ManifestCheck(entry.name, True, "run row digest matches"))
            else:
                checks.append(ManifestCheck(
                    entry.name, False,
                    f"the run's row (status, times or run manifest) changed: digest "
                    f"{(actual or 'none')[:16]}… ≠ report {entry.sha256[:16]}…"))
        else:
            checks.append(ManifestCheck(entry.name, False, f"unknown entry kind {entry.kind!r}"))
    return checks
