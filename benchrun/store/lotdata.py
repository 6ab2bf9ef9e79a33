"""A lot across runs: every run of one lot in a results store, and which run's shots count
for each device.

A lot may be tested in several runs: on several benches at once (each bench's handler holds
part of the lot), or a device may be tested again later (on the same bench or another).
:func:`load_lot` gathers every run of the lot from the store and applies the retest rule:

    **Retest rule.** For each device, the shots of one run count: the latest run (by start
    time, then run id) whose status is ``complete`` and which holds an analysed shot of the
    device. When no complete run tested the device, the latest run that tested it counts
    and the device is listed as tested in an unfinished run. Every other run that tested
    the device is listed as *superseded* for it, with that run's id and bench; its shots
    are kept in the store but are not graded.

The sampling plan of the limits file then applies to the whole lot (all devices of all runs).
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

from benchrun.errors import StoreError
from benchrun.records import ShotResult
from benchrun.store.results import ResultsStore, normalize_url
from benchrun.store.rundata import (
    RUN_MANIFEST,
    RunData,
    load_run,
    read_manifest,
    store_url_for,
)

#: How deep below a ``--runs DIR`` folder run folders are looked for.
SEARCH_DEPTH = 3

#: The retest rule in one sentence, for the grade output and the report.
RETEST_RULE = (
    "each device is graded on the shots of the latest complete run that tested it (by start "
    "time); when no complete run tested it, the latest run that did; earlier tests of the "
    "device are listed as superseded and not graded")


@dataclass(frozen=True)
class Superseded:
    """A run's test of a device that a later test replaced (see :data:`RETEST_RULE`)."""

    serial: str
    run_id: str
    bench_id: str | None
    shots: int
    replaced_by: str

    def to_dict(self) -> dict[str, object]:
        return {"serial": self.serial, "run_id": self.run_id, "bench_id": self.bench_id,
                "shots": self.shots, "replaced_by": self.replaced_by}


@dataclass(frozen=True)
class LotData:
    """Every run of one lot and the shots that count for each device.

    Attributes
    ----------
    lot, part
        The lot and its part number.
    runs
        Every run of the lot in the store, oldest first (``RunData``; ``run_dir`` is the
        folder named in the run's manifest when it exists here, else ``None``).
    shots
        The analysed shots that count (one run per device, :data:`RETEST_RULE`).
    device_runs
        ``{serial: run_id}`` of the run whose shots count for each device.
    superseded
        Earlier tests of a device that were replaced.
    unfinished
        Serials whose counted run did not complete.
    store_url
        The store (password removed).
    """

    lot: str
    part: str
    runs: list[RunData]
    shots: list[ShotResult]
    device_runs: dict[str, str]
    superseded: list[Superseded] = field(default_factory=list)
    unfinished: list[str] = field(default_factory=list)
    store_url: str = ""

    @property
    def run_ids(self) -> list[str]:
        """Every run of the lot, oldest first."""
        return [r.run_id for r in self.runs]

    def bench_of(self, run_id: str) -> str | None:
        """The bench id of one of the lot's runs."""
        for run in self.runs:
            if run.run_id == run_id:
                return run.run.bench_id if run.run is not None else None
        raise KeyError(run_id)

    @property
    def bench_ids(self) -> list[str]:
        """The benches of the runs that count, sorted (a run without one as ``"—"``)."""
        counted = set(self.device_runs.values())
        return sorted({self.bench_of(r) or "—" for r in counted})

    @property
    def pending(self) -> list[ShotResult]:
        """Shots recorded but not analysed yet, of every run."""
        return [s for run in self.runs for s in run.pending]

    def to_dict(self) -> dict[str, object]:
        return {
            "lot": self.lot, "part": self.part, "store_url": self.store_url,
            "retest_rule": RETEST_RULE,
            "runs": [{"run_id": r.run_id,
                      "bench_id": r.run.bench_id if r.run is not None else None,
                      "status": r.run.status if r.run is not None else None,
                      "started": r.run.started if r.run is not None else None,
                      "counted_devices": sorted(s for s, rid in self.device_runs.items()
                                                if rid == r.run_id)}
                     for r in self.runs],
            "device_runs": dict(sorted(self.device_runs.items())),
            "superseded": [s.to_dict() for s in self.superseded],
            "unfinished": list(self.unfinished),
        }


def lot_store_url(source: str | os.PathLike[str]) -> str:
    """The results store behind ``source``: a database URL or SQLite file as given, or the
    store a run folder's manifest names."""
    text = os.fspath(source)
    if "://" in text:
        return normalize_url(text)
    path = Path(text)
    if path.is_dir():
        return store_url_for(path, read_manifest(path))
    if path.is_file():
        return normalize_url(text)
    raise StoreError(f"{source} is neither a run folder, a results database nor a database URL")


def select_counted(runs: list[RunData]) -> tuple[dict[str, str], list[Superseded], list[str]]:
    """Apply :data:`RETEST_RULE` to the runs of one lot (oldest first); returns
    ``(device_runs, superseded, unfinished)``."""
    def order(run: RunData) -> tuple[str, str]:
        return (run.run.started if run.run is not None else "", run.run_id)

    tested: dict[str, list[RunData]] = {}
    for run in sorted(runs, key=order):
        for serial in sorted({s.serial for s in run.shots}):
            tested.setdefault(serial, []).append(run)
    device_runs: dict[str, str] = {}
    superseded: list[Superseded] = []
    unfinished: list[str] = []
    for serial, candidates in sorted(tested.items()):
        complete = [r for r in candidates if r.run is not None and r.run.status == "complete"]
        chosen = (complete or candidates)[-1]
        if not complete:
            unfinished.append(serial)
        device_runs[serial] = chosen.run_id
        for run in candidates:
            if run is not chosen:
                superseded.append(Superseded(
                    serial, run.run_id, run.run.bench_id if run.run is not None else None,
                    sum(1 for s in run.shots if s.serial == serial), chosen.run_id))
    return device_runs, superseded, unfinished


