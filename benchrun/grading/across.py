"""Grading a lot tested on several benches: one set of budget inputs for all of them.

A lot split across benches is graded as one (:func:`benchrun.store.lotdata.load_lot`), but
each bench states its own instrument and probe accuracies. The budgets of a combined lot use,
for each input, the **largest** bound any bench involved states (the least accurate bench
governs; a bound is a half-width, so the larger one covers the smaller — common practice for
pooling instruments of unequal accuracy into one statement), and the source names every
certificate it came from.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields, replace
from pathlib import Path
from typing import Any

from benchrun.config.bench import BenchConfig
from benchrun.errors import GradingError
from benchrun.grading.uncertainty import InstrumentInputs, bench_inputs

_BOUNDS = {"scope_vertical_accuracy": "scope_source",
           "current_sensor_tolerance": "current_source",
           "voltage_probe_tolerance": "voltage_source",
           "deskew": "deskew_source"}


def lot_instrument_inputs(benches: Sequence[tuple[str, BenchConfig]]) -> InstrumentInputs:
    """Budget inputs for a lot tested on the benches ``[(bench id, bench file), ...]``: the
    largest bound of each input, its source naming the bench(es) that state it.

    Raises
    ------
    GradingError
        A bench file states no accuracies (from :func:`bench_inputs`).
    """
    per_bench = [(bench_id, bench_inputs(bench)) for bench_id, bench in benches]
    if len(per_bench) == 1:
        return per_bench[0][1]
    values = {}
    for bound, source in _BOUNDS.items():
        largest = max(getattr(inputs, bound) for _, inputs in per_bench)
        names = sorted({f"{getattr(inputs, source)} ({bench_id})" for bench_id, inputs
                        in per_bench if getattr(inputs, bound) == largest})
        values[bound] = largest
        values[source] = "largest of the benches: " + ", ".join(names)
    known = {f.name for f in fields(InstrumentInputs)}
    return replace(per_bench[0][1], **{k: v for k, v in values.items() if k in known})


@dataclass(frozen=True)
class LotAcross:
    """A lot graded across runs (:func:`grade_across`).

    Attributes
    ----------
    grade
        The :class:`~benchrun.grading.grade.LotGrade` of every counted shot.
    limits, limits_path
        The limits graded against and their file.
    limits_run_id
        The run whose ``limits.yaml`` was used (the newest run that counts), or ``None``
        when a file was named.
    inputs
        The instrument inputs of the budgets (:func:`lot_instrument_inputs`, or the named
        bench file).
    """

    grade: Any
    limits: Any
    limits_path: Path
    limits_run_id: str | None
    inputs: Any


def grade_across(runs: Sequence[Any], shots: Sequence[Any], *,
                 limits_path: str | Path | None = None,
                 bench_path: str | Path | None = None, lot: str = "") -> LotAcross:
    """Grade the counted ``shots`` of a lot tested in ``runs`` (the runs that count, oldest
    first, each with its run folder) as one lot.

    The limits are the newest run's ``limits.yaml`` unless ``limits_path`` names a file; the
    budgets take the largest accuracy bound of the runs' benches (:func:`lot_instrument_inputs`)
    unless ``bench_path`` names one bench file. ``benchrun grade --lot``, ``benchrun report
    --lot`` and ``benchrun verify`` of a lot report grade through this one function.

    Raises
    ------
    GradingError
        No run, no limits file, a bench file without accuracies, or runs analysed with
        different analysis options.
    """
    from benchrun.config.bench import load_bench
    from benchrun.config.limits import load_limits
    from benchrun.grading import run_bench
    from benchrun.grading.grade import grade_lot
    from benchrun.store.canonical import canonical_json

    if not runs:
        raise GradingError(f"lot {lot}: no run holds an analysed shot")
    newest = runs[-1]
    missing = [r.run_id for r in runs if r.run_dir is None]
    if missing and (bench_path is None or limits_path is None):
        raise GradingError(f"the run folder of run(s) {', '.join(missing)} of lot {lot} was not "
                           "found (its bench and limits files are needed); name a folder "
                           "that holds it with --runs DIR")
    if limits_path is not None:
        path, limits_run = Path(limits_path), None
    else:
        path = newest.limits_path
        limits_run = newest.run_id
        if path is None or not Path(path).is_file():
            raise GradingError(f"run {newest.run_id} has no limits.yaml; name one with "
                               "--limits FILE")
    strays: dict[str, float] | None = None
    if bench_path is not None:
        inputs: Any = load_bench(bench_path)
    else:
        benches = [(r, run_bench(r)) for r in runs]
        inputs = lot_instrument_inputs(
            [((r.run.bench_id if r.run is not None else None) or r.run_id, b)
             for r, b in benches])
        strays = {r.run_id: b.fixture.stray_inductance for r, b in benches
                  if b.fixture.stray_inductance is not None}
    options = {canonical_json(r.manifest.get("analysis_options")) for r in runs}
    if len(options) > 1:
        raise GradingError(f"the runs of lot {lot} were analysed with different analysis "
                           "options; grade them one run at a time")
    limits = load_limits(path)
    grade = grade_lot(list(shots), limits, bench=inputs,
                      analysis_options=newest.manifest.get("analysis_options"),
                      stray_inductance_by_run=strays)
    return LotAcross(grade, limits, Path(path), limits_run, inputs)
