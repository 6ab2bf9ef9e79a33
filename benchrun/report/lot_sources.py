"""What a lot report rests on when the lot was tested in several runs, on several benches.

:func:`lot_view` turns a :class:`benchrun.store.lotdata.LotData` whose run folders were found
(:func:`benchrun.store.lotdata.locate_lot_folders`) into

* a :class:`LotRunView`: the counted shots of every run seen as one run, so the report's one
  facts pipeline (:func:`benchrun.report.facts_gather.build_content`) and its one renderer
  serve a lot report unchanged; its raw record (:class:`LotRawRecord`) reads each shot from
  the raw record of the run that took it;
* :class:`benchrun.report.run_sources.RunSources` of the newest counted run (sequence,
  tolerances, analysis options, limits) with the manifest of **every** run of the lot;
* :class:`LotSources`: per run its bench, status, times, instrument identities and files, the
  superseded tests and the retest rule (:func:`benchrun.report.facts_lot.lot_content` lays
  them out).

This module reads files (run folders, raw records); the facts built from it are pure.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchrun.errors import StoreError
from benchrun.report.manifest import build_manifest, code_digest
from benchrun.report.run_sources import (
    RunSources,
    analysis_options_of,
    load_config,
    shot_settings,
)


class LotRawRecord:
    """The raw records of a lot's runs read as one: ``read_shot(ref)`` opens the record of the
    run whose counted shot carries ``ref`` (a counted device is taken from one run only, and
    a shot key names its device, so the refs of counted shots are distinct)."""

    def __init__(self, runs: dict[str, Any], run_of_ref: dict[str, str]) -> None:
        self._runs = runs
        self._run_of_ref = run_of_ref
        self._open: dict[str, Any] = {}

    def read_shot(self, ref: str, verify: bool = True) -> Any:
        run_id = self._run_of_ref.get(ref)
        if run_id is None:
            raise StoreError(f"no counted shot of the lot is stored under {ref!r}")
        if run_id not in self._open:
            self._open[run_id] = self._runs[run_id].open_raw()
        return self._open[run_id].read_shot(ref, verify=verify)

    def close(self) -> None:
        for raw in self._open.values():
            raw.close()
        self._open.clear()

    def __enter__(self) -> LotRawRecord:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass(frozen=True)
class LotRunView:
    """The counted shots of a lot's runs, seen as one run by the report pipeline.

    ``run_id``, ``manifest``, ``run_dir`` and ``run`` are those of the newest run that counts
    (the run the report is registered under, whose limits and sequence are used); ``shots``
    are the counted shots of every run.
    """

    run_id: str
    manifest: dict[str, Any]
    shots: list[Any]
    run_dir: Path | None
    store_url: str
    run: Any
    runs: dict[str, Any] = field(default_factory=dict)
    pending: list[Any] = field(default_factory=list)

    def _file(self, name: str) -> Path | None:
        return None if self.run_dir is None else self.run_dir / name

    @property
    def limits_path(self) -> Path | None:
        return self._file("limits.yaml")

    @property
    def bench_path(self) -> Path | None:
        return self._file("bench.yaml")

    @property
    def sequence_path(self) -> Path | None:
        return self._file("sequence.yaml")

    def open_raw(self) -> LotRawRecord:
        """Every counted shot's raw record (:class:`LotRawRecord`)."""
        return LotRawRecord(self.runs, {s.raw_ref: s.run_id for s in self.shots if s.raw_ref})


@dataclass(frozen=True)
class RunFacts:
    """One run of a lot as its report states it (read from the run folder and the store)."""

    run_id: str
    bench_id: str | None
    status: str | None
    started: str | None
    finished: str | None
    manifest: dict[str, Any]
    bench: Any
    sequence: Any
    counted_devices: list[str]
    counted_shots: int
    run_dir: str
    entries: tuple[dict[str, Any], ...]


