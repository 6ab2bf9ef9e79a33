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
from dataclasses import dataclass, field
from pathlib import Path

from benchrun.errors import StoreError
from benchrun.records import ShotResult
from benchrun.store.results import ResultsStore, normalize_url
from benchrun.store.rundata import RunData, load_run, read_manifest, store_url_for

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
