"""The runner's own overhead per shot, against the simulated acquisition time.

Runs a short sequence on the in-process simulated bench (one device, 25 degC, N repeats,
shot spacing 0) and times every steady-state shot: the wall-clock time between two
consecutive stored shots (the first shot, with the trim shots before it, is not counted).

Definitions (per shot, wall clock):

* acquisition = the time the instruments themselves spend on the capture, what a real
  bench spends in the scope: arming the scope (``SINGle`` + ``*OPC?``), the fire command,
  the wait from firing until the scope holds the record (on the simulated bench: the circuit
  simulation and digitising of the shot), and the transfer of every channel (waveform source
  select, scaling preamble queries, binary block). The end of the acquisition is taken from
  the simulated scope itself (the instant it stores the record), so the tool's own polling
  latency after that instant is *not* counted as acquisition.
* overhead = per-shot time - acquisition: everything else the tool does per shot —
  device-selection check, pulse/scope configuration (sent only when changed) with their
  error-queue drains, bus set-up and read-back, temperature read-back, the pulse output
  check, trigger polling latency, analysis and condition checks, the raw-record write, the
  results-DB commit, attempt bookkeeping, progress and logging.

The simulator caches its circuit solution per shot condition, so repeated shots at one
setting cost only digitising and transfer. Both cases are measured and printed: *fresh*
(the solution cleared before each shot: every shot a new circuit solution, as for a lot where
each device is shot once per condition) and *cached* (repeats at one condition, the least
favourable case for the ratio).

Both durability modes of the store are measured (``RunOptions.durability``):
*power-loss* (the default: every shot's raw record and results row are synced to disk before
the next shot; the raw record's ``fsync`` runs while the shot is analysed) and *process*
(every shot handed to the operating system before the next shot: safe against ``kill -9``,
not against a power cut). The run folders go to the system temp folder or ``--out-dir``;
the disk under it sets the cost of every sync.

Goal: overhead < 10 % of the acquisition time. Prints the figures and a breakdown; the
machine's load average is printed too (other processes on the machine inflate both).

    python benchmarks/shot_overhead.py [--repeats 20] [--out-dir DIR]
"""

from __future__ import annotations

import argparse
import itertools
import os
import statistics
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # measure the tree this script belongs to

ACQ = "acquisition"
#: acquisition parts, in display order
ACQ_PARTS = ("arm scope (SINGle, *OPC?)", "fire command", "fire -> record in scope",
             "waveform preamble (source, scaling)", "waveform blocks")
TRIGGER_POLL = "trigger polling latency"
ANALYSIS = "analysis + condition check"


