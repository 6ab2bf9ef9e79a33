"""Part history (control charts across lots) and checking an uploaded report."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, abort, render_template, request

from benchrun.web.app import ext, require
from benchrun.web.catalog import safe_name
from benchrun.web.control import DEFAULT_BASELINE, NELSON_RULES
from benchrun.web.data import LRUCache
from benchrun.web.plots import control_png

bp = Blueprint("parts", __name__)
_CHARTS = LRUCache(256)  # rendered charts, keyed by everything drawn on them
PDF_MAGIC = b"%PDF-"


def _baseline() -> int:
    try:
        value = int(request.args.get("baseline", DEFAULT_BASELINE))
    except ValueError:
        return DEFAULT_BASELINE
    return min(max(value, 2), 10000)


def _part_or_404(part: str) -> str:
    if not safe_name(part) or part not in ext("data").parts():
        abort(404, "no such part")
    return part


@bp.route("/parts")
def parts() -> Any:
    require("read")
    return render_template("parts.html", parts=ext("data").parts())


@bp.route("/parts/<part>")
def history(part: str) -> Any:
    require("read")
    part = _part_or_404(part)
    baseline = _baseline()
    charts, limits, rows = ext("data").history(part, baseline)
    return render_template("history.html", part=part, charts=charts, limits=limits,
                           rows=rows, baseline=baseline, rules=NELSON_RULES)


@bp.route("/parts/<part>/<metric>/<condition>/<kind>.png")
def chart_png(part: str, metric: str, condition: str, kind: str) -> Any:
    require("read")
    part = _part_or_404(part)
    if kind not in ("mean", "spread") or not (safe_name(metric) and safe_name(condition)):
        abort(404, "no such chart")
    charts, _limits, _rows = ext("data").history(part, _baseline())
    chart = next((c for c in charts if c.metric == metric and c.condition == condition), None)
    if chart is None:
        abort(404, "no such chart")
    from benchrun.units import format_si

    sample = next((abs(p.mean) for p in chart.points if p.mean), 1.0)
    scaled = format_si(sample, chart.unit).split(" ")
    unit = scaled[1] if len(scaled) > 1 else chart.unit
    prefix_scale = (float(scaled[0]) / sample) if sample and len(scaled) > 1 else 1.0
    if kind == "mean":
        values, limits, signals = [p.mean for p in chart.points], chart.mean_limits, \
            chart.mean_signals
        title = f"{chart.name} at {chart.condition}: lot mean (individuals chart)"
    else:
        values = [p.spread for p in chart.points if p.spread is not None]
        limits, signals = chart.spread_limits, chart.spread_signals
        title = f"{chart.name} at {chart.condition}: spread between devices (standard deviation)"
    key = ("chart", part, metric, condition, kind, tuple(values), limits,
           tuple(s.index for s in signals))
    png = _CHARTS.get(key, lambda: control_png([p.lot for p in chart.points], values, limits,
                                               signals, title, prefix_scale, unit))
    return Response(png, mimetype="image/png")


@bp.route("/check", methods=["GET", "POST"])
def check() -> Any:
    require("verify")
    if request.method == "GET":
        return render_template("check.html", outcome=None, error=None)
    upload = request.files.get("report")
    if upload is None or not upload.filename:
        return render_template("check.html", outcome=None,
                               error="choose a signed report (PDF) to check"), 400
    pdf = upload.read()
    if not pdf.startswith(PDF_MAGIC):
        return render_template("check.html", outcome=None,
                               error="the file is not a PDF document"), 400
    cert_upload = request.files.get("certificate")
    cert = cert_upload.read() if cert_upload is not None and cert_upload.filename else None
    outcome = ext("verifier").verify_upload(pdf, cert)
    return render_template("verify.html", lot=None, outcome=outcome, uploaded=True,
                           filename=upload.filename)
