"""Verification of a lot report (a lot tested in several runs, perhaps on several benches).

The report's embedded data name every run of the lot (``lot_runs``: run id, bench, devices
counted, each run's manifest entries) and the results store they were combined from. Each run
is looked up in that store (or the one given with ``--store``); its run folder is the one the
store records when it still holds the run, else the first found under a folder given with
``--runs DIR`` (:func:`benchrun.store.lotdata.locate_run_folder`: the folder itself,
``DIR/<run id>``, or any folder up to three levels down whose ``run.json`` names the run).

Checks besides the signature and the reports-table row, each yes or no with a reason:

* every run of the lot found — in the store and its run folder (a run not found is named with
  where it was made and how to point verify at it);
* the retest rule reproduces the lot — applied again to the runs as the store holds them now,
  it picks the same run for every device and the same superseded tests;
* manifest hashes match — every run's files, result rows and runs-table row;
* re-analysis reproduces the report — every counted shot re-read from its own run's raw record
  and analysed again, then the whole lot graded again (:func:`benchrun.grading.across.
  grade_across`: the limits of the newest run that counts, the largest accuracy bound of the
  benches) and compared grade by grade.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchrun.errors import BenchrunError
from benchrun.report.manifest import ManifestEntry, check_manifest
from benchrun.report.verify_checks import (
    CHECK_LOT,
    CHECK_MANIFEST,
    CHECK_REANALYSIS,
    CHECK_RUNS,
    Check,
)
from benchrun.report.verify_reanalysis import (
    compare_grades,
    reanalyse_shots,
    shots_with_fresh_metrics,
)


@dataclass
class LocatedRun:
    """One run the report names, as found for verification."""

    run_id: str
    bench_id: str | None
    run: Any = None  # RunData with the folder found (run_dir None when missing)
    folder: Any = None  # benchrun.store.lotdata.RunFolder
    problem: str | None = None  # why the run itself is not in the store

    @property
    def found(self) -> bool:
        return self.run is not None and self.folder is not None and self.folder.found

    def line(self) -> str:
        if self.problem is not None:
            return (f"run {self.run_id} (bench {self.bench_id or 'not recorded'}): "
                    f"{self.problem}")
        return str(self.folder.describe())

    def to_dict(self) -> dict[str, Any]:
        return {"run_id": self.run_id, "bench_id": self.bench_id, "found": self.found,
                "run_dir": str(self.folder.run_dir) if self.found else None,
                "how": self.folder.how if self.folder is not None else "not in the store",
                "line": self.line()}


@dataclass
class LotVerification:
    """The lot's checks, the store they used and the runs as found."""

    checks: tuple[Check, ...]
    store_url: str | None
    runs: list[LocatedRun] = field(default_factory=list)


def _why(exc: BaseException) -> str:
    text = str(exc).strip() or "no message"
    return text if isinstance(exc, BenchrunError) else f"{type(exc).__name__}: {text}"


def locate_runs(items: list[dict[str, Any]], url: str,
                search: Sequence[str | os.PathLike[str]]) -> list[LocatedRun]:
    """Each run the report names, loaded from the store at ``url`` with its folder."""
    from benchrun.store.lotdata import locate_run_folder, with_folder
    from benchrun.store.rundata import load_run

    out = []
    for item in items:
        located = LocatedRun(str(item["run_id"]), item.get("bench_id"))
        try:
            run = load_run(url, located.run_id)
        except BenchrunError as exc:
            located.problem = f"not found in the results store: {exc}"
            out.append(located)
            continue
        located.folder = locate_run_folder(run, search)
        located.run = with_folder(run, located.folder)
        out.append(located)
    return out


def runs_check(located: list[LocatedRun]) -> Check:
    lines = tuple(r.line() for r in located)
    missing = [r for r in located if not r.found]
    if missing:
        return Check(CHECK_RUNS, False,
                     f"{len(missing)} of {len(located)} run(s) not found: "
                     + "; ".join(r.line() for r in missing), lines)
    return Check(CHECK_RUNS, True, f"all {len(located)} run(s) of the lot found in the store "
                 "with their run folders", lines)


