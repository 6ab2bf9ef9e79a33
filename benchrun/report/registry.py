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
                **({"kind": "lot", "run_ids": [r["run_id"] for r in content.lot_runs]}
                   if content.lot_runs else {}),
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


def registration_problems(record: Any, pdf: bytes | None) -> list[str]:
    """What in a reports-table row disagrees with the signed report it names.

    The row is protected by the same hash as the report: its ``sha256`` must be the SHA-256
    of the signed file, and its report identifier, run, disposition, reasons, signer
    certificate and counts must equal those embedded (and signed) in that file. An empty list
    means the row says what the signed report says.

    Parameters
    ----------
    record
        A ``ReportRecord`` (``ResultsStore.report``).
    pdf
        The signed report's bytes, or ``None`` when the file cannot be found.
    """
    import hashlib

    from benchrun.report.sign import read_attachment

    if pdf is None:
        return [f"the signed file {record.path} cannot be read: the row cannot be checked"]
    problems: list[str] = []
    actual = hashlib.sha256(pdf).hexdigest()
    if actual != record.sha256:
        problems.append(f"file SHA-256 {actual[:16]}… ≠ row {str(record.sha256)[:16]}…")
    data = read_attachment(pdf)
    if data is None:
        return [*problems, "the file carries no readable embedded report data"]
    details = record.details or {}
    expected = {
        "report identifier": (record.report_id, data.get("report_id")),
        "run": (record.run_id, data.get("run_id")),
        "disposition": (record.disposition, data.get("disposition")),
        "reasons": (list(details.get("reasons", [])), list(data.get("disposition_reasons", []))),
        "signer certificate": (details.get("signer_certificate_sha256"),
                               (data.get("signer") or {}).get("certificate_sha256")),
    }
    if "counts" in details or "counts" in data:
        expected["device counts"] = (details.get("counts"), data.get("counts"))
    for what, (row, signed) in expected.items():
        if row != signed:
            problems.append(f"{what}: row {row!r}, signed report {signed!r}")
    return problems


def read_registered_file(record: Any, *folders: Path) -> bytes | None:
    """The signed file a row names: at its recorded path, else by name in ``folders`` (a
    moved or copied run folder); ``None`` when not found."""
    candidates = [Path(record.path)] + [Path(f) / Path(record.path).name for f in folders]
    for path in candidates:
        try:
            return path.read_bytes()
        except OSError:
            continue
    return None
