"""The facts a lot report adds when the lot was tested in several runs, on several benches
(pure: plain data in, :class:`ReportContent` out).

:func:`lot_content` takes the content :func:`benchrun.report.facts_gather.build_content` made
from the lot's counted shots (:class:`benchrun.report.lot_sources.LotRunView`) and states what
one run's report cannot: every run with its bench, status, times and the devices it counts
for; the retest rule and every superseded test; each run's instruments (identity strings,
IEEE 488.2 ``*IDN?``) and each bench's fixture; the run record per run, and which run's
limits file the lot was graded against.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import replace
from types import SimpleNamespace
from typing import Any

from benchrun.report.facts import ReportContent, new_report_id
from benchrun.report.facts_gather import _fixture_table, _thermal_rows
from benchrun.report.facts_tables import (
    NOT_RECORDED,
    ambient_text,
    traceability_table,
)

#: What a run's bench is called when the store recorded none (runs made before bench ids).
NO_BENCH = "not recorded"


def _bench(run: Any) -> str:
    return run.bench_id or NO_BENCH


def _window(runs: list[Any]) -> str:
    starts = sorted(str(r.started) for r in runs if r.started)
    ends = sorted(str(r.finished) for r in runs if r.finished)
    if starts and ends:
        return f"{starts[0]} to {ends[-1]}"
    return starts[0] if starts else ""


def _file_hash(run: Any, name: str) -> str | None:
    for entry in run.entries:
        if entry.get("name") == f"{run.run_id}/{name}":
            return str(entry.get("sha256"))
    return None


def runs_table(runs: list[Any]) -> list[list[str]]:
    """One row per run of the lot: bench, status, times, operator, devices and shots counted."""
    rows = [["Run", "Bench", "Status", "Started … finished", "Operator", "Devices counted",
             "Shots"]]
    for run in runs:
        times = " … ".join(str(t) for t in (run.started, run.finished) if t) or NOT_RECORDED
        rows.append([run.run_id, _bench(run), run.status or NOT_RECORDED, times,
                     str(run.manifest.get("operator") or NOT_RECORDED),
                     ", ".join(run.counted_devices) or "none (every device it tested was "
                     "tested again later)", str(run.counted_shots)])
    return rows


def superseded_table(superseded: list[dict[str, Any]]) -> list[list[str]]:
    """Every earlier test of a device that a later one replaced (empty: none)."""
    if not superseded:
        return []
    rows = [["Serial", "Superseded test: run", "Bench", "Shots", "Replaced by run"]]
    for item in superseded:
        rows.append([str(item["serial"]), str(item["run_id"]),
                     str(item.get("bench_id") or NO_BENCH), str(item.get("shots", "")),
                     str(item["replaced_by"])])
    return rows


def _fixture_tables(runs: list[Any], names: dict[Any, str]) -> list[list[str]]:
    """The fixture of every bench involved (once per bench), with each run's thermal rows."""
    rows: list[list[str]] = [["Item", "Value"]]
    seen: set[str] = set()
    for run in runs:
        bench = _bench(run)
        if bench in seen:
            continue
        seen.add(bench)
        table = _fixture_table(run.bench)[1:]
        table = [[f"bench {bench}", f"{v} (bench file of run {run.run_id})"] if k == "bench"
                 else [k, v] for k, v in table]
        if not any(r[0] == f"bench {bench}" for r in table):
            table.insert(0, [f"bench {bench}", f"run {run.run_id}"])
        rows += table + _thermal_rows(run.manifest.get("thermal"), names)
    return rows


def _record_table(content: ReportContent, lot: Any, runs: list[Any]) -> list[list[str]]:
    """Who, where, under which procedure and files each run was made; the limits graded
    against; software and signer."""
    benches = sorted({_bench(r) for r in runs})
    rows = [["Item", "Value"],
            ["lot", f"{lot.lot}: {len(runs)} run(s) on {len(benches)} bench(es) "
                    f"({', '.join(benches)}), combined from the results store "
                    f"{lot.store_url or NOT_RECORDED}"],
            ["report registered under", f"run {content.run_id} (the newest run that counts)"]]
    for run in runs:
        manifest = run.manifest
        procedure = manifest.get("procedure") or getattr(run.sequence, "name", "") or ""
        parts = [f"bench {_bench(run)}",
                 " to ".join(str(t) for t in (run.started, run.finished) if t) or NOT_RECORDED,
                 f"operator {manifest.get('operator') or NOT_RECORDED}",
                 f"ambient {ambient_text(manifest.get('ambient')) or NOT_RECORDED}",
                 f"procedure {procedure or NOT_RECORDED}",
                 f"sequence.yaml SHA-256 {_file_hash(run, 'sequence.yaml') or NOT_RECORDED}"]
        rows.append([f"run {run.run_id}", "; ".join(parts)])
    limits_hash = lot.limits_sha256
    if lot.limits_run_id is not None:
        anchor = next(r for r in runs if r.run_id == lot.limits_run_id)
        limits_hash = _file_hash(anchor, "limits.yaml")
        rows.append(["limits graded against",
                     f"limits.yaml of run {lot.limits_run_id} (the newest run that counts)"])
        others = [r.run_id for r in runs
                  if _file_hash(r, "limits.yaml") not in (None, limits_hash)]
        if others:
            rows.append(["runs made with another limits.yaml", ", ".join(others)])
    limits_rows = {r[0]: r[1] for r in content.record_table[1:]}
    rows += [["limits revision", limits_rows.get("limits revision", NOT_RECORDED)],
             ["limits.yaml SHA-256", limits_hash or NOT_RECORDED]]
    rows += [[k, v] for k, v in content.record_table[1:]
             if k in ("software", "analysis and grading code SHA-256",
                      "signer certificate SHA-256")]
    return rows


def lot_content(content: ReportContent, lot: Any, *, now: _dt.datetime) -> ReportContent:
    """The lot report's content: ``content`` (built from the lot's counted shots) with the
    runs, benches, instruments, retest rule and superseded tests of ``lot``
    (:class:`benchrun.report.lot_sources.LotSources`)."""
    runs = list(lot.runs)
    names = {c.get("point_index"): c.get("name")
             for c in content.lot_grade.get("conditions", []) if isinstance(c, dict)}
    instruments = []
    for run in runs:
        title = (f"Run {run.run_id} on bench {_bench(run)}"
                 + (f" ({', '.join(run.counted_devices)})" if run.counted_devices else
                    " (superseded tests only)"))
        instruments.append((title, traceability_table(SimpleNamespace(manifest=run.manifest),
                                                      run.bench)))
    lot_runs = [{"run_id": r.run_id, "bench_id": r.bench_id, "status": r.status,
                 "started": r.started, "finished": r.finished,
                 "counted_devices": list(r.counted_devices), "counted_shots": r.counted_shots,
                 "run_dir": r.run_dir, "manifest": [dict(e) for e in r.entries]}
                for r in runs]
    return replace(
        content,
        report_id=new_report_id(f"{lot.lot}-LOT", now),
        run_window=_window(runs),
        lot_runs=lot_runs,
        lot_runs_table=runs_table(runs),
        retest_rule=lot.retest_rule,
        superseded=list(lot.superseded),
        superseded_table=superseded_table(lot.superseded),
        unfinished=list(lot.unfinished),
        run_instruments=instruments,
        instruments_table=[],
        fixture_table=_fixture_tables(runs, names),
        record_table=_record_table(content, lot, runs),
        store_url=lot.store_url,
        limits_run_id=lot.limits_run_id,
    )