def lot_check(attachment: dict[str, Any], located: list[LocatedRun], url: str) -> Check:
    """The retest rule applied again to the runs as the store holds them now."""
    from benchrun.store.lotdata import select_counted
    from benchrun.store.results import ResultsStore

    if any(r.run is None for r in located):
        return Check(CHECK_LOT, False, "not every run of the report is in the store")
    reported = {serial: str(item["run_id"]) for item in attachment.get("lot_runs", [])
                for serial in item.get("counted_devices", [])}
    device_runs, superseded, _ = select_counted([r.run for r in located])
    problems = []
    for serial in sorted(set(reported) | set(device_runs)):
        if reported.get(serial) != device_runs.get(serial):
            problems.append(f"{serial}: the report counts run {reported.get(serial)}, the "
                            f"retest rule now picks run {device_runs.get(serial)}")
    said = sorted((str(s["serial"]), str(s["run_id"])) for s in attachment.get("superseded", []))
    now = sorted((s.serial, s.run_id) for s in superseded)
    if said != now:
        problems.append(f"superseded tests: the report lists {said}, the store gives {now}")
    details = [f"{serial}: run {run_id}" for serial, run_id in sorted(device_runs.items())]
    lot = attachment.get("lot")
    try:
        with ResultsStore(url, create=False) as store:
            later = [r.run_id for r in store.runs(lot=str(lot))
                     if r.run_id not in {x.run_id for x in located}]
    except BenchrunError:
        later = []
    if later:
        details.append(f"note: the store now also holds run(s) of lot {lot} that the report "
                       f"does not name (made after it): {', '.join(later)}")
    if problems:
        return Check(CHECK_LOT, False, problems[0], tuple(problems + details))
    return Check(CHECK_LOT, True, f"the same run counts for each of the {len(device_runs)} "
                 f"device(s); {len(superseded)} superseded test(s) as listed", tuple(details))


def _entries(item: dict[str, Any]) -> list[ManifestEntry]:
    prefix = f"{item['run_id']}/"
    out = []
    for raw in item.get("manifest", []):
        entry = ManifestEntry.from_dict(raw)
        if entry.kind == "file" and entry.name.startswith(prefix):
            entry = ManifestEntry(entry.name[len(prefix):], entry.kind, entry.sha256,
                                  entry.size, entry.method)
        out.append(entry)
    return out


def lot_manifest_check(attachment: dict[str, Any], located: list[LocatedRun]) -> Check:
    """Every run's manifest entries re-hashed against its folder and the store."""
    details: list[str] = []
    bad: list[str] = []
    for item, run in zip(attachment.get("lot_runs", []), located, strict=True):
        entries = _entries(item)
        if not entries:
            bad.append(f"run {run.run_id}: the report lists no manifest")
            continue
        if run.run is None:
            bad.append(f"run {run.run_id}: {run.problem}")
            continue
        folder = run.run.run_dir
        for c in check_manifest(entries, run.run, Path(folder) if folder else None):
            line = f"run {run.run_id}: {c.name}: {'yes' if c.ok else 'no'} — {c.reason}"
            if not folder and c.name in {e.name for e in entries if e.kind == "file"}:
                line = (f"run {run.run_id}: {c.name}: no — run folder not found; name a "
                        "folder that holds it with --runs DIR")
            details.append(line)
            if not c.ok:
                bad.append(line)
    if bad:
        return Check(CHECK_MANIFEST, False, bad[0] + (f" (and {len(bad) - 1} more)"
                                                      if len(bad) > 1 else ""),
                     tuple(details or bad))
    return Check(CHECK_MANIFEST, True, f"all {len(details)} hashes of "
                 f"{len(located)} run(s) match", tuple(details))


