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
import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError, VerificationError
from benchrun.report.manifest import ManifestEntry, check_manifest
from benchrun.report.sign import read_attachment

CHECK_SIGNATURE = "signature intact"
CHECK_TRUST = "signer trusted"
CHECK_MANIFEST = "manifest hashes match"
CHECK_REANALYSIS = "re-analysis reproduces the report"


@dataclass(frozen=True)
class Check:
    """One verification check: its name, yes/no, the reason and supporting details."""

    name: str
    ok: bool
    reason: str
    details: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "ok": self.ok, "reason": self.reason,
                "details": list(self.details)}


@dataclass(frozen=True)
class VerificationResult:
    """All checks of one report; ``ok`` only when every check holds."""

    report: str
    checks: tuple[Check, ...]
    report_id: str | None = None
    facts: dict[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return bool(self.checks) and all(c.ok for c in self.checks)

    def check(self, name: str) -> Check:
        for item in self.checks:
            if item.name == name:
                return item
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        return {"report": self.report, "report_id": self.report_id, "ok": self.ok,
                "checks": [c.to_dict() for c in self.checks], "facts": self.facts}


# -- signature ---------------------------------------------------------------------------------
async def _signature_checks(pdf: bytes, cert_path: Path | None) -> tuple[Check, Check, dict]:
    from pyhanko.pdf_utils.reader import PdfFileReader
    from pyhanko.sign.validation import async_validate_pdf_signature
    from pyhanko.sign.validation.status import SignatureCoverageLevel
    from pyhanko_certvalidator import ValidationContext

    facts: dict[str, Any] = {}
    no_trust = Check(CHECK_TRUST, False, "not checked: the signature could not be read")
    try:
        reader = PdfFileReader(io.BytesIO(pdf), strict=False)
        signatures = reader.embedded_signatures
    except Exception as exc:  # any parse failure of a damaged file is a negative result
        return (Check(CHECK_SIGNATURE, False,
                      f"the file cannot be read as a PDF ({type(exc).__name__}: {exc})"),
                no_trust, facts)
    if not signatures:
        return Check(CHECK_SIGNATURE, False, "the PDF holds no signature"), no_trust, facts

    roots = []
    trust_note = ""
    if cert_path is not None:
        from pyhanko.keys import load_cert_from_pemder

        try:
            roots = [load_cert_from_pemder(str(cert_path))]
        except Exception as exc:
            trust_note = f"the certificate {cert_path} cannot be read ({type(exc).__name__})"
    context = ValidationContext(trust_roots=roots, allow_fetching=False)

    intact_all = True
    trusted_all = True
    reasons: list[str] = []
    trust_reasons: list[str] = []
    for index, sig in enumerate(signatures):
        label = f"signature {index + 1} ({sig.field_name})"
        try:
            status = await async_validate_pdf_signature(sig, context)
        except Exception as exc:  # any failure is a negative result
            intact_all = trusted_all = False
            reasons.append(f"{label}: cannot be validated ({type(exc).__name__}: {exc})")
            continue
        signer = status.signing_cert.subject.human_friendly if status.signing_cert else "?"
        facts.setdefault("signers", []).append(signer)
        if status.signer_reported_dt is not None:
            facts.setdefault("signing_times", []).append(status.signer_reported_dt.isoformat())
        whole = status.coverage == SignatureCoverageLevel.ENTIRE_FILE
        if not status.intact:
            intact_all = False
            reasons.append(f"{label}: the signed bytes were changed (digest mismatch)")
        elif not whole:
            intact_all = False
            reasons.append(f"{label}: does not cover the whole file "
                           f"(coverage {status.coverage.name}); content was added after signing")
        else:
            reasons.append(f"{label} by {signer}: digest matches and covers the whole file")
        if roots and status.bottom_line and status.trusted:
            trust_reasons.append(f"{label}: certificate chains to the given certificate")
        else:
            trusted_all = False
            if not trust_note:
                why = "no path to the given certificate" if roots else ""
                trust_reasons.append(f"{label}: not trusted {why}".strip())
    intact = Check(CHECK_SIGNATURE, intact_all, "; ".join(reasons))
    if cert_path is None:
        trust = Check(CHECK_TRUST, False,
                      "not established: give the signer's certificate with --cert")
    elif trust_note:
        trust = Check(CHECK_TRUST, False, trust_note)
    elif not intact_all:
        trust = Check(CHECK_TRUST, False,
                      "the signature is not intact: the file cannot be attributed to the signer")
    else:
        trust = Check(CHECK_TRUST, trusted_all, "; ".join(trust_reasons))
    return intact, trust, facts


# -- data ---------------------------------------------------------------------------------------
def _find_run_dir(pdf_path: Path, data: Path | None) -> Path | None:
    if data is not None:
        return data
    if (pdf_path.parent / "run.json").is_file():
        return pdf_path.parent
    return None


def _load(run_dir: Path | None) -> tuple[Any, str | None]:
    if run_dir is None:
        return None, "no run folder: give the raw data with --data RUN_DIR"
    try:
        from benchrun.store.rundata import load_run

        return load_run(run_dir), None
    except BenchrunError as exc:
        return None, f"cannot load the run from {run_dir}: {exc}"


def _manifest_check(attachment: dict[str, Any] | None, run: Any, run_dir: Path | None,
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
    from benchrun.report.reanalysis import reanalysis_check

    pdf_path = Path(pdf)
    try:
        raw = pdf_path.read_bytes()
    except OSError as exc:
        raise VerificationError(f"cannot read {pdf_path}: {exc.strerror}") from exc
    intact, trust, facts = asyncio.run(
        _signature_checks(raw, Path(cert) if cert is not None else None)
    )
    attachment = read_attachment(raw)
    run_dir = _find_run_dir(pdf_path, Path(data) if data is not None else None)
    run, load_error = _load(run_dir)
    manifest = _manifest_check(attachment, run, run_dir, load_error)
    reanalysis = reanalysis_check(attachment, run, load_error)
    report_id = attachment.get("report_id") if attachment else None
    if attachment:
        facts.update({k: attachment.get(k) for k in ("run_id", "part", "lot", "disposition")})
    return VerificationResult(str(pdf_path), (intact, trust, manifest, reanalysis), report_id,
                              facts)
