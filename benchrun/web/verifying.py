"""Running the report's verification checks for the web pages, and remembering the answers.

A stored report is verified with :func:`benchrun.report.verify_report` against its run
folder and the certificates the server trusts (``--trust``). The answer is kept, keyed by the
size and modification time of the report and of every file the checks read, so the lots page
can say whether each report verifies without checking it again; any change to those files
makes the entry stale. A background thread verifies the reports nobody has asked about yet.
"""

from __future__ import annotations

import contextlib
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.store.rundata import HASHED_FILES, REPORT_FILE, RESULTS_DB
from benchrun.web.catalog import Catalog, Lot

try:  # the report package's public entry point
    from benchrun.report import verify_report
except ImportError:  # pragma: no cover - older layout of the report package
    from benchrun.report.verify import verify_report


@dataclass(frozen=True)
class CheckView:
    name: str
    ok: bool
    reason: str
    details: tuple[str, ...]
    #: False: the check does not apply to this kind of report (shown "n/a")
    applicable: bool = True


@dataclass(frozen=True)
class Outcome:
    """One verification as a page shows it."""

    ok: bool
    checks: tuple[CheckView, ...]
    report_id: str | None
    facts: dict[str, Any]
    certificate: str | None
    error: str | None = None


def _outcome(result: Any, cert: Path | None) -> Outcome:
    return Outcome(bool(result.ok),
                   tuple(CheckView(c.name, bool(c.ok), c.reason, tuple(c.details),
                                   bool(getattr(c, "applicable", True)))
                         for c in result.checks),
                   result.report_id, dict(result.facts), cert.name if cert else None)


def run_checks(pdf: Path, certs: list[Path], data: Path | None) -> Outcome:
    """Verify ``pdf`` with each trusted certificate until one makes the trust check pass
    (the first one's answer otherwise)."""
    first: Outcome | None = None
    for cert in certs or [None]:
        try:
            result = verify_report(pdf, cert=cert, data=data)
        except BenchrunError as exc:
            return Outcome(False, (), None, {}, None, str(exc))
        outcome = _outcome(result, cert)
        if outcome.ok:
            return outcome
        trust = [c for c in outcome.checks if "trust" in c.name]
        if first is None:
            first = outcome
        if trust and trust[0].ok:
            return outcome
    assert first is not None
    return first


def _stamp(path: Path) -> tuple[str, int, int] | None:
    try:
        st = path.stat()
    except OSError:
        return None
    return (str(path), st.st_size, st.st_mtime_ns)


class Verifier:
    """Verifications of stored reports, cached; and of uploaded ones, never kept."""

    def __init__(self, catalog: Catalog, certs: list[Path]) -> None:
        self.catalog = catalog
        self.certs = list(certs)
        self._cache: dict[str, tuple[Any, Outcome]] = {}
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        #: Called once by the background thread before it verifies (fills page caches).
        self.warm: Any = None

    def report_file(self, lot: Lot) -> Path | None:
        """The lot's registered report, when it lies inside RESULTS or the run folder; else
        the run folder's ``report.pdf`` (a run folder moved since the report was made)."""
        if lot.report is None:
            return None
        found = self.catalog.allowed_file(lot, lot.report.path)
        if found is None and lot.run_dir is not None:
            found = self.catalog.allowed_file(lot, lot.run_dir / REPORT_FILE)
        return found

    def _key(self, lot: Lot, pdf: Path) -> Any:
        files = [pdf] + ([lot.run_dir / n for n in (*HASHED_FILES, RESULTS_DB)]
                         if lot.run_dir else [])
        return (tuple(_stamp(p) for p in files), tuple(_stamp(c) for c in self.certs))

    def cached(self, lot: Lot) -> Outcome | None:
        pdf = self.report_file(lot)
        if pdf is None:
            return None
        with self._lock:
            entry = self._cache.get(lot.row.run_id)
        if entry is None or entry[0] != self._key(lot, pdf):
            return None
        return entry[1]

    def verify(self, lot: Lot) -> Outcome:
        """Run every verification check on the lot's stored report now."""
        pdf = self.report_file(lot)
        if pdf is None:
            return Outcome(False, (), None, {}, None,
                           "no signed report of this lot is reachable from this server")
        key = self._key(lot, pdf)
        outcome = run_checks(pdf, self.certs, lot.run_dir)
        with self._lock:
            self._cache[lot.row.run_id] = (key, outcome)
        return outcome

    def verify_upload(self, pdf: bytes, cert: bytes | None) -> Outcome:
        """Check an uploaded report (and certificate) from a private temporary folder that
        is deleted before this returns; the data checks run when its run is in the store."""
        with tempfile.TemporaryDirectory(prefix="benchrun-check-") as folder:
            path = Path(folder) / "report.pdf"
            path.write_bytes(pdf)
            certs = self.certs
            if cert is not None:
                cert_path = Path(folder) / "certificate.pem"
                cert_path.write_bytes(cert)
                certs = [cert_path]
            outcome = run_checks(path, certs, None)
            run_id = outcome.facts.get("run_id")
            lot = self.catalog.lot(str(run_id)) if run_id else None
            if lot is not None and lot.run_dir is not None:
                outcome = run_checks(path, certs, lot.run_dir)
            if cert is not None:
                outcome = Outcome(outcome.ok, outcome.checks, outcome.report_id,
                                  outcome.facts, "the uploaded certificate", outcome.error)
            return outcome

    # -- background ---------------------------------------------------------------------
    def start_background(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._work, name="benchrun-verify",
                                            daemon=True)
            self._thread.start()

    def stop(self) -> None:
        self._stop.set()

    def _work(self) -> None:
        if self.warm is not None:
            with contextlib.suppress(BenchrunError):
                self.warm()
        while not self._stop.is_set():
            try:
                for row in self.catalog.lots():
                    if self._stop.is_set():
                        return
                    if row.report_id is None:
                        continue
                    lot = self.catalog.lot(row.run_id)
                    if lot is not None and self.report_file(lot) and self.cached(lot) is None:
                        self.verify(lot)
            except BenchrunError:
                pass
            self._stop.wait(30.0)
