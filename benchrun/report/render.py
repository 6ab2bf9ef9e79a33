"""Render the lot acceptance report (reportlab platypus + vector matplotlib) and sign it.

``render_report(run, lot, out_pdf, *, signer, loss=None)`` is the public entry point
(DEVELOPERS.md, report contract). The layout is A4; the device table runs on landscape pages.
Every page carries "Page n of N" (two-pass canvas), every long table repeats its header.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

from reportlab.lib.pagesizes import A4, landscape
from reportlab.lib.units import mm
from reportlab.pdfbase.pdfmetrics import stringWidth
from reportlab.pdfgen.canvas import Canvas
from reportlab.platypus import (
    BaseDocTemplate,
    Flowable,
    Frame,
    NextPageTemplate,
    PageBreak,
    PageTemplate,
)

from benchrun import __version__
from benchrun.errors import ReportError
from benchrun.report import sections as sec
from benchrun.report.content import ReportContent, attachment_dict
from benchrun.report.keys import ReportSigner
from benchrun.report.mplflow import FigureFlowable
from benchrun.report.plots import WaveformMarks, waveform_figure
from benchrun.report.sign import SignatureBox, sign_pdf_bytes
from benchrun.report.styles import FONT_BOLD, FONT_REGULAR, MUTED, PAGE_MARGIN, RULE, register_fonts

#: Loads one shot for plotting: raw_ref → (t, v, i, marks), or None when unavailable.
WaveformLoader = Callable[[str], tuple[Any, Any, Any, WaveformMarks] | None]

SIGNATURE_SIZE = (95 * mm, 24 * mm)


class _NumberedCanvas(Canvas):
    """Canvas that writes "Page n of N" once the page count is known (two-pass pattern)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self._footer_text = kwargs.pop("footer_text", "")
        super().__init__(*args, **kwargs)
        self._saved_pages: list[dict] = []

    def showPage(self) -> None:  # noqa: N802 - reportlab API
        self._saved_pages.append(dict(self.__dict__))
        self._startPage()

    def save(self) -> None:
        total = len(self._saved_pages)
        for state in self._saved_pages:
            self.__dict__.update(state)
            self._draw_page_number(total)
            super().showPage()
        super().save()

    def _draw_page_number(self, total: int) -> None:
        width, _ = self._pagesize
        self.saveState()
        self.setFont(FONT_REGULAR, 7.5)
        self.setFillColor(MUTED)
        self.drawRightString(width - PAGE_MARGIN, 10 * mm,
                             f"Page {self._pageNumber} of {total}")
        self.restoreState()


class _SignatureSlot(Flowable):
    """Reserves room for the visible signature and records where it landed."""

    def __init__(self, sink: list[SignatureBox]) -> None:
        super().__init__()
        self.width, self.height = SIGNATURE_SIZE
        self._sink = sink

    def wrap(self, availWidth: float, availHeight: float) -> tuple[float, float]:
        return self.width, self.height

    def draw(self) -> None:
        x, y = self.canv.absolutePosition(0, 0)
        page = self.canv.getPageNumber() - 1
        self._sink.append(SignatureBox(page, x, y, x + self.width, y + self.height))
        self.canv.saveState()
        self.canv.setStrokeColor(RULE)
        self.canv.setDash([2, 2])
        self.canv.rect(0, 0, self.width, self.height)
        self.canv.restoreState()


def _page_decor(content: ReportContent) -> Callable[[Canvas, Any], None]:
    def decorate(canvas: Canvas, doc: Any) -> None:
        width, height = canvas._pagesize
        canvas.saveState()
        canvas.setStrokeColor(RULE)
        canvas.setLineWidth(0.5)
        canvas.line(PAGE_MARGIN, height - 12 * mm, width - PAGE_MARGIN, height - 12 * mm)
        canvas.line(PAGE_MARGIN, 14 * mm, width - PAGE_MARGIN, 14 * mm)
        canvas.setFillColor(MUTED)
        right = f"Lot acceptance report {content.report_id}"
        room = width - 2 * PAGE_MARGIN - 12
        size = 7.5
        while size > 5 and (stringWidth(content.company, FONT_BOLD, size)
                            + stringWidth(right, FONT_REGULAR, size)) > room:
            size -= 0.25
        canvas.setFont(FONT_BOLD, size)
        canvas.drawString(PAGE_MARGIN, height - 10.5 * mm, content.company)
        canvas.setFont(FONT_REGULAR, size)
        canvas.drawRightString(width - PAGE_MARGIN, height - 10.5 * mm, right)
        canvas.setFont(FONT_REGULAR, 7.5)
        canvas.drawString(
            PAGE_MARGIN, 10 * mm,
            f"Part {content.part} · lot {content.lot} · disposition {content.disposition.upper()}",
        )
        canvas.restoreState()

    return decorate


