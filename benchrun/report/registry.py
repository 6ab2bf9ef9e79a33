"""The reports table of the results store, as the report and ``benchrun reports`` use it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from benchrun.report.facts import ReportContent


def register_report(url: str, content: ReportContent, path: Path, sha256: str) -> Any:
    """Record an issued, signed report in the results store (``ResultsStore.add_report``)."""
    from benchrun.store.results import ResultsStore

    signer = ", ".join(x for x in (content.signer_name, content.signer_role) if x)
    with ResultsStore(url, create=False) as store:
        return store.add_report(
            content.report_id,
            content.run_id,
            str(Path(path).resolve()),
            sha256,
            signer=signer,
            disposition=content.disposition,
            created=content.generated_utc,
            details={
                "part": content.part,
                "lot": content.lot,
                "signer_certificate_sha256": content.signer_fingerprint,
                "counts": dict(content.counts),
                "manifest": list(content.manifest),
                "reasons": list(content.disposition_reasons),
            },
        )


def list_reports(url: str, run_id: str | None = None) -> list[Any]:
    """Every registered report (``ResultsStore.reports``), oldest first."""
    from benchrun.store.results import ResultsStore

    with ResultsStore(url, create=False) as store:
        return list(store.reports(run_id))


def get_report(url: str, report_id: str) -> Any:
    """One report record, or ``None``."""
    from benchrun.store.results import ResultsStore

    with ResultsStore(url, create=False) as store:
        return store.report(report_id)
