"""Report sections as reportlab platypus flowables, built from :class:`ReportContent`.

Tables are ``LongTable`` objects with a repeated header row so they break cleanly across
pages. A verdict or grade is always written in words; colour only reinforces it.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any
from xml.sax.saxutils import escape

from reportlab.lib import colors
from reportlab.lib.units import mm
from reportlab.pdfbase.pdfmetrics import stringWidth
from reportlab.platypus import (
    CondPageBreak,
    Flowable,
    KeepTogether,
    LongTable,
    Paragraph,
    Spacer,
    Table,
    TableStyle,
)

from benchrun.report.facts import DeviceLine, ReportContent, label_unit
from benchrun.report.facts_numbers import value_with_u
from benchrun.report.pages_style import (
    FONT_BOLD,
    FONT_REGULAR,
    HEADER_BG,
    INK,
    RULE,
    VERDICT_COLOURS,
    ZEBRA_BG,
    paragraph_styles,
)


def P(text: str, style: str = "body") -> Paragraph:  # noqa: N802 - reads like markup
    """A paragraph of plain text (escaped) in a named style."""
    return Paragraph(escape(text), paragraph_styles()[style])


def PM(markup: str, style: str = "body") -> Paragraph:  # noqa: N802
    """A paragraph of reportlab mini-markup (caller escapes any data)."""
    return Paragraph(markup, paragraph_styles()[style])


def base_table_style(n_rows: int, *, zebra: bool = True, font_size: float = 7.5) -> list:
    cmds: list[tuple] = [
        ("FONT", (0, 0), (-1, -1), FONT_REGULAR, font_size),
        ("FONT", (0, 0), (-1, 0), FONT_BOLD, font_size),
        ("TEXTCOLOR", (0, 0), (-1, -1), INK),
        ("BACKGROUND", (0, 0), (-1, 0), HEADER_BG),
        ("LINEBELOW", (0, 0), (-1, 0), 0.8, RULE),
        ("LINEBELOW", (0, -1), (-1, -1), 0.8, RULE),
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("TOPPADDING", (0, 0), (-1, -1), 1.6),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 1.6),
        ("LEFTPADDING", (0, 0), (-1, -1), 3),
        ("RIGHTPADDING", (0, 0), (-1, -1), 3),
    ]
    if zebra:
        for row in range(2, n_rows, 2):
            cmds.append(("BACKGROUND", (0, row), (-1, row), ZEBRA_BG))
    return cmds


def _is_digest(text: str) -> bool:
    """A SHA-256 in hex: set in the monospaced font so that all 64 digits fit one line."""
    return len(text) == 64 and all(c in "0123456789abcdef" for c in text)


def simple_table(
    rows: Sequence[Sequence[Any]],
    widths: Sequence[float] | None = None,
    *,
    wrap: bool = True,
    font_size: float = 7.5,
    mono: Sequence[int] = (),
) -> Flowable:
    """A header + rows table; cells are wrapped as paragraphs when ``wrap``; columns listed in
    ``mono`` (hashes) are set in the monospaced font."""
    if not rows:
        return P("(none)", "muted")
    style = paragraph_styles()["cell"]
    bold = paragraph_styles()["cell_bold"]
    fixed = paragraph_styles()["mono"]
    data = []
    for r, row in enumerate(rows):
        if wrap:
            data.append([
                c if isinstance(c, Flowable)
                else Paragraph(escape(str(c)), bold if r == 0 else
                               fixed if k in mono or _is_digest(str(c)) else style)
                for k, c in enumerate(row)
            ])
        else:
            data.append([str(c) for c in row])
    table = LongTable(data, colWidths=widths, repeatRows=1, hAlign="LEFT")
    table.setStyle(TableStyle(base_table_style(len(data), font_size=font_size)))
    return table


def key_value_table(pairs: Sequence[tuple[str, str]], widths: tuple[float, float], *,
                    mono_keys: Sequence[str] = ()) -> Table:
    style = paragraph_styles()
    data = [[Paragraph(escape(k), style["cell_bold"]),
             Paragraph(escape(v), style["mono" if k in mono_keys else "cell"])]
            for k, v in pairs]
    table = Table(data, colWidths=widths, hAlign="LEFT")
    table.setStyle(TableStyle([
        ("FONT", (0, 0), (-1, -1), FONT_REGULAR, 7.5),  # no base-14 font in the file
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("LINEBELOW", (0, 0), (-1, -1), 0.3, RULE),
        ("TOPPADDING", (0, 0), (-1, -1), 2.5),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 2.5),
    ]))
    return table


def disposition_banner(disposition: str, width: float) -> Table:
    bg, fg = VERDICT_COLOURS.get(disposition, (colors.white, INK))
    style = paragraph_styles()["disposition"]
    cell = Paragraph(f'<font color="{fg.hexval()}">Lot disposition: {escape(disposition)}</font>',
                     style)
    table = Table([[cell]], colWidths=[width])
    table.setStyle(TableStyle([
        ("FONT", (0, 0), (-1, -1), FONT_REGULAR, 7.5),  # no base-14 font in the file
        ("BACKGROUND", (0, 0), (-1, -1), bg),
        ("BOX", (0, 0), (-1, -1), 1.2, fg),
        ("TOPPADDING", (0, 0), (-1, -1), 8),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 10),
    ]))
    return table


def _cell_text(cell: Any, unit: str, scale: float) -> str:
    """``value ± U`` in the column's unit; a grade other than conforming in words below."""
    if cell is None or cell.value is None:
        text = "—"
    else:
        text = value_with_u(cell.value, cell.expanded_u, unit, scale)
    if cell is not None and cell.grade and cell.grade != "conforming":
        text += f"\n{cell.grade}"
    return text


