"""Typography and colours of the acceptance report.

One embedded font family (DejaVu Sans, shipped with matplotlib, full Unicode: µ, σ, ±, °, ≤)
for body text, tables and plot lettering, so that every page reads the same and ``pdftotext``
extracts it exactly. Verdict colours are always paired with words (never colour alone).
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from reportlab.lib import colors
from reportlab.lib.enums import TA_CENTER, TA_LEFT
from reportlab.lib.styles import ParagraphStyle
from reportlab.lib.units import mm

FONT_REGULAR = "BenchrunSans"
FONT_BOLD = "BenchrunSans-Bold"
FONT_ITALIC = "BenchrunSans-Oblique"
FONT_MONO = "BenchrunMono"

PAGE_MARGIN = 18 * mm

INK = colors.HexColor("#1a1a1a")
MUTED = colors.HexColor("#5a5a5a")
RULE = colors.HexColor("#9aa3ad")
HEADER_BG = colors.HexColor("#dfe6ee")
ZEBRA_BG = colors.HexColor("#f4f6f8")
ACCENT = colors.HexColor("#1f4e79")

#: Background and text colour per verdict or grade. Words are always printed too.
VERDICT_COLOURS = {
    "conforming": (colors.HexColor("#e3f1e3"), colors.HexColor("#1d5c1d")),
    "non-conforming": (colors.HexColor("#f8d7d3"), colors.HexColor("#8b1a10")),
    "indeterminate": (colors.HexColor("#fdecc4"), colors.HexColor("#7a4d00")),
    "invalid": (colors.HexColor("#e2e2e2"), colors.HexColor("#3d3d3d")),
    "accept": (colors.HexColor("#e3f1e3"), colors.HexColor("#1d5c1d")),
    "reject": (colors.HexColor("#f8d7d3"), colors.HexColor("#8b1a10")),
}

#: Plot colours (colour-blind safe pairs, common practice).
PLOT_CURRENT = "#1f4e79"
PLOT_VOLTAGE = "#b8651b"
PLOT_LIMIT = "#8b1a10"
PLOT_MARK = "#2e7d32"


@lru_cache(maxsize=1)
def register_fonts() -> None:
    """Register the DejaVu family with reportlab (once per process)."""
    import matplotlib
    from reportlab.lib.fonts import addMapping
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    ttf = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    pdfmetrics.registerFont(TTFont(FONT_REGULAR, str(ttf / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont(FONT_BOLD, str(ttf / "DejaVuSans-Bold.ttf")))
    pdfmetrics.registerFont(TTFont(FONT_ITALIC, str(ttf / "DejaVuSans-Oblique.ttf")))
    pdfmetrics.registerFont(TTFont(FONT_MONO, str(ttf / "DejaVuSansMono.ttf")))
    addMapping(FONT_REGULAR, 0, 0, FONT_REGULAR)
    addMapping(FONT_REGULAR, 1, 0, FONT_BOLD)
    addMapping(FONT_REGULAR, 0, 1, FONT_ITALIC)
    addMapping(FONT_REGULAR, 1, 1, FONT_BOLD)


@lru_cache(maxsize=1)
def paragraph_styles() -> dict[str, ParagraphStyle]:
    """Named paragraph styles of the report."""
    register_fonts()
    base = ParagraphStyle(
        "body", fontName=FONT_REGULAR, fontSize=9.5, leading=13, textColor=INK, alignment=TA_LEFT
    )
    return {
        "body": base,
        "small": ParagraphStyle("small", parent=base, fontSize=8, leading=10.5),
        "muted": ParagraphStyle("muted", parent=base, fontSize=8, leading=10.5, textColor=MUTED),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.5, leading=9.2),
        "cell_bold": ParagraphStyle("cell_bold", parent=base, fontName=FONT_BOLD, fontSize=7.5,
                                    leading=9.2),
        "mono": ParagraphStyle("mono", parent=base, fontName=FONT_MONO, fontSize=7, leading=9),
        "h1": ParagraphStyle("h1", parent=base, fontName=FONT_BOLD, fontSize=15, leading=19,
                             spaceBefore=4, spaceAfter=8, textColor=ACCENT),
        "h2": ParagraphStyle("h2", parent=base, fontName=FONT_BOLD, fontSize=11.5, leading=15,
                             spaceBefore=10, spaceAfter=5, textColor=ACCENT),
        "h4": ParagraphStyle("h4", parent=base, fontName=FONT_BOLD, fontSize=8, leading=11,
                             spaceBefore=4, spaceAfter=2),
        "h3": ParagraphStyle("h3", parent=base, fontName=FONT_BOLD, fontSize=9.5, leading=13,
                             spaceBefore=6, spaceAfter=3),
        "title": ParagraphStyle("title", parent=base, fontName=FONT_BOLD, fontSize=22,
                                leading=27, textColor=ACCENT, spaceAfter=4),
        "subtitle": ParagraphStyle("subtitle", parent=base, fontSize=12, leading=16,
                                   textColor=MUTED, spaceAfter=14),
        "disposition": ParagraphStyle("disposition", parent=base, fontName=FONT_BOLD,
                                      fontSize=20, leading=26, alignment=TA_CENTER),
        "caution": ParagraphStyle("caution", parent=base, fontSize=8.5, leading=11.5),
    }
