"""The lots page, a lot's page, a shot's waveform, the signed report and its verification."""

from __future__ import annotations

import math
from collections import defaultdict
from typing import Any

from flask import Blueprint, Response, abort, render_template, request, send_file, url_for

from benchrun.errors import BenchrunError
from benchrun.store.live import physical_waveform
from benchrun.store.raw import RawRecord
from benchrun.web.app import ext, require
from benchrun.web.catalog import Lot, LotRow, safe_name
from benchrun.web.plots import waveform_png

bp = Blueprint("lots", __name__)
PAGE_SIZE = 50
SORT_KEYS = {
    "started": lambda r: r.started or "", "finished": lambda r: r.finished or "",
    "part": lambda r: r.part, "lot": lambda r: r.lot, "status": lambda r: r.status,
    "disposition": lambda r: r.disposition or "", "signer": lambda r: r.signer or "",
    "run": lambda r: r.run_id,
}


def _lot_or_404(run_id: str) -> Lot:
    if not safe_name(run_id):
        abort(404, "no such lot")
    lot = ext("catalog").lot(run_id)
    if lot is None:
        abort(404, "no such lot")
    return lot


def _filtered(rows: list[LotRow], args: Any) -> list[LotRow]:
    part = args.get("part", "").strip()
    disposition = args.get("disposition", "").strip()
    since, until = args.get("from", "").strip(), args.get("to", "").strip()
    out = []
    for row in rows:
        if part and row.part != part:
            continue
        if disposition == "none" and row.disposition:
            continue
        if disposition and disposition != "none" and row.disposition != disposition:
            continue
        day = (row.started or "")[:10]
        if since and day < since:
            continue
        if until and day > until:
            continue
        out.append(row)
    return out


@bp.route("/")
def lots() -> Any:
    require("read")
    catalog = ext("catalog")
    all_rows = catalog.lots()
    rows = _filtered(all_rows, request.args)
    sort = request.args.get("sort", "started")
    if sort not in SORT_KEYS:
        sort = "started"
    descending = request.args.get("order", "desc") != "asc"
    rows.sort(key=SORT_KEYS[sort], reverse=descending)
    pages = max(1, math.ceil(len(rows) / PAGE_SIZE))
    try:
        page = min(max(1, int(request.args.get("page", "1"))), pages)
    except ValueError:
        page = 1
    shown = rows[(page - 1) * PAGE_SIZE: page * PAGE_SIZE]
    verifier = ext("verifier")
    status = {}
    benches = catalog.benches(shown)
    for row in shown:
        lot = catalog.lot(row.run_id) if row.report_id else None
        outcome = verifier.cached(lot) if lot is not None else None
        status[row.run_id] = ("none" if not row.report_id else
                              "unchecked" if outcome is None else
                              "ok" if outcome.ok else "fail")
    args = {k: v for k, v in request.args.items() if k in ("part", "disposition", "from", "to")}

    def link(**changes: Any) -> str:
        return url_for("lots.lots", **{**args, "sort": sort,
                                       "order": "desc" if descending else "asc", **changes})

    return render_template(
        "lots.html", rows=shown, total=len(rows), all_count=len(all_rows), page=page,
        pages=pages, sort=sort, descending=descending, link=link, args=args, status=status,
        benches=benches, parts=sorted({r.part for r in all_rows}),
        dispositions=sorted({r.disposition for r in all_rows if r.disposition}))


@bp.route("/lots/<run_id>")
def lot(run_id: str) -> Any:
    require("read")
    lot = _lot_or_404(run_id)
    view = ext("data").lot_view(lot)
    ids = ext("catalog").shot_ids(lot.row)
    by_device: dict[str, list[Any]] = defaultdict(list)
    for shot in view.shots:
        by_device[shot.serial].append(shot)
    conditions = sorted({(s.point.index, s.point.label) for s in view.shots})
    return render_template("lot.html", lot=lot, view=view, by_device=by_device, ids=ids,
                           conditions=conditions, verification=ext("verifier").cached(lot),
                           has_report=ext("verifier").report_file(lot) is not None)


@bp.route("/lots/<run_id>/shots/<int:shot_id>")
def shot(run_id: str, shot_id: int) -> Any:
    require("read")
    lot = _lot_or_404(run_id)
    shot = ext("catalog").shot(lot.row, shot_id)
    if shot is None:
        abort(404, "no such shot")
    return render_template("shot.html", lot=lot, shot=shot, shot_id=shot_id)


@bp.route("/lots/<run_id>/shots/<int:shot_id>.png")
def shot_png(run_id: str, shot_id: int) -> Any:
    require("read")
    lot = _lot_or_404(run_id)
    shot = ext("catalog").shot(lot.row, shot_id)
    if shot is None:
        abort(404, "no such shot")
    if lot.raw_path is None:
        abort(404, "the raw record of this lot is not reachable from this server")
    try:
        with RawRecord(lot.raw_path, "r") as raw:
            t, v, i = physical_waveform(raw.read_shot(shot.raw_ref))
    except (BenchrunError, KeyError, OSError) as exc:
        abort(404, f"the shot cannot be read from the raw record: {exc}")
    options = lot.manifest.get("analysis_options") or {}
    title = (f"{shot.serial}  {shot.point.label}  repeat {shot.repeat + 1}"
             f"  attempt {shot.attempt + 1}")
    png = waveform_png(t, v, i, shot.metrics, title,
                       fit_high=float(options.get("fit_high", 0.9)))
    return Response(png, mimetype="image/png")


@bp.route("/lots/<run_id>/report.pdf")
def report(run_id: str) -> Any:
    require("read")
    lot = _lot_or_404(run_id)
    path = ext("verifier").report_file(lot)
    if path is None:
        abort(404, "no signed report of this lot is reachable from this server")
    return send_file(path, mimetype="application/pdf", as_attachment=True,
                     download_name=f"{lot.row.run_id}-report.pdf")


@bp.route("/lots/<run_id>/verify", methods=["POST"])
def verify(run_id: str) -> Any:
    require("verify")
    lot = _lot_or_404(run_id)
    outcome = ext("verifier").verify(lot)
    return render_template("verify.html", lot=lot, outcome=outcome, uploaded=False)