def measure(args: argparse.Namespace, fresh: bool, durability: str | None = None
            ) -> dict[str, float]:
    """One run; prints its figures and returns the median figures."""
    from benchrun.config import load_bench, load_sequence
    from benchrun.instruments import roles, session
    from benchrun.runner import cycle, station
    from benchrun.runner.execute import RunOptions, run_sequence
    from benchrun.runner.simbench import simulated_bench
    from benchrun.simulator import instruments_sim
    from benchrun.store.raw import RawRecord
    from benchrun.store.results import ResultsStore

    spent: dict[str, float] = defaultdict(float)
    patched: list[tuple[object, str, object]] = []

    def patch(owner, name, make):
        original = getattr(owner, name)
        patched.append((owner, name, original))
        setattr(owner, name, make(original))

    def timed(owner, name, label):
        def make(original):
            def wrapper(*a, **k):
                t0 = time.perf_counter()
                try:
                    return original(*a, **k)
                finally:
                    spent[label] += time.perf_counter() - t0
            return wrapper
        patch(owner, name, make)

    # --- acquisition: the instruments' own work ---
    timed(roles.Scope, "arm_single", ACQ_PARTS[0])
    timed(roles.PulseSource, "fire", ACQ_PARTS[1])
    completed: list[float] = []

    def make_complete(original):
        def wrapper(self, *a, **k):
            result = original(self, *a, **k)
            completed.append(time.perf_counter())  # the scope holds the record now
            return result
        return wrapper

    patch(instruments_sim.SimScope, "complete_acquisition", make_complete)

    def make_wait(original):
        def wrapper(self, *a, **k):
            t0 = time.perf_counter()
            n = len(completed)
            try:
                return original(self, *a, **k)
            finally:
                t1 = time.perf_counter()
                done = completed[-1] if len(completed) > n else t1
                done = min(max(done, t0), t1)
                spent[ACQ_PARTS[2]] += done - t0
                spent[TRIGGER_POLL] += t1 - done
        return wrapper

    patch(roles.Scope, "wait_triggered", make_wait)
    block = {"t": 0.0}

    def make_block(original):
        def wrapper(*a, **k):
            t0 = time.perf_counter()
            try:
                return original(*a, **k)
            finally:
                block["t"] += time.perf_counter() - t0
        return wrapper

    patch(session.InstrumentSession, "query_block", make_block)

    def make_read(original):
        def wrapper(*a, **k):
            t0 = time.perf_counter()
            b0 = block["t"]
            try:
                return original(*a, **k)
            finally:
                in_block = block["t"] - b0
                spent[ACQ_PARTS[4]] += in_block
                spent[ACQ_PARTS[3]] += time.perf_counter() - t0 - in_block
        return wrapper

    patch(roles.Scope, "read_channel", make_read)

    # --- overhead: the tool's own work, by stage ---
    timed(station.Station, "select", "device selection check")
    timed(station.Station, "configure_scope", "scope/pulse configuration + error queues")
    timed(station.Station, "configure_pulse", "scope/pulse configuration + error queues")
    timed(station.Station, "energise", "bus set-up and read-back")
    timed(station.Station, "temperature", "temperature read-back")
    timed(roles.PulseSource, "is_output_on", "pulse output check")
    timed(cycle, "build_result", ANALYSIS)
    timed(RawRecord, "append_shot", "raw record write")
    if hasattr(RawRecord, "wait_durable"):
        timed(RawRecord, "wait_durable", "raw record: waiting for its background fsync")
    timed(ResultsStore, "add_shot", "results DB commit")
    timed(ResultsStore, "next_attempt", "results DB attempt look-up")

    if fresh:
        from benchrun.simulator import physics

        def make_fresh(original):
            def wrapper(self, *a, **k):
                physics.simulate_double_pulse.cache_clear()  # not timed: before the wrapper
                return original(self, *a, **k)
            return wrapper

        patch(station.Station, "fire", make_fresh)

    case = (f"{'fresh' if fresh else 'cached'} circuit solution per shot, durability "
            f"{durability or 'default'}")
    bench_path = ROOT / "sequences" / "bench-sim.yaml"
    with tempfile.TemporaryDirectory(dir=args.out_dir) as tmp:
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
        try:
            with simulated_bench(bench, sequence) as sim:
                extra = {} if durability is None else {"durability": durability}
                options = RunOptions(out_dir=Path(tmp) / "out", sim_resources=sim.resources,
                                     clock=sim.clock, show_progress=False,
                                     on_stored=on_stored, **extra)
                outcome = run_sequence(seq_path, bench_path, options)
        finally:
            for owner, name, original in reversed(patched):
                setattr(owner, name, original)
        for folder in (Path(tmp) / "out").iterdir():
            with RawRecord(folder / "raw.h5", "r") as raw:
                shot = raw.read_shot(raw.keys()[0])
                points = len(next(iter(shot.channels.values())).codes)
                channels = len(shot.channels)

    # steady state: intervals between consecutive stored shots (first shot excluded).
    # Headline: median over the shots (robust against other processes on the machine) and
    # mean; the breakdown uses means, whose parts add up exactly.
    intervals = [b - a for a, b in itertools.pairwise(stamps[1:])]
    n = len(intervals)
    labels = sorted(spent)
    per_shot = {label: [b.get(label, 0.0) - a.get(label, 0.0)
                        for a, b in itertools.pairwise(snapshots[1:])] for label in labels}
    acq_shots = [sum(per_shot[label][i] for label in ACQ_PARTS if label in per_shot)
                 for i in range(n)]
    overheads = [t - a for t, a in zip(intervals, acq_shots, strict=True)]
    median = {"total": statistics.median(intervals), "acquisition": statistics.median(acq_shots),
              "overhead": statistics.median(overheads)}
    mean = {"total": statistics.fmean(intervals), "acquisition": statistics.fmean(acq_shots),
            "overhead": statistics.fmean(overheads)}
    for figures in (median, mean):
        figures["ratio"] = figures["overhead"] / figures["acquisition"]
    print(f"--- {case} ---")
    print(f"shots: {outcome.shots_stored} stored ({n} steady-state intervals timed), "
          f"{channels} channels x {points} points per shot")
    for name, figures in (("median", median), ("mean", mean)):
        print(f"per shot ({name:6s}): total {figures['total'] * 1e3:6.2f} ms = acquisition "
              f"{figures['acquisition'] * 1e3:6.2f} ms + overhead "
              f"{figures['overhead'] * 1e3:6.2f} ms -> overhead/acquisition "
              f"{figures['ratio'] * 100:5.1f} %  (goal < 10 %)")
    print("acquisition (mean ms per shot):")
    for label in ACQ_PARTS:
        print(f"  {label:46s} {statistics.fmean(per_shot.get(label, [0.0])) * 1e3:7.2f}")
    print("overhead (mean ms per shot):")
    rest = mean["overhead"]
    for label in sorted(labels, key=lambda k: -statistics.fmean(per_shot[k])):
        if label in ACQ_PARTS:
            continue
        value = statistics.fmean(per_shot[label])
        print(f"  {label:46s} {value * 1e3:7.2f}")
        rest -= value
    print(f"  {'everything else (bookkeeping, progress, log)':46s} {rest * 1e3:7.2f}")
    return median


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--sample-interval", default="1 ns")
    parser.add_argument("--out-dir", default=None,
                        help="folder for the run folders (default: the system temp folder; "
                             "the disk under it sets the cost of every sync)")
    args = parser.parse_args()
    load = os.getloadavg()
    print(f"load average before: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} "
          f"({os.cpu_count()} CPUs); run folders under {args.out_dir or tempfile.gettempdir()}")
    from benchrun.runner.execute import RunOptions

    modes = [None]
    if "durability" in RunOptions.__dataclass_fields__:
        from benchrun.store.raw import DURABILITY_MODES

        modes = list(DURABILITY_MODES)  # the default ("power-loss") first
    summary = []
    for durability in modes:
        for fresh in (True, False):
            figures = measure(args, fresh, durability)
            summary.append((fresh, durability, figures))
    print("=== summary (median per shot) ===")
    for fresh, durability, f in summary:
        print(f"{'fresh ' if fresh else 'cached'} circuit, durability {durability or 'default':10s}"
              f": acquisition {f['acquisition'] * 1e3:6.2f} ms, overhead "
              f"{f['overhead'] * 1e3:6.2f} ms = {f['ratio'] * 100:5.1f} %  (goal < 10 %)")
    load = os.getloadavg()
    print(f"load average after: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")


if __name__ == "__main__":
    main()
