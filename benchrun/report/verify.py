"""Verify a signed acceptance report: signature, trust, manifest hashes, re-analysis.

Every check answers yes or no with a reason. Tampering anywhere — one byte of the PDF, of the
raw record, of a database row, of the limits file — gives a *no*, never an exception:
not even when the report file itself cannot be read.

Signature checks follow DESIGN §7: pyhanko's ``intact`` and coverage decide integrity, its
``bottom_line`` (with the given certificate as the only trust root) decides trust; ``valid``
alone is never relied upon. Validation uses pyhanko's async API inside one event loop.

A lot report is checked by :mod:`benchrun.report.verify_lot`, a characterisation report by
:mod:`benchrun.characterize.verify`.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.report.sign import read_attachment
from benchrun.report.verify_checks import (
    ALL_CHECKS,
    CHECK_LOT,
    CHECK_MANIFEST,
    CHECK_REANALYSIS,
    CHECK_REGISTRATION,
    CHECK_RUNS,
    CHECK_SIGNATURE,
    CHECK_TRUST,
    Check,
    VerificationResult,
)
from benchrun.report.verify_data import find_run_dir, load_run_folder, manifest_check
from benchrun.report.verify_reanalysis import reanalysis_check
from benchrun.report.verify_signature import signature_checks

__all__ = ["CHECK_LOT", "CHECK_MANIFEST", "CHECK_REANALYSIS", "CHECK_REGISTRATION",
           "CHECK_RUNS", "CHECK_SIGNATURE", "CHECK_TRUST", "Check",
           "VerificationResult", "verify_report"]


def _guarded(name: str, step: Callable[[], Check]) -> Check:
    """Run one check; anything it raises on damaged input is a negative check with a reason."""
    try:
        return step()
    except Exception as exc:  # a damaged file must give a negative check, never a traceback
        return Check(name, False, f"could not be checked: {_why(exc)}")


def _why(exc: BaseException) -> str:
    text = str(exc).strip() or "no message"
    return text if isinstance(exc, BenchrunError) else f"{type(exc).__name__}: {text}"


def data_checks(pdf_path: Path, attachment: Any, data: Path | None, runs: Any,
                reanalyse: Any) -> tuple[Any, Check, Check]:
    """``(run, manifest check, re-analysis check)`` of a one-run report: its run folder
    found (``data``, beside the report, or under ``runs``), loaded, its manifest hashes
    checked and ``reanalyse(attachment, run, load_error)`` run; never raises."""
    run_dir = find_run_dir(pdf_path, data)
    if run_dir is None and runs and isinstance(attachment, dict) and attachment.get("run_id"):
        from benchrun.store.lotdata import search_run_folder

        run_dir = search_run_folder(str(attachment.get("run_id")), runs)
    try:
        run, load_error = load_run_folder(run_dir)
    except Exception as exc:  # a damaged results store or run.json
        run, load_error = None, f"cannot load the run from {run_dir}: {_why(exc)}"
    manifest = _guarded(CHECK_MANIFEST,
                        lambda: manifest_check(attachment, run, run_dir, load_error))
    reanalysis = _guarded(CHECK_REANALYSIS, lambda: reanalyse(attachment, run, load_error))
    return run, _raw_note(manifest, reanalysis), reanalysis


def _raw_note(manifest: Check, reanalysis: Check) -> Check:
    """When ``raw.h5``'s bytes changed but every shot still reads back with its stored
    content hash and re-analyses to the reported numbers, say so: the shot data are intact."""
    raw_changed = any(line.startswith("raw.h5: no") for line in manifest.details)
    if manifest.ok or not raw_changed or not reanalysis.ok:
        return manifest
    note = ("raw.h5: the file's bytes changed, but every shot of the report reads back with "
            "its stored content hash and re-analyses to the reported numbers: the shot data "
            "are intact (the change lies outside them: unused space or file metadata)")
    return Check(manifest.name, False, f"{manifest.reason}; {note}", (*manifest.details, note))


def _registration(attachment: dict[str, Any] | None, run: Any, pdf: bytes) -> Check:
    if attachment is None:
        return Check(CHECK_REGISTRATION, False, "the report carries no readable embedded data")
    url = getattr(run, "store_url", None) if run is not None else None
    if not url:
        return Check(CHECK_REGISTRATION, False, "no results store to compare with")
    from benchrun.report.registry import get_report, registration_problems

    record = get_report(url, str(attachment.get("report_id")))
    if record is None:
        return Check(CHECK_REGISTRATION, False,
                     f"report {attachment.get('report_id')} is not in the reports table")
    problems = registration_problems(record, pdf)
    if problems:
        return Check(CHECK_REGISTRATION, False,
                     "the reports-table row differs from the signed report: " + problems[0],
                     tuple(problems))
    return Check(CHECK_REGISTRATION, True, "the reports-table row (disposition, reasons, "
                 "counts, signer, file SHA-256) matches the signed report")


def _verify_lot(pdf_path: Path, raw: bytes, attachment: dict[str, Any], intact: Check,
                trust: Check, facts: dict[str, Any], store: str | None,
                runs: Sequence[str | Path]) -> VerificationResult:
    """The checks of a lot report: signature and trust, then :mod:`benchrun.report.
    verify_lot` (runs found, retest rule, manifest, re-analysis), then the reports-table row
    in the store the runs were found in."""
    from types import SimpleNamespace

    from benchrun.report.verify_lot import verify_lot

    lot = verify_lot(attachment, store=store, runs=runs)
    if lot.store_url is None:
        registration = Check(CHECK_REGISTRATION, False, lot.checks[0].reason)
    else:
        registration = _guarded(CHECK_REGISTRATION, lambda: _registration(
            attachment, SimpleNamespace(store_url=lot.store_url), raw))
    facts.update({k: attachment.get(k) for k in ("run_id", "part", "lot", "disposition")})
    facts["kind"] = "lot"
    facts["runs"] = [r.to_dict() for r in lot.runs]
    return VerificationResult(str(pdf_path), (intact, trust, *lot.checks, registration),
                              attachment.get("report_id"), facts)


def verify_report(pdf: str | Path, cert: str | Path | None = None,
                  data: str | Path | None = None, *, store: str | None = None,
                  runs: Sequence[str | Path] = ()) -> VerificationResult:
    """Verify a signed report. Never raises: every failure is a negative :class:`Check`.

    Parameters
    ----------
    pdf
        The signed report.
    cert
        The signer's certificate (PEM or DER), the only trust root; without it the trust
        check fails.
    data
        The run folder (raw record, configuration files, results DB); defaults to the report's
        own folder when it holds ``run.json``, else the folder of the report's run found
        under ``runs``.
    store
        A lot report only: the results store to find its runs in (default: the one the
        report names).
    runs
        Folders to search for run folders that are not where the store records them (a lot
        report's runs; a one-run report's run when neither ``data`` nor the report's folder
        holds it). See :mod:`benchrun.report.verify_lot`.

    Returns
    -------
    VerificationResult
        Each check with yes/no and its reason: signature intact, signer trusted, manifest
        hashes (run files, ``run.json``, result rows, the run's row), re-analysis, and the
        reports-table row against the signed file.
    """
    pdf_path = Path(pdf)
    try:
        raw = pdf_path.read_bytes()
    except OSError as exc:
        reason = f"cannot read {pdf_path}: {exc.strerror or type(exc).__name__}"
        checks = tuple(Check(name, False, reason) for name in ALL_CHECKS)
        return VerificationResult(str(pdf_path), checks, None, {})
    facts: dict[str, Any] = {}
    try:
        intact, trust, facts = asyncio.run(
            signature_checks(raw, Path(cert) if cert is not None else None))
    except Exception as exc:  # a damaged file is a negative result
        intact = Check(CHECK_SIGNATURE, False, f"could not be checked: {_why(exc)}")
        trust = Check(CHECK_TRUST, False, "not checked: the signature could not be read")
    try:
        attachment = read_attachment(raw)
    except Exception:  # same: unreadable embedded data is reported by the checks below
        attachment = None
    if isinstance(attachment, dict) and attachment.get("kind") == "lot":
        return _verify_lot(pdf_path, raw, attachment, intact, trust, facts, store, runs)
    if isinstance(attachment, dict) and attachment.get("kind") == "characterization":
        from benchrun.characterize.verify import verify_characterization

        return verify_characterization(pdf_path, attachment, intact, trust, facts,
                                       Path(data) if data is not None else None, runs)
    run, manifest, reanalysis = data_checks(
        pdf_path, attachment, Path(data) if data is not None else None, runs,
        reanalysis_check)
    registration = _guarded(CHECK_REGISTRATION,
                            lambda: _registration(attachment, run, raw))
    report_id = attachment.get("report_id") if isinstance(attachment, dict) else None
    if isinstance(attachment, dict):
        facts.update({k: attachment.get(k) for k in ("run_id", "part", "lot", "disposition")})
    return VerificationResult(str(pdf_path),
                              (intact, trust, manifest, reanalysis, registration),
                              report_id, facts)
