"""Runs in progress, as their runners publish them through the results store."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, abort, jsonify, render_template, request

from benchrun.errors import StoreError
from benchrun.store.live import live_events, live_run, live_runs
from benchrun.web.app import ext, require
from benchrun.web.catalog import safe_name
from benchrun.web.plots import live_png

bp = Blueprint("live", __name__)


def _all_live() -> list[tuple[Any, Any]]:
    out = []
    seen: set[str] = set()
    catalog = ext("catalog")
    catalog.refresh()
    for store in catalog.stores:
        try:
            with store.connect() as conn:
                runs = live_runs(conn)
        except StoreError:  # a store written before the live tables existed
            continue
        for run in runs:
            if run.run_id not in seen:
                seen.add(run.run_id)
                out.append((store, run))
    return out


def _find(run_id: str) -> tuple[Any, Any]:
    if not safe_name(run_id):
        abort(404, "no such run")
    for store, run in _all_live():
        if run.run_id == run_id:
            return store, run
    abort(404, "no such run")


@bp.route("/live")
def runs() -> Any:
    require("live")
    return render_template("live_list.html", runs=[run for _s, run in _all_live()])


@bp.route("/live/<run_id>")
def run(run_id: str) -> Any:
    require("live")
    store, run = _find(run_id)
    with store.connect() as conn:
        events = live_events(conn, run_id)
    return render_template("live.html", run=run, events=events)


@bp.route("/live/<run_id>/state.json")
def state(run_id: str) -> Any:
    require("live")
    store, _run = _find(run_id)
    try:
        after = max(0, int(request.args.get("after", "0")))
    except ValueError:
        after = 0
    with store.connect() as conn:
        run = live_run(conn, run_id)
        events = live_events(conn, run_id, after)
    if run is None:
        abort(404, "no such run")
    last = run.last_shot or {}
    return jsonify({
        "state": run.state, "status": run.status_text, "serial": run.serial,
        "temperature_C": None if run.temperature_K is None else run.temperature_K - 273.15,
        "point": run.point_label, "done": run.done, "total": run.total, "eta_s": run.eta_s,
        "updated": run.updated,
        "last": None if not last else {"serial": last.get("serial"),
                                       "label": last.get("label"),
                                       "valid": last.get("valid"),
                                       "flags": last.get("flags")},
        "events": events,
    })


@bp.route("/live/<run_id>/last.png")
def last_png(run_id: str) -> Any:
    require("live")
    _store, run = _find(run_id)
    if not run.last_shot:
        abort(404, "no shot yet")
    return Response(live_png(run.last_shot), mimetype="image/png")
