"""The runner's own overhead per shot, against the simulated acquisition time.

Runs a short sequence on the in-process simulated bench (one device, 25 degC, N repeats) and
times every steady-state shot (the time between two consecutive stored shots, shot spacing 0).

* acquisition = time inside ``Station.fire``: arming the scope, firing, waiting for the
  trigger — on the simulated bench that is the physics simulation and digitising of the
  shot — and transferring every channel (binary blocks over VISA). This is what the capture
  itself costs, on any bench.
* overhead = per-shot time − acquisition: pulse/scope set-up checks, bus and temperature
  read-backs, analysis, the raw-record write (flush + fsync), the results-DB commit, condition
  checks and bookkeeping.

The simulator caches its circuit solution per shot condition, so repeated shots at one
setting cost only digitising and transfer. Both cases are measured and printed: *fresh*
(the solution cleared before each shot: every shot a new circuit solution, as for a lot where
each device is shot once per condition) and *cached* (repeats at one condition, the least
favourable case for the ratio).

Goal: overhead < 10 % of the acquisition time. Prints the figures and a breakdown.

    python benchmarks/shot_overhead.py [--repeats 20]
"""

from __future__ import annotations

import argparse
import itertools
import statistics
import tempfile
import time
from collections import defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def measure(args: argparse.Namespace, fresh: bool) -> None:
    """One run; prints its figures."""
    from benchrun.config import load_bench, load_sequence
    from benchrun.runner import cycle, shots, station
    from benchrun.runner.execute import RunOptions, run_sequence
    from benchrun.runner.simbench import simulated_bench
    from benchrun.store.raw import RawRecord
    from benchrun.store.results import ResultsStore

    spent: dict[str, float] = defaultdict(float)
    patched: list[tuple[object, str, object]] = []

    def timed(owner, name, label):
        original = getattr(owner, name)
        patched.append((owner, name, original))

        def wrapper(*a, **k):
            t0 = time.perf_counter()
            try:
                return original(*a, **k)
            finally:
                spent[label] += time.perf_counter() - t0

        setattr(owner, name, wrapper)

    timed(station.Station, "fire", "acquisition (arm, fire, trigger, transfer)")
    timed(cycle, "build_result", "analysis + condition check")
    timed(RawRecord, "append_shot", "raw record write (flush + fsync)")
    timed(ResultsStore, "add_shot", "results DB commit")
    timed(station.Station, "configure_scope", "scope/pulse set-up")
    timed(station.Station, "configure_pulse", "scope/pulse set-up")
    timed(station.Station, "energise", "bus read-back")
    timed(station.Station, "temperature", "temperature read-back")
    del shots
    if fresh:
        from benchrun.simulator import physics

        original_fire = station.Station.fire
        patched.append((station.Station, "fire", original_fire))

        def fire_fresh(self, *a, **k):
            physics.simulate_double_pulse.cache_clear()  # not timed: before the wrapper
            return original_fire(self, *a, **k)

        station.Station.fire = fire_fresh

    bench_path = ROOT / "sequences" / "bench-sim.yaml"
    with tempfile.TemporaryDirectory() as tmp:
        seq_path = Path(tmp) / "seq.yaml"
        seq_path.write_text(f"""\
part: KFR30-12
lot: L2611-A
devices: [KFR-2611A-001]
ratings: {{vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC}}
test_points:
  - bus_voltage: 600 V
    forward_current: 30 A
    temperatures: [25 degC]
    gate_resistance: 10 ohm
    repeats: {args.repeats}
    shot_spacing: 0 s
thermal: {{band: 1 K, dwell: 5 s, soak: 0 s, poll_interval: 1 s}}
expected: {{irrm_fraction: 2.0, didt: 1000 A/us}}
timing: {{sample_interval: {args.sample_interval}}}
switch_voltage: true
""")
        stamps: list[float] = []
        snapshots: list[dict[str, float]] = []

        def on_stored(result) -> None:
            stamps.append(time.perf_counter())
            snapshots.append(dict(spent))

        bench = load_bench(bench_path)
        sequence = load_sequence(seq_path)
        with simulated_bench(bench, sequence) as sim:
            options = RunOptions(out_dir=Path(tmp) / "out", sim_resources=sim.resources,
                                 clock=sim.clock, show_progress=False, on_stored=on_stored)
            outcome = run_sequence(seq_path, bench_path, options)
        points = None
        for folder in (Path(tmp) / "out").iterdir():
            with RawRecord(folder / "raw.h5", "r") as raw:
                shot = raw.read_shot(raw.keys()[0])
                points = len(next(iter(shot.channels.values())).codes)
                channels = len(shot.channels)

    for owner, name, original in reversed(patched):
        setattr(owner, name, original)
    # steady state: intervals between consecutive stored shots (first shot excluded)
    intervals = [b - a for a, b in itertools.pairwise(stamps[1:])]
    n = len(intervals)
    per_label = {label: (snapshots[-1].get(label, 0.0) - snapshots[1].get(label, 0.0)) / n
                 for label in spent}
    total = statistics.fmean(intervals)
    acquisition = per_label["acquisition (arm, fire, trigger, transfer)"]
    overhead = total - acquisition
    print(f"--- {'fresh' if fresh else 'cached'} circuit solution per shot ---")
    print(f"shots: {outcome.shots_stored} stored ({n} steady-state intervals timed), "
          f"{channels} channels x {points} points per shot")
    print(f"per shot: total {total * 1e3:.1f} ms, acquisition {acquisition * 1e3:.1f} ms, "
          f"overhead {overhead * 1e3:.1f} ms")
    print(f"overhead / acquisition = {overhead / acquisition * 100:.1f} %  (goal < 10 %)")
    print("breakdown of the overhead (ms per shot):")
    for label, value in sorted(per_label.items(), key=lambda kv: -kv[1]):
        if not label.startswith("acquisition"):
            print(f"  {label:36s} {value * 1e3:7.2f}")
    other = overhead - sum(v for k, v in per_label.items() if not k.startswith("acquisition"))
    print(f"  {'everything else':36s} {other * 1e3:7.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--sample-interval", default="1 ns")
    args = parser.parse_args()
    measure(args, fresh=True)
    measure(args, fresh=False)


if __name__ == "__main__":
    main()
