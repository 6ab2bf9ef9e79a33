"""The set-up the runner benchmarks share: a one-device DX-4417 sequence of repeated shots
at the demo condition (600 V, 30 A, 25 degC, no shot spacing), and the simulated bench it runs
on, in a child process (as real instruments are separate machines) or in the caller's.

Used by shot_overhead.py, soak.py and multibench.py (run as scripts: their folder is on the
import path).
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
BENCH_PATH = ROOT / "sequences" / "bench-sim.yaml"


def repeated_point(repeats: int, *, gate: str = "10 ohm", label: str | None = None) -> str:
    """One test point (YAML list item) of ``repeats`` shots at the demo condition."""
    head = f"  - label: {label}\n    bus_voltage: 600 V\n" if label else \
        "  - bus_voltage: 600 V\n"
    return (head + "    forward_current: 30 A\n    temperatures: [25 degC]\n"
            f"    gate_resistance: {gate}\n    repeats: {repeats}\n    shot_spacing: 0 s\n")


def sequence_text(points: Sequence[str], *, serial: str = "SN0117-001",
                  extra: str = "") -> str:
    """A DX-4417 lot LT-0117 sequence of the test ``points`` on one device, short thermal
    waits; ``extra``: more top-level YAML lines."""
    return (f"part: DX-4417\nlot: LT-0117\ndevices: [{serial}]\n"
            "ratings: {vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC}\n"
            "test_points:\n" + "".join(points)
            + "thermal: {band: 1 K, dwell: 5 s, soak: 0 s, poll_interval: 1 s}\n"
              "expected: {irrm_fraction: 2.0, didt: 1000 A/us}\n" + extra
            + "switch_voltage: true\n")


def _serve(seq_path: str, prepare: Callable[..., None] | None, prepare_args: tuple,
           conn: Any, stop: Any) -> None:
    """Child process: run the simulated bench until ``stop`` is set."""
    from benchrun.config import load_bench, load_sequence
    from benchrun.runner.simbench import simulated_bench

    # five simulated instruments share this process with the circuit solver: a short switch
    # interval lets them answer a query while a shot is being computed, as separate real
    # instruments would (the default 5 ms would delay every answer to the end of the solve)
    sys.setswitchinterval(0.0005)
    with simulated_bench(load_bench(BENCH_PATH), load_sequence(Path(seq_path))) as sim:
        if prepare is not None:
            prepare(sim.bench, *prepare_args)
        conn.send((sim.resources, sim.bench._t0, sim.bench.clock_speedup))
        stop.wait()


@contextlib.contextmanager
def running_bench(seq_path: Path, *, in_process: bool = False,
                  prepare: Callable[..., None] | None = None, prepare_args: tuple = (),
                  start_timeout_s: float = 120.0) -> Iterator[tuple[dict[str, str], Any]]:
    """``(resources, clock)`` of a simulated bench holding ``seq_path``'s lot, for the length
    of the block: in a spawned child process, or in this one with ``in_process``.
    ``prepare(sim_bench, *prepare_args)`` (a module-level function, for the child) adjusts the
    simulated bench before the runner reaches it."""
    if in_process:
        from benchrun.config import load_bench, load_sequence
        from benchrun.runner.simbench import simulated_bench

        with simulated_bench(load_bench(BENCH_PATH), load_sequence(seq_path)) as sim:
            if prepare is not None:
                prepare(sim.bench, *prepare_args)
            yield sim.resources, sim.clock
        return
    from benchrun.runner.simbench import bench_in_child_process

    with bench_in_child_process(_serve, (str(seq_path), prepare, prepare_args),
                                start_timeout_s=start_timeout_s) as (resources, clock):
        yield resources, clock