def _doc(buffer: io.BytesIO, content: ReportContent) -> BaseDocTemplate:
    doc = BaseDocTemplate(
        buffer,
        pagesize=A4,
        leftMargin=PAGE_MARGIN, rightMargin=PAGE_MARGIN,
        topMargin=PAGE_MARGIN, bottomMargin=PAGE_MARGIN,
        title=f"Lot acceptance report {content.report_id}",
        author=content.signer_name,
        subject=f"{content.part} lot {content.lot}",
        creator=f"benchrun {content.software_version}",
        producer=f"benchrun {content.software_version}",
    )
    decorate = _page_decor(content)
    pw, ph = A4
    portrait = Frame(PAGE_MARGIN, PAGE_MARGIN, pw - 2 * PAGE_MARGIN, ph - 2 * PAGE_MARGIN,
                     id="portrait", leftPadding=0, rightPadding=0, topPadding=0,
                     bottomPadding=0)
    lw, lh = landscape(A4)
    wide = Frame(PAGE_MARGIN, PAGE_MARGIN, lw - 2 * PAGE_MARGIN, lh - 2 * PAGE_MARGIN,
                 id="landscape", leftPadding=0, rightPadding=0, topPadding=0, bottomPadding=0)
    doc.addPageTemplates([
        PageTemplate(id="portrait", frames=[portrait], onPage=decorate, pagesize=A4),
        PageTemplate(id="landscape", frames=[wide], onPage=decorate, pagesize=landscape(A4)),
    ])
    return doc


def render_pdf_bytes(
    content: ReportContent,
    *,
    waveform_loader: WaveformLoader | None = None,
    loss_flowables: list[Flowable] | None = None,
) -> tuple[bytes, SignatureBox]:
    """Lay out the (unsigned) report; returns the PDF and where the signature goes."""
    from benchrun.report.story import build_story

    register_fonts()
    buffer = io.BytesIO()
    doc = _doc(buffer, content)
    slots: list[SignatureBox] = []
    story = build_story(
        content,
        signature_slot=_SignatureSlot(slots),
        waveform_flowables=_waveform_flowables(content, waveform_loader),
        loss_flowables=loss_flowables or [],
        portrait=lambda: [NextPageTemplate("portrait"), PageBreak()],
        wide=lambda: [NextPageTemplate("landscape"), PageBreak()],
        portrait_width=A4[0] - 2 * PAGE_MARGIN,
        landscape_width=landscape(A4)[0] - 2 * PAGE_MARGIN,
    )
    doc.build(story, canvasmaker=_NumberedCanvas)
    if not slots:
        raise ReportError("the signature block was not placed")
    return buffer.getvalue(), slots[-1]


def _waveform_flowables(content: ReportContent,
                        loader: WaveformLoader | None) -> list[Flowable]:
    out: list[Flowable] = []
    for request in content.waveforms:
        loaded = loader(request.raw_ref) if loader is not None else None
        caption = (f"{request.serial} at {request.condition} — {request.why} "
                   f"(raw record {request.raw_ref})")
        if loaded is None:
            out.append(sec.P(f"{caption}: the raw waveform is not available.", "muted"))
            continue
        t, v, i, marks = loaded
        out.append(FigureFlowable(waveform_figure(t, v, i, marks, caption)))
        out.append(sec.spacer(2))
    return out


def render_signed(
    content: ReportContent,
    out_pdf: str | Path,
    signer: ReportSigner,
    *,
    waveform_loader: WaveformLoader | None = None,
    loss_flowables: list[Flowable] | None = None,
) -> Path:
    """Render, embed the JSON numbers, sign and write ``out_pdf`` atomically."""
    pdf, box = render_pdf_bytes(content, waveform_loader=waveform_loader,
                                loss_flowables=loss_flowables)
    signed = sign_pdf_bytes(pdf, signer, box, attachment=attachment_dict(content))
    out = Path(out_pdf)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".part")
    try:
        tmp.write_bytes(signed)
        os.replace(tmp, out)
    except OSError as exc:
        raise ReportError(f"cannot write {out}: {exc.strerror}") from exc
    return out


def render_report(run: Any, lot: Any, out_pdf: str | Path, *, signer: ReportSigner,
                  loss: Any = None) -> Path:
    """Render and sign the acceptance report of one run.

    Parameters
    ----------
    run
        ``RunData`` from :func:`benchrun.store.rundata.load_run`.
    lot
        ``LotGrade`` from :func:`benchrun.grading.grade_lot` on ``run.shots``.
    out_pdf
        Where the signed PDF goes (conventionally ``<run_dir>/report.pdf``).
    signer
        Loaded signing identity (:func:`benchrun.report.keys.load_signer`).
    loss
        Optional ``LossTable`` (:func:`benchrun.loss.estimate_losses`) for the loss section.

    Returns
    -------
    Path
        The signed report. It is also registered in the run's results store when the store
        offers ``add_report``.
    """
    from benchrun.report.adapter import build_content, raw_waveform_loader

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0)
    content = build_content(run, lot, signer, now=now)
    loss_parts: list[Flowable] = []
    if loss is not None:
        loss_parts = _loss_flowables(loss)
    with raw_waveform_loader(run, content) as loader:
        path = render_signed(content, out_pdf, signer, waveform_loader=loader,
                             loss_flowables=loss_parts)
    _register(run, content, path)
    return path


def _loss_flowables(loss: Any) -> list[Flowable]:
    try:
        from benchrun.report.loss_section import loss_flowables
    except ImportError:  # the loss section module is optional: no section without it
        return []
    from benchrun.report.styles import paragraph_styles

    return list(loss_flowables(loss, paragraph_styles()))


def _register(run: Any, content: ReportContent, path: Path) -> None:
    url = getattr(run, "store_url", None)
    if not url:
        return
    from benchrun.report.registry import register_report

    digest = hashlib.sha256(path.read_bytes()).hexdigest()
    register_report(url, content, path, digest)


__all__ = ["__version__", "render_pdf_bytes", "render_report", "render_signed"]
