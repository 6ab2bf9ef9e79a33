"""Signed characterisation report: datasheet-style curves, fitted trends, flagged points.

Layout: title and safety caution; what was swept; one figure per metric (Qrr, Irrm, trr, Err,
softness) with three panels — against IF, against di/dt, against T — each point the mean of
its valid shots with an error bar of its Type A standard uncertainty s/√n (GUM 4.2; no bar
with one shot), the fitted trend drawn through it; the table of fits (model, exponent or
temperature coefficient with its standard error, %/K); the fitted surfaces y(IF, VR, di/dt, T)
of :mod:`benchrun.characterize.fits` (exponents and temperature coefficient per kelvin, relative
and absolute, with standard errors, residual scatter and the measured ranges); the points
carrying flags.  The PDF
embeds the fits and points as JSON and is signed through the report package's signing entry
point (:func:`benchrun.report.sign.sign_pdf_bytes`).
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from benchrun.analysis.metrics_meta import METRICS
from benchrun.characterize.curves import CURVE_METRICS, Trend, fit_trends
from benchrun.characterize.fits import AXIS_SYMBOL, MODEL_TEXT, SurfaceFit, metric_surfaces
from benchrun.records import ShotResult
from benchrun.units import format_si

__all__ = ["CAUTION", "render_characterization"]

CAUTION = (
    "Caution: double-pulse testing uses high voltage and stored energy that can kill. Follow "
    "local electrical-safety codes and licensed practice; this report does not replace them."
)

_AXIS_LABEL = {"forward_current_A": ("IF", "A"), "didt_A_per_s": ("di/dt", "A/s"),
               "temperature_K": ("T", "K")}


def _points(shots: Sequence[ShotResult], metric: str, trend: Trend) -> list[tuple]:
    """(x, mean, s/√n) per x of the trend, from the valid shots matching its held conditions."""
    held = dict(trend.held)
    out: dict[float, list[float]] = {}
    for s in shots:
        if not s.valid or s.metrics.get(metric) is None:
            continue
        if any(round(float(getattr(s.point, k) or 0.0), 6) != v for k, v in held.items()):
            continue
        x = (s.conditions.get("didt_A_per_s") if trend.axis == "didt_A_per_s"
             else getattr(s.point, trend.axis))
        if x is None:
            continue
        key = min(trend.x, key=lambda v: abs(v - float(x)))
        out.setdefault(key, []).append(float(s.metrics[metric]))
    rows = []
    for x, ys in sorted(out.items()):
        u = float(np.std(ys, ddof=1) / math.sqrt(len(ys))) if len(ys) > 1 else 0.0
        rows.append((x, float(np.mean(ys)), u))
    return rows


def _figure(shots: Sequence[ShotResult], metric: str, trends: list[Trend]) -> bytes:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 3, figsize=(7.2, 2.3), constrained_layout=True)
    unit = METRICS[metric].unit
    for ax, axis in zip(axes, _AXIS_LABEL, strict=True):
        name, xunit = _AXIS_LABEL[axis]
        for tr in [t for t in trends if t.metric == metric and t.axis == axis][:4]:
            pts = _points(shots, metric, tr)
            if not pts:
                continue
            x, y, u = (np.array(v) for v in zip(*pts, strict=True))
            label = ", ".join(format_si(v, {"temperature_K": "K", "bus_voltage_V": "V",
                                            "forward_current_A": "A",
                                            "gate_resistance_ohm": "Ω",
                                            "didt_A_per_s": "A/s"}.get(k, ""), 3)
                              for k, v in tr.held if v)
            line = ax.errorbar(x, y, yerr=u, fmt="o", ms=3, capsize=2, label=label)
            xs = np.linspace(min(tr.x), max(tr.x), 50)
            ys = (tr.ref_value * (xs / tr.x_ref) ** tr.slope if tr.model == "power"
                  else tr.ref_value + tr.slope * (xs - tr.x_ref))
            ax.plot(xs, ys, "-", lw=0.8, color=line[0].get_color())
        ax.set_xlabel(f"{name} [{xunit}]", fontsize=7)
        ax.set_ylabel(f"{METRICS[metric].name} [{unit}]", fontsize=7)
        ax.tick_params(labelsize=6)
        if axis != "temperature_K" and ax.lines:
            from matplotlib.ticker import NullFormatter

            ax.set_xscale("log")
            ax.set_yscale("log")
            for scale in (ax.xaxis, ax.yaxis):  # decade labels only: no overprinted minors
                scale.set_minor_formatter(NullFormatter())
        if ax.lines:
            ax.legend(fontsize=5)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=150)
    plt.close(fig)
    return buf.getvalue()


def _trend_row(tr: Trend) -> list[str]:
    unit = METRICS[tr.metric].unit
    held = ", ".join(f"{k.split('_')[0]}={v:g}" for k, v in tr.held)
    if tr.model == "power":
        law = f"∝ {_AXIS_LABEL[tr.axis][0]}^b"
        slope = f"b = {tr.slope:.3f}" + ("" if tr.u_slope is None else f" ± {tr.u_slope:.3f}")
        pct = ""
    else:
        law = "linear in T"
        slope = (f"{format_si(tr.slope, unit + '/K', 3)}"
                 + ("" if tr.u_slope is None else f" ± {format_si(tr.u_slope, unit + '/K', 2)}"))
        pct = f"{tr.percent_per_kelvin:.3f} %/K" if tr.percent_per_kelvin is not None else ""
    return [METRICS[tr.metric].name, law, held, str(len(tr.x)), slope, pct]


SURFACE_TEXT = (
    "Fitted surfaces: " + MODEL_TEXT + " (separable power law in IF, VR and di/dt, exponential "
    "in T; common practice for scaling switching data between operating points), least "
    "squares in ln y over one point per device and test point (valid shots), IF_ref, VR_ref "
    "and di/dt_ref the geometric means and T_ref the mean of the points. c is the temperature "
    "coefficient relative to the value (100·c %/K); c·y_ref the absolute one at T_ref. "
    "± one standard error (covariance s² times the inverse of X'X, n − p degrees of freedom); "
    "scatter: the "
    "residual standard deviation of ln y. Valid over the measured ranges only; an axis not "
    "swept (its values span less than 30 %, or 10 K) is held."
)


def _pm(value: float | None, se: float | None, fmt: str) -> str:
    if value is None:
        return "held"
    return format(value, fmt) + ("" if se is None else " ± " + format(se, fmt))


def _surface_rows(fits: Sequence[SurfaceFit]) -> list[list[str]]:
    rows = [["metric", "part / lot", "n", "y_ref", "b IF", "b VR", "b di/dt", "c %/K",
             "dy/dT at T_ref", "scat\u00adter", "measured ranges"]]
    for f in fits:
        unit = METRICS[f.quantity].unit if f.quantity in METRICS else f.unit
        se_t = f.standard_error("temperature_K")
        c_abs = f.absolute_per_kelvin
        ranges = "; ".join(
            f"{AXIS_SYMBOL[r.axis]} {format_si(r.minimum, _RANGE_UNIT[r.axis], 3)}"
            + ("" if r.n_distinct < 2 else f"–{format_si(r.maximum, _RANGE_UNIT[r.axis], 3)}")
            for r in f.ranges)
        rows.append([
            METRICS[f.quantity].name if f.quantity in METRICS else f.quantity,
            f"{f.part} {f.lot}", str(f.n_points), format_si(f.y_ref, unit, 3),
            _pm(f.coefficient("forward_current_A"), f.standard_error("forward_current_A"),
                ".3f"),
            _pm(f.coefficient("vr_V"), f.standard_error("vr_V"), ".3f"),
            _pm(f.coefficient("didt_A_per_s"), f.standard_error("didt_A_per_s"), ".3f"),
            _pm(f.percent_per_kelvin, None if se_t is None else 100 * se_t, ".3f"),
            "held" if c_abs is None else format_si(c_abs, unit + "/K", 3),
            "—" if f.residual_sd is None else f"{100 * f.residual_sd:.1f} %",
            ranges])
    return rows


_RANGE_UNIT = {"forward_current_A": "A", "vr_V": "V", "didt_A_per_s": "A/s",
               "temperature_K": "K"}


def _small(style: Any) -> Any:
    from reportlab.lib.styles import ParagraphStyle

    return ParagraphStyle("small", parent=style, fontSize=6.5, leading=8)


#: First cells of the verdict rows of the qualification tables (set in bold).
_VERDICT_ROWS = ("outcome", "verdict at ", "worst-case snappiness step", "device verdict")


def _grid(rows: Sequence[Sequence[str]], widths: Sequence[float], style: Any) -> Any:
    """A table of small wrapped cells with a grey grid; a one-cell row spans the table and is
    shaded (a section heading inside the table); verdict rows are bold."""
    from xml.sax.saxutils import escape

    from reportlab.lib import colors
    from reportlab.platypus import Paragraph, Table, TableStyle

    n = len(widths)
    bold = style.clone("bold", fontName="Helvetica-Bold")
    cells = [[Paragraph(escape(str(c)), bold if i == 0 or str(row[0]).startswith(_VERDICT_ROWS)
                        else style) for c in row] + [""] * (n - len(row))
             for i, row in enumerate(rows)]
    commands: list[tuple] = [("GRID", (0, 0), (-1, -1), 0.25, colors.grey),
                             ("VALIGN", (0, 0), (-1, -1), "TOP"),
                             ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#e8e8e8"))]
    for i, row in enumerate(rows):
        if i and len(row) == 1:
            commands += [("SPAN", (0, i), (-1, i)),
                         ("BACKGROUND", (0, i), (-1, i), colors.HexColor("#f2f2f2"))]
    table = Table(cells, repeatRows=1, colWidths=list(widths))
    table.setStyle(TableStyle(commands))
    return table


def _qualification_story(q: Any, styles: Any) -> list[Any]:
    """Section "Qualification verdicts": the worst-case snappiness step and the limits at
    their conditions (:mod:`benchrun.characterize.qualification_tables`)."""
    from xml.sax.saxutils import escape

    from reportlab.platypus import KeepTogether, Paragraph, Spacer

    from benchrun.characterize.qualification_tables import (
        condition_reasons,
        condition_rows,
        device_groups,
        worst_case_limits_text,
        worst_case_rows,
    )

    body, small = styles["BodyText"], _small(styles["BodyText"])
    story: list[Any] = [Paragraph("Qualification verdicts", styles["Heading2"]),
                        Paragraph(escape(
                            "The limits file applied to one test point per limits condition, "
                            "as the acceptance grading does (limits, GUM budgets, decision "
                            "rule); the sweep's other points are characterisation data and are "
                            "not graded. Repeats and attempts are numbered from 0, as in "
                            "curves.csv."), body)]
    if q.lot is None:
        story.append(Paragraph(escape(f"Not graded: {q.not_graded}"), body))
        return story
    story += [Paragraph(escape(f"• {g.condition}: {g.how}"), body) for g in q.selection]
    heading = Paragraph("Worst-case snappiness step", styles["Heading3"])
    for group in device_groups(q.serials):
        other = (451.0 - 120.0 - 95.0) / max(len(group), 1)
        table = _grid(worst_case_rows(q, group), [120.0, 95.0] + [other] * len(group), small)
        story += [KeepTogether([heading, table]) if heading is not None else table,
                  Spacer(1, 3)]
        heading = None
    story.append(Paragraph(escape(worst_case_limits_text(q)), small))
    story += [Paragraph(escape(f"• {w.serial}: {w.reason}"), small) for w in q.worst_case]
    names = ", ".join(q.nominal_conditions) or "—"
    heading = Paragraph(escape(f"Limits at their conditions ({names} and the worst case)"),
                        styles["Heading3"])
    for group in device_groups(q.serials):
        other = (451.0 - 100.0 - 55.0) / max(len(group), 1)
        table = _grid(condition_rows(q, group), [100.0, 55.0] + [other] * len(group), small)
        story += [KeepTogether([heading, table]) if heading is not None else table,
                  Spacer(1, 3)]
        heading = None
    story += [Paragraph(escape(f"• {line}"), small) for line in condition_reasons(q)]
    story.append(Paragraph(escape(
        "Value ± U: the graded value (mean of the valid shots, or the worst shot where the "
        "limit says so) with its expanded uncertainty. " + q.lot.decision_rule), small))
    return story


def render_characterization(
    shots: Sequence[ShotResult],
    out_pdf: str | Path,
    signer: Any,
    *,
    title: str,
    flagged: Sequence[str] = (),
    notes: Sequence[str] = (),
    conditions: Sequence[Sequence[str]] = (),
    qualification: Any = None,
    verification: dict[str, Any] | None = None,
) -> tuple[Path, list[Trend]]:
    """Write the signed characterisation PDF; returns its path and the fitted trends.
    ``conditions``: an optional table (header row first) of the test points' requested
    and measured conditions, printed after the notes.  ``qualification``: the
    :class:`~benchrun.characterize.qualification.Qualification` of the run, shown after the
    notes (section "Qualification verdicts") and attached as JSON.  ``verification``: more
    entries of the attachment, what verification compares
    (:func:`benchrun.characterize.verify.verification_data`: manifest, shot rows)."""
    from xml.sax.saxutils import escape

    from reportlab.lib import colors
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.styles import getSampleStyleSheet
    from reportlab.platypus import Image, Paragraph, SimpleDocTemplate, Spacer, Table, TableStyle

    from benchrun.report.sign import SignatureBox, sign_pdf_bytes, write_signed_pdf

    trends = fit_trends(shots, CURVE_METRICS)
    styles = getSampleStyleSheet()
    body = styles["BodyText"]
    story: list[Any] = [Paragraph(escape(title), styles["Title"]),
                        Paragraph(escape(CAUTION), body), Spacer(1, 4)]
    story += [Paragraph(escape(n), body) for n in notes]
    story.append(Paragraph(escape(
        "Points: mean of the valid shots, error bar s/√n (GUM 4.2, Type A). Trends: power law "
        "in IF and in di/dt (least squares in log-log), straight line in T with its "
        "coefficient per kelvin; ± one standard error of the fit (n − 2 degrees of "
        "freedom; none with two points)."), body))
    if qualification is not None:
        story += _qualification_story(qualification, styles)
    if conditions:
        cells = [[Paragraph(escape(str(c)), _small(body)) for c in row] for row in conditions]
        grid = Table(cells, repeatRows=1, colWidths=[190, 70, 80, 90, 60])
        grid.setStyle(TableStyle([("GRID", (0, 0), (-1, -1), 0.25, colors.grey),
                                  ("VALIGN", (0, 0), (-1, -1), "TOP")]))
        story += [Paragraph("Test points and di/dt", styles["Heading2"]), grid]
    for metric in CURVE_METRICS:
        if not any(t.metric == metric for t in trends):
            continue
        story.append(Paragraph(escape(METRICS[metric].name), styles["Heading3"]))
        png = _figure(shots, metric, trends)
        story.append(Image(io.BytesIO(png), width=510, height=163))
    rows = [["metric", "model", "held", "n", "exponent / coefficient", "%/K"]]
    rows += [_trend_row(t) for t in trends]
    table = Table(rows, repeatRows=1)
    table.setStyle(TableStyle([("FONTSIZE", (0, 0), (-1, -1), 6),
                               ("GRID", (0, 0), (-1, -1), 0.25, colors.grey)]))
    story += [Paragraph("Fitted trends", styles["Heading2"]), table]
    surfaces, not_fitted = metric_surfaces(shots, CURVE_METRICS)
    story += [Paragraph("Fitted surfaces and temperature coefficients", styles["Heading2"]),
              Paragraph(escape(SURFACE_TEXT), body), Spacer(1, 3)]
    if surfaces:
        cell = styles["BodyText"].clone("cell", fontSize=6, leading=7)
        srows = [[Paragraph(escape(c), cell) for c in row] for row in _surface_rows(surfaces)]
        stable = Table(srows, repeatRows=1,
                       colWidths=[32, 48, 20, 36, 44, 44, 44, 44, 40, 32, 68])
        stable.setStyle(TableStyle([("GRID", (0, 0), (-1, -1), 0.25, colors.grey),
                                    ("VALIGN", (0, 0), (-1, -1), "TOP")]))
        story.append(stable)
    story += [Paragraph(escape(f"Not fitted: {r}"), body) for r in not_fitted]
    story.append(Paragraph("Flagged points", styles["Heading2"]))
    story += [Paragraph(escape(f"• {f}"), body) for f in flagged] or [
        Paragraph("None.", body)]
    story.append(Spacer(1, 70))  # room for the visible signature
    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, title=title)
    doc.build(story)
    pdf = buf.getvalue()
    last = doc.page - 1  # reportlab's page counter after build: the last page (1-based)
    box = SignatureBox(last, 60.0, 40.0, 300.0, 100.0)
    attachment = {
        "kind": "characterization",
        "trends": [{"metric": t.metric, "axis": t.axis, "model": t.model,
                    "held": dict(t.held), "x": list(t.x), "y": list(t.y), "x_ref": t.x_ref,
                    "ref_value": t.ref_value, "slope": t.slope, "u_slope": t.u_slope}
                   for t in trends],
        "surfaces": [{"metric": f.quantity, "part": f.part, "lot": f.lot,
                      "reference": dict(f.reference), "terms": list(f.terms),
                      "coefficients": list(f.coefficients),
                      "standard_errors": [f.standard_error(None)]
                      + [f.standard_error(a) for a in f.terms],
                      "percent_per_kelvin": f.percent_per_kelvin,
                      "absolute_per_kelvin": f.absolute_per_kelvin,
                      "n_points": f.n_points, "residual_sd": f.residual_sd,
                      "ranges": {r.axis: [r.minimum, r.maximum] for r in f.ranges}}
                     for f in surfaces],
        "flagged": list(flagged),
    }
    if qualification is not None:
        attachment["qualification"] = qualification.to_dict()
    attachment.update(verification or {})
    signed = sign_pdf_bytes(pdf, signer, box, attachment=attachment,
                            reason="Characterisation report approved")
    out = write_signed_pdf(out_pdf, signed)
    return out, trends
