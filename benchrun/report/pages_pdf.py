"""Lay the report's facts out as A4 pages (reportlab platypus + vector matplotlib): the
unsigned PDF and where its signature goes.

The device table runs on landscape pages, everything else on portrait pages. Every page
carries "Page n of N" (two-pass canvas), every long table repeats its header.
"""

from __future__ import annotations

import io
from collections.abc import Callable
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

from benchrun.errors import ReportError
from benchrun.report import pages_blocks as sec
from benchrun.report.facts import ReportContent, WaveformMarks
from benchrun.report.pages import build_story
from benchrun.report.pages_figures import waveform_figure
from benchrun.report.pages_style import (
    FONT_BOLD,
    FONT_MONO,
    FONT_REGULAR,
    INK,
    MUTED,
    PAGE_MARGIN,
    RULE,
    register_fonts,
)
from benchrun.report.pages_vector import FigureFlowable
from benchrun.report.sign import SignatureBox

#: Loads one shot for plotting: raw_ref → (t, v, i, marks), or None when unavailable.
WaveformLoader = Callable[[str], tuple[Any, Any, Any, WaveformMarks] | None]

SIGNATURE_SIZE = (120 * mm, 30 * mm)


class _NumberedCanvas(Canvas):
    """Canvas that writes "Page n of N" once the page count is known (two-pass pattern)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self._footer_text = kwargs.pop("footer_text", "")
        # the embedded report font from the first operator on: no base-14 font (Helvetica)
        # is ever referenced, so every font in the file is embedded (PDF/A-style archiving)
        kwargs["initialFontName"] = FONT_REGULAR
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
    """The signature block: who signs, with which certificate (its whole SHA-256), drawn in
    the report's embedded fonts; records where it landed (the signature field's page)."""

    def __init__(self, sink: list[SignatureBox], lines: list[str]) -> None:
        super().__init__()
        self.width, self.height = SIGNATURE_SIZE
        self._sink = sink
        self._lines = lines

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
        self.canv.setFillColor(INK)
        y = self.height - 11
        for k, line in enumerate(self._lines):
            mono = line and all(c in "0123456789abcdef" for c in line)
            self.canv.setFont(FONT_MONO if mono else (FONT_BOLD if k == 0 else FONT_REGULAR),
                              7.5 if mono else 8)
            self.canv.drawString(6, y, line)
            y -= 10.5
        self.canv.restoreState()


def signature_lines(content: ReportContent) -> list[str]:
    """The text of the signature block."""
    who = ", ".join(x for x in (content.signer_name, content.signer_role) if x)
    return [f"Signed digitally (PAdES) by {who}",
            content.signer_organisation or "",
            f"Issued {content.generated_utc}; the signing time is in the signature itself",
            "Signer certificate SHA-256:",
            content.signer_fingerprint]


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
            f"Part {content.part} · lot {content.lot} · disposition {content.disposition}",
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
        initialFontName=FONT_REGULAR,
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
    register_fonts()
    buffer = io.BytesIO()
    doc = _doc(buffer, content)
    slots: list[SignatureBox] = []
    story = build_story(
        content,
        signature_slot=_SignatureSlot(slots, signature_lines(content)),
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


