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
from dataclasses import fields, replace

from benchrun.config.bench import BenchConfig
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
