"""Verification of the PDF signature: integrity, whole-file coverage and trust (DESIGN §7).

pyhanko's ``intact`` and coverage decide integrity, its ``bottom_line`` (with the given
certificate as the only trust root) decides trust; ``valid`` alone is never relied upon.
"""

from __future__ import annotations

import hashlib
import io
from pathlib import Path
from typing import Any

from benchrun.report.verify_checks import CHECK_SIGNATURE, CHECK_TRUST, Check


async def signature_checks(pdf: bytes, cert_path: Path | None) -> tuple[Check, Check, dict]:
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
        if status.signing_cert is not None:
            fingerprint = hashlib.sha256(status.signing_cert.dump()).hexdigest()
            facts.setdefault("signer_certificate_sha256", []).append(fingerprint)
            signer += f" (certificate SHA-256 {fingerprint})"
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


