"""Run a sequence on the bench a bench file names, starting the simulated bench when needed.

Used by ``benchrun run`` and ``benchrun demo``: when any instrument's resource is ``sim``,
an in-process simulated bench holding the sequence's virtual lot is started for the length of
the run, its accelerated clock drives the runner's waits, and part ratings missing from the
sequence come from the virtual catalogue.
"""

from __future__ import annotations

import contextlib
import dataclasses
from pathlib import Path

from benchrun.config.bench import load_bench
from benchrun.config.sequence import load_sequence
from benchrun.runner.execute import RunOptions, RunOutcome, prepare, run_sequence
from benchrun.runner.simbench import DEFAULT_SPEEDUP, simulated_bench


def run_on_bench(sequence_path: str | Path, bench_path: str | Path, options: RunOptions, *,
                 sim_speedup: float = DEFAULT_SPEEDUP, sim_seed: int = 1) -> RunOutcome:
    """:func:`~benchrun.runner.execute.run_sequence`, with the simulated bench when the bench
    file asks for it. Files are checked (and pre-flight run) before a simulator starts."""
    bench = load_bench(bench_path)
    sequence = load_sequence(sequence_path)
    uses_sim = any(entry.simulated for _, entry in bench.instruments.items())
    if not uses_sim:
        return run_sequence(sequence_path, bench_path, options)
    with contextlib.ExitStack() as stack:
        sim = stack.enter_context(simulated_bench(bench, sequence, seed=sim_seed,
                                                  speedup=sim_speedup))
        ratings = options.ratings_lookup or sim.ratings
        opts = dataclasses.replace(options, sim_resources=sim.resources, clock=sim.clock,
                                   ratings_lookup=ratings)
        prepare(sequence_path, bench_path, opts)  # refuse before anything else happens
        return run_sequence(sequence_path, bench_path, opts)