@dataclass(frozen=True)
class LotSources:
    """Everything a lot report states about the runs behind it."""

    lot: str
    store_url: str
    retest_rule: str
    runs: list[RunFacts]
    superseded: list[dict[str, Any]]
    unfinished: list[str]
    device_runs: dict[str, str]
    limits_run_id: str | None
    limits_sha256: str | None


def lot_manifest_entries(run: Any) -> list[dict[str, Any]]:
    """One run's manifest entries (:func:`build_manifest`), its files named
    ``<run id>/<file>`` so the entries of all the lot's runs stay apart."""
    out = []
    for entry in build_manifest(run):
        item = entry.to_dict()
        if item["kind"] == "file":
            item["name"] = f"{run.run_id}/{item['name']}"
        out.append(item)
    return out


def lot_view(lot: Any, *, limits: Any, limits_run_id: str | None,
             limits_sha256: str | None = None) -> tuple[LotRunView, RunSources, LotSources]:
    """The report's view of a lot whose run folders were all found (see module docstring).

    Parameters
    ----------
    lot
        ``LotData`` with each run's ``run_dir`` set (:func:`~benchrun.store.lotdata.
        locate_lot_folders`).
    limits
        The ``LimitsSpec`` the lot was graded with.
    limits_run_id
        The run whose ``limits.yaml`` that is (``None``: a named file).
    limits_sha256
        SHA-256 of the limits file when it is not a run's own.

    Raises
    ------
    StoreError
        A run of the lot has no run folder.
    """
    from benchrun.store.lotdata import RETEST_RULE

    missing = [r.run_id for r in lot.runs if r.run_dir is None]
    if missing:
        raise StoreError(f"the run folder of run(s) {', '.join(missing)} was not found")
    counted_ids = set(lot.device_runs.values())
    counted = [r for r in lot.runs if r.run_id in counted_ids]
    anchor = counted[-1]
    view = LotRunView(run_id=anchor.run_id, manifest=dict(anchor.manifest),
                      shots=list(lot.shots), run_dir=anchor.run_dir,
                      store_url=anchor.store_url, run=anchor.run,
                      runs={r.run_id: r for r in lot.runs},
                      pending=[s for r in lot.runs for s in r.pending])
    sequence = load_config("sequence", anchor.sequence_path)
    entries_of = {r.run_id: tuple(lot_manifest_entries(r)) for r in lot.runs}
    sources = RunSources(
        bench=load_config("bench", anchor.bench_path),
        sequence=sequence,
        analysis_options=analysis_options_of(anchor, sequence),
        manifest=tuple(e for r in lot.runs for e in entries_of[r.run_id]),
        code_sha256=code_digest(),
        limits=limits,
        shot_settings=shot_settings(view),
    )
    runs = []
    for run in lot.runs:
        record = run.run
        devices = sorted(s for s, rid in lot.device_runs.items() if rid == run.run_id)
        runs.append(RunFacts(
            run_id=run.run_id,
            bench_id=record.bench_id if record is not None else None,
            status=record.status if record is not None else run.manifest.get("status"),
            started=run.manifest.get("started") or (record.started if record else None),
            finished=run.manifest.get("finished") or (record.finished if record else None),
            manifest=dict(run.manifest),
            bench=load_config("bench", run.bench_path),
            sequence=load_config("sequence", run.sequence_path),
            counted_devices=devices,
            counted_shots=sum(1 for s in lot.shots if s.run_id == run.run_id),
            run_dir=str(run.run_dir),
            entries=entries_of[run.run_id]))
    facts = LotSources(lot=lot.lot, store_url=lot.store_url, retest_rule=RETEST_RULE,
                       runs=runs, superseded=[s.to_dict() for s in lot.superseded],
                       unfinished=list(lot.unfinished), device_runs=dict(lot.device_runs),
                       limits_run_id=limits_run_id, limits_sha256=limits_sha256)
    return view, sources, facts