def load_lot(source: str | os.PathLike[str], lot: str, *, part: str | None = None) -> LotData:
    """Every run of ``lot`` in the store behind ``source`` (a database URL, a SQLite file or
    a run folder whose store is meant), combined by :data:`RETEST_RULE`.

    Raises
    ------
    StoreError
        No run of that lot, runs of several parts (name ``part``), or a database error.
    """
    url = lot_store_url(source)
    with ResultsStore(url, create=False) as store:
        records = store.runs(lot=lot, part=part)
        public = store.public_url
    if not records:
        raise StoreError(f"no run of lot {lot!r} in {public}")
    parts = sorted({r.part for r in records})
    if len(parts) > 1:
        raise StoreError(f"lot {lot!r} has runs of parts {', '.join(parts)}; name the part")
    runs = [load_run(url, r.run_id) for r in records]
    device_runs, superseded, unfinished = select_counted(runs)
    shots = [s for run in runs for s in run.shots if device_runs.get(s.serial) == run.run_id]
    return LotData(lot=lot, part=parts[0], runs=runs, shots=shots, device_runs=device_runs,
                   superseded=superseded, unfinished=unfinished, store_url=public)


@dataclass(frozen=True)
class RunFolder:
    """Where the folder of one run of a lot was found (or not).

    Attributes
    ----------
    run_id, bench_id
        The run and its bench.
    run_dir
        The folder holding the run's ``run.json`` (naming this run), or ``None``.
    how
        ``"recorded"`` (the folder the store records still holds it), ``"searched"`` (found
        under a folder given to search) or ``"missing"``.
    recorded
        The folder the store records for the run (where it was made), if any.
    """

    run_id: str
    bench_id: str | None
    run_dir: Path | None
    how: str
    recorded: str | None = None

    @property
    def found(self) -> bool:
        return self.run_dir is not None

    def describe(self) -> str:
        """One line for the user: where the run's folder is, or how to point at it."""
        bench = self.bench_id or "—"
        if self.run_dir is not None:
            where = ("where the store records it" if self.how == "recorded"
                     else "found by searching the folders given")
            return f"run {self.run_id} (bench {bench}): folder {self.run_dir} ({where})"
        made = f" (made in {self.recorded})" if self.recorded else ""
        return (f"run {self.run_id} (bench {bench}): run folder not found{made}; name a "
                "folder that holds it with --runs DIR")


def _names_run(folder: Path, run_id: str) -> bool:
    try:
        return read_manifest(folder).get("run_id") == run_id
    except StoreError:
        return False


def search_run_folder(run_id: str, search: Iterable[str | os.PathLike[str]],
                      depth: int = SEARCH_DEPTH) -> Path | None:
    """The first folder under one of ``search`` (the folder itself, then ``<dir>/<run_id>``,
    then any folder up to ``depth`` levels down) whose ``run.json`` names ``run_id``."""
    for top in (Path(d) for d in search):
        if not top.is_dir():
            continue
        for candidate in (top, top / run_id):
            if candidate.is_dir() and _names_run(candidate, run_id):
                return candidate.resolve()
        level = [top]
        for _ in range(depth):
            below: list[Path] = []
            for folder in level:
                try:
                    below += sorted(p for p in folder.iterdir() if p.is_dir())
                except OSError:
                    continue
            for folder in below:
                if (folder / RUN_MANIFEST).is_file() and _names_run(folder, run_id):
                    return folder.resolve()
            level = below
    return None


def locate_run_folder(run: RunData, search: Sequence[str | os.PathLike[str]] = ()
                      ) -> RunFolder:
    """Where ``run``'s folder is: the one the store records when it still holds the run,
    else the first found under ``search`` (:func:`search_run_folder`)."""
    bench = run.run.bench_id if run.run is not None else None
    recorded = run.manifest.get("run_dir") if isinstance(run.manifest, dict) else None
    if run.run_dir is not None and _names_run(run.run_dir, run.run_id):
        return RunFolder(run.run_id, bench, Path(run.run_dir), "recorded",
                         str(recorded) if recorded else None)
    found = search_run_folder(run.run_id, search)
    if found is not None:
        return RunFolder(run.run_id, bench, found, "searched",
                         str(recorded) if recorded else None)
    return RunFolder(run.run_id, bench, None, "missing", str(recorded) if recorded else None)


def with_folder(run: RunData, folder: RunFolder) -> RunData:
    """``run`` with the folder found for it (its ``run.json`` as the manifest), or without a
    folder when none was found."""
    if folder.run_dir is None:
        return replace(run, run_dir=None)
    return replace(run, run_dir=folder.run_dir, manifest=read_manifest(folder.run_dir))


def locate_lot_folders(lot: LotData, search: Sequence[str | os.PathLike[str]] = ()
                       ) -> tuple[LotData, list[RunFolder]]:
    """Find every run folder of ``lot`` (:func:`locate_run_folder`); returns the lot with each
    run's ``run_dir`` set to the folder found (``None`` when missing) and where each was."""
    folders = [locate_run_folder(run, search) for run in lot.runs]
    runs = [with_folder(run, f) for run, f in zip(lot.runs, folders, strict=True)]
    return replace(lot, runs=runs), folders


def counted_runs(lot: LotData) -> list[RunData]:
    """The runs whose shots count for at least one device, oldest first."""
    counted = set(lot.device_runs.values())
    return [r for r in lot.runs if r.run_id in counted]
