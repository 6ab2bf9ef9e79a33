"""Attach the report's numbers to the PDF and sign it (PAdES baseline B, pyhanko).

The rendered PDF gets, in order: an embedded JSON file holding every number of the report
(so :mod:`benchrun.report.verify` can compare a re-analysis), then one approval signature
(ETSI EN 319 142-1 PAdES, SubFilter ``ETSI.CAdES.detached``) in a signature field on the
page of the signature block (the block itself, naming the signer, role and the certificate's
whole SHA-256, is drawn by the layout in the report's embedded fonts). The signature covers
the whole file, attachment included; any later byte change breaks it.
"""

from __future__ import annotations

import asyncio
import datetime as _dt
import io
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from benchrun.errors import ReportError
from benchrun.report.keys import ReportSigner

#: Name of the embedded JSON file inside the PDF.
ATTACHMENT_NAME = "benchrun-report.json"

#: Name of the signature form field.
SIGNATURE_FIELD = "QualitySignature"


@dataclass(frozen=True)
class SignatureBox:
    """Where the visible signature goes: 0-based page index and PDF user-space box (pt)."""

    page: int
    x1: float
    y1: float
    x2: float
    y2: float


def canonical_json(data: Any) -> bytes:
    """Deterministic JSON (sorted keys, no NaN) used for the attachment and digests."""
    return json.dumps(
        data, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def sign_pdf_bytes(
    pdf: bytes,
    signer: ReportSigner,
    box: SignatureBox,
    *,
    attachment: dict[str, Any] | None = None,
    reason: str = "Lot acceptance report approved",
    location: str = "",
    signing_time: _dt.datetime | None = None,
) -> bytes:
    """Embed ``attachment`` as JSON and sign the PDF with a visible signature block.

    Parameters
    ----------
    pdf
        The unsigned PDF.
    signer
        Loaded identity (:func:`benchrun.report.keys.load_signer`).
    box
        Visible signature position.
    attachment
        Numbers of the report, embedded before signing.

    Returns
    -------
    bytes
        The signed PDF.
    """
    try:
        return asyncio.run(
            _sign(pdf, signer, box, attachment, reason, location, signing_time)
        )
    except ReportError:
        raise
    except Exception as exc:  # pyhanko raises many types; map them to our tree
        raise ReportError(f"signing failed: {type(exc).__name__}: {exc}") from exc


async def _sign(
    pdf: bytes,
    signer: ReportSigner,
    box: SignatureBox,
    attachment: dict[str, Any] | None,
    reason: str,
    location: str,
    signing_time: _dt.datetime | None,
) -> bytes:
    from pyhanko.pdf_utils import embed, generic
    from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
    from pyhanko.sign import fields, signers
    from pyhanko.sign.fields import SigSeedSubFilter

    writer = IncrementalPdfFileWriter(io.BytesIO(pdf), strict=False)
    if attachment is not None:
        data = canonical_json(attachment)
        when = signing_time or _dt.datetime.now(_dt.UTC)
        spec = embed.FileSpec(
            file_spec_string=ATTACHMENT_NAME,
            file_name=ATTACHMENT_NAME,
            embedded_data=embed.EmbeddedFileObject.from_file_data(
                writer,
                data=data,
                mime_type="application/json",
                params=embed.EmbeddedFileParams(creation_date=when, modification_date=when),
            ),
            description="Every number of this report (metrics, grades, disposition, manifest)",
            af_relationship=generic.pdf_name("/Data"),
        )
        embed.embed_file(writer, spec)

    # the signature field has no appearance of its own: the signature block is part of the
    # page, drawn in the report's embedded fonts (pyhanko's text stamps use an unembedded
    # base-14 font); viewers list the signature in their signature panel
    fields.append_signature_field(
        writer,
        fields.SigFieldSpec(sig_field_name=SIGNATURE_FIELD, on_page=box.page),
    )
    meta = signers.PdfSignatureMetadata(
        field_name=SIGNATURE_FIELD,
        md_algorithm="sha256",
        subfilter=SigSeedSubFilter.PADES,
        reason=reason,
        location=location or None,
        name=signer.name,
    )
    pdf_signer = signers.PdfSigner(meta, signer=signer.pyhanko_signer)
    out = io.BytesIO()
    await pdf_signer.async_sign_pdf(writer, output=out)
    return out.getvalue()


def read_attachment(pdf: bytes) -> dict[str, Any] | None:
    """The embedded report JSON, or None when the PDF has none (or cannot be parsed)."""
    from pyhanko.pdf_utils.reader import PdfFileReader

    try:
        reader = PdfFileReader(io.BytesIO(pdf), strict=False)
        names = reader.root["/Names"]["/EmbeddedFiles"]["/Names"]
        for k in range(0, len(names), 2):
            if str(names[k]) == ATTACHMENT_NAME:
                spec = names[k + 1].get_object()
                stream = spec["/EF"]["/F"].get_object()
                return json.loads(stream.data.decode("utf-8"))
    except Exception:  # a damaged file is a negative verification result, not a crash
        return None
    return None


def write_signed_pdf(out_pdf: str | os.PathLike[str], signed: bytes) -> Path:
    """Write a signed PDF atomically (a ``.part`` file renamed into place) and return its path.

    Raises
    ------
    ReportError
        When the file cannot be written.
    """
    out = Path(out_pdf)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    try:
        tmp.write_bytes(signed)
        os.replace(tmp, out)
    except OSError as exc:
        raise ReportError(f"cannot write {out}: {exc.strerror}") from exc
    return out
