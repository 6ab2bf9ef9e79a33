"""Verify a signed acceptance report: signature, trust, manifest hashes, re-analysis.

Every check answers yes or no with a reason. Tampering anywhere — one byte of the PDF, of the
raw record, of a database row, of the limits file — gives a *no*, never an exception:
:class:`benchrun.errors.VerificationError` is raised only when verification cannot start at
all (the report file cannot be read).

Signature checks follow DESIGN §7: pyhanko's ``intact`` and coverage decide integrity, its
``bottom_line`` (with the given certificate as the only trust root) decides trust; ``valid``
alone is never relied upon. Validation uses pyhanko's async API inside one event loop.
"""

from __future__ import annotations

import asyncio
from pathlib import Path

from benchrun.errors import VerificationError
from benchrun.report.sign import read_attachment
from benchrun.report.verify_checks import (
    CHECK_MANIFEST,
    CHECK_REANALYSIS,
    CHECK_SIGNATURE,
    CHECK_TRUST,
    Check,
    VerificationResult,
)
from benchrun.report.verify_data import find_run_dir, load_run_folder, manifest_check
from benchrun.report.verify_reanalysis import reanalysis_check
from benchrun.report.verify_signature import signature_checks

__all__ = ["CHECK_MANIFEST", "CHECK_REANALYSIS", "CHECK_SIGNATURE", "CHECK_TRUST", "Check",
           "VerificationResult", "verify_report"]


def verify_report(pdf: str | Path, cert: str | Path | None = None,
                  data: str | Path | None = None) -> VerificationResult:
    """Verify a signed report.

    Parameters
    ----------
    pdf
        The signed report.
    cert
        The signer's certificate (PEM or DER), the only trust root; without it the trust
        check fails.
    data
        The run folder (raw record, configuration files, results DB); defaults to the report's
        own folder when it holds ``run.json``.

    Returns
    -------
    VerificationResult
        Each check with yes/no and its reason.

    Raises
    ------
    VerificationError
        The report file cannot be read at all.
    """
    pdf_path = Path(pdf)
    try:
        raw = pdf_path.read_bytes()
    except OSError as exc:
        raise VerificationError(f"cannot read {pdf_path}: {exc.strerror}") from exc
    intact, trust, facts = asyncio.run(
        signature_checks(raw, Path(cert) if cert is not None else None)
    )
    attachment = read_attachment(raw)
    run_dir = find_run_dir(pdf_path, Path(data) if data is not None else None)
    run, load_error = load_run_folder(run_dir)
    manifest = manifest_check(attachment, run, run_dir, load_error)
    reanalysis = reanalysis_check(attachment, run, load_error)
    report_id = attachment.get("report_id") if attachment else None
    if attachment:
        facts.update({k: attachment.get(k) for k in ("run_id", "part", "lot", "disposition")})
    return VerificationResult(str(pdf_path), (intact, trust, manifest, reanalysis), report_id,
                              facts)