def _fitted_sizes(rows: list[list[str]], widths: list[float], size: float,
                  smallest: float = 4.5) -> list[float]:
    """Per column, the largest font size (≤ ``size``) at which every line fits its width."""
    sizes = []
    for c, width in enumerate(widths):
        room = width - 6  # left and right padding
        widest = max((stringWidth(line, FONT_BOLD, 1.0) for row in rows
                      for line in str(row[c]).split("\n")), default=0.0)
        fit = room / widest if widest > 0 else size
        sizes.append(max(min(size, fit), smallest))
    return sizes


def device_table(content: ReportContent, width: float) -> Flowable:
    """Per device and condition: value ± U and grade of each graded metric, bin, verdict.

    One unit per metric column (in the header); plain-string cells (no paragraphs) keep a
    1000-row table fast to lay out, and each column's font is sized so its widest line fits.
    """
    keys = content.metric_columns
    units = content.column_units
    header = ["Serial", "Condition"]
    for k in keys:
        label, unit = label_unit(k)
        shown = units.get(k, (1.0, unit))[1]
        header.append(f"{label} ({shown})" if shown else label)
    header += ["Bin", "Verdict"]
    rows: list[list[str]] = [header]
    cmds: list[tuple] = []
    for r, line in enumerate(content.devices, start=1):
        row = [line.serial, line.condition]
        for c, key in enumerate(keys, start=2):
            cell = line.cells.get(key)
            unit = label_unit(key)[1]
            row.append(_cell_text(cell, unit, units.get(key, (1.0, unit))[0]))
            if cell is not None and cell.grade in ("non-conforming", "indeterminate", "invalid"):
                bg, fg = VERDICT_COLOURS[cell.grade]
                cmds += [("BACKGROUND", (c, r), (c, r), bg), ("TEXTCOLOR", (c, r), (c, r), fg)]
        row += [line.bin or "—", line.verdict]
        rows.append(row)
        if line.verdict in VERDICT_COLOURS:
            bg, fg = VERDICT_COLOURS[line.verdict]
            v = len(row) - 1
            cmds += [("BACKGROUND", (v, r), (v, r), bg), ("TEXTCOLOR", (v, r), (v, r), fg)]
            if line.verdict != "conforming":
                cmds += [("FONTNAME", (0, r), (0, r), FONT_BOLD),
                         ("FONTNAME", (v, r), (v, r), FONT_BOLD)]
    n_metric = len(keys)
    fixed = [22 * mm, 16 * mm]
    tail = [12 * mm, 22 * mm]
    rest = max(width - sum(fixed) - sum(tail), 20 * mm)
    widths = fixed + [rest / max(n_metric, 1)] * n_metric + tail
    sizes = _fitted_sizes(rows, widths, 6.8)
    table = LongTable(rows, colWidths=widths, repeatRows=1, hAlign="LEFT")
    style = base_table_style(len(rows), font_size=6.8)
    style += [("ALIGN", (2, 0), (-1, -1), "LEFT")]
    for c, size in enumerate(sizes):
        style += [("FONTSIZE", (c, 0), (c, -1), size), ("LEADING", (c, 0), (c, -1), size * 1.2)]
    table.setStyle(TableStyle(style + cmds))
    return table


def non_conforming_list(devices: Sequence[DeviceLine], width: float) -> list[Flowable]:
    """Every device that is not conforming, named in words (also for colour-blind readers)."""
    out: list[Flowable] = []
    bad = [d for d in devices if d.verdict != "conforming" or d.bin == "unbinned"]
    if not bad:
        out.append(P("Every device at every condition is conforming and binned.", "body"))
        return out
    rows = [["Serial", "Condition", "Verdict", "Metrics not conforming", "Note"]]
    for d in bad:
        which = [
            f"{label_unit(k)[0]}: {c.grade}"
            for k, c in d.cells.items()
            if c.grade and c.grade != "conforming"
        ]
        rows.append([d.serial, d.condition, d.verdict, "; ".join(which) or "—", d.note])
    out.append(simple_table(rows, [22 * mm, 18 * mm, 26 * mm, 42 * mm, width - 108 * mm]))
    return out


def section(title: str, level: int = 2) -> list[Flowable]:
    """A heading that is never left alone at the bottom of a page."""
    return [CondPageBreak(40 * mm), P(title, "h1" if level == 1 else "h2")]


def keep(*flowables: Flowable) -> KeepTogether:
    return KeepTogether(list(flowables))


def spacer(height_mm: float = 3) -> Spacer:
    return Spacer(1, height_mm * mm)