def lot_reanalysis_check(attachment: dict[str, Any], located: list[LocatedRun]) -> Check:
    """Every counted shot re-analysed from its own run's raw record; the lot graded again."""
    from benchrun.grading.across import grade_across

    rows = attachment.get("shots") or []
    if not rows:
        return Check(CHECK_REANALYSIS, False, "the report lists no shots")
    options = attachment.get("analysis_options") or None
    by_id = {r.run_id: r for r in located}
    problems: list[str] = []
    metrics: dict[str, dict[str, Any]] = {}
    groups: dict[str, list[dict[str, Any]]] = {}
    for row in rows:
        groups.setdefault(str(row.get("run_id")), []).append(row)
    for run_id, group in groups.items():
        run = by_id.get(run_id)
        if run is None:
            problems.append(f"{len(group)} shot(s) of run {run_id}, which the report does "
                            "not list among its runs")
        elif not run.found:
            problems.append(f"{len(group)} shot(s) of run {run_id} not re-analysed: "
                            f"{run.line()}")
        else:
            metrics.update(reanalyse_shots(group, run.run, options, problems))
    shot_problems = len(problems)
    counted_ids = {str(item["run_id"]) for item in attachment.get("lot_runs", [])
                   if item.get("counted_devices")}
    counted = [r for r in located if r.run_id in counted_ids]
    if any(not r.found for r in counted):
        problems.append("the lot cannot be graded again: a counted run's folder (limits and "
                        "bench files) was not found")
    else:
        try:
            if counted and attachment.get("limits_run_id") != counted[-1].run_id:
                problems.append(f"the report was graded against the limits of run "
                                f"{attachment.get('limits_run_id')}, not those of the newest "
                                f"run that counts ({counted[-1].run_id})")
            graded = grade_across([r.run for r in counted],
                                  shots_with_fresh_metrics(rows, metrics),
                                  lot=str(attachment.get("lot")))
            compare_grades(attachment.get("lot_grade") or {}, graded.grade, problems)
        except BenchrunError as exc:
            problems.append(f"regrading failed: {exc}")
        except (KeyError, TypeError, ValueError) as exc:
            problems.append(f"the embedded shot data are malformed ({type(exc).__name__}: "
                            f"{exc})")
    if problems:
        what = f"{shot_problems} shot disagreement(s)" if shot_problems else "shots agree"
        summary = f"{what}; {len(problems) - shot_problems} grade disagreement(s)"
        return Check(CHECK_REANALYSIS, False, f"{summary}: {problems[0]}",
                     tuple(problems[:200]))
    return Check(CHECK_REANALYSIS, True,
                 f"{len(rows)} shots of {len(groups)} run(s) re-analysed from their own raw "
                 "records: every metric, grade, bin, device verdict and the lot disposition "
                 "reproduced")


def _probe(url: str) -> None:
    """Raise (with the reason) when the results store at ``url`` cannot be read."""
    from sqlalchemy.engine import make_url

    from benchrun.errors import StoreError
    from benchrun.store.results import ResultsStore

    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite" and parsed.database \
            and not Path(str(parsed.database)).is_file():
        raise StoreError(f"results database {parsed.database} does not exist")
    with ResultsStore(url, create=False) as store:
        store.runs()


def verify_lot(attachment: dict[str, Any], *, store: str | None = None,
               runs: Sequence[str | os.PathLike[str]] = ()) -> LotVerification:
    """The lot checks of :func:`benchrun.report.verify.verify_report` (see module docstring).
    Never raises: a missing run, store or file is a negative check with its reason."""
    items = attachment.get("lot_runs")
    url = store or attachment.get("store_url")
    names = (CHECK_RUNS, CHECK_LOT, CHECK_MANIFEST, CHECK_REANALYSIS)
    if not isinstance(items, list) or not items or not url:
        reason = "the report's embedded data name no runs or no results store"
        return LotVerification(tuple(Check(n, False, reason) for n in names), None)
    try:
        from benchrun.store.results import normalize_url

        url = normalize_url(str(url)) if "://" in str(url) else \
            f"sqlite:///{Path(str(url)).resolve()}"
        _probe(url)
        located = locate_runs(items, url, runs)
    except Exception as exc:  # a store that cannot be opened is a negative result
        reason = (f"cannot open the results store {url}: {_why(exc)}; name it with "
                  "--store URL")
        return LotVerification(tuple(Check(n, False, reason) for n in names), None)
    checks = []
    for name, step in ((CHECK_RUNS, lambda: runs_check(located)),
                       (CHECK_LOT, lambda: lot_check(attachment, located, url)),
                       (CHECK_MANIFEST, lambda: lot_manifest_check(attachment, located)),
                       (CHECK_REANALYSIS, lambda: lot_reanalysis_check(attachment, located))):
        try:
            checks.append(step())
        except Exception as exc:  # damaged input gives a negative check, never a traceback
            checks.append(Check(name, False, f"could not be checked: {_why(exc)}"))
    return LotVerification(tuple(checks), url, located)
