"""The runner's own overhead per shot, against the simulated acquisition time.

Runs a short sequence on the simulated bench (one device, 25 degC, N repeats, shot spacing 0)
and times every steady-state shot: the wall-clock time between two consecutive concluded
shots (the first shot, with the trim shots before it, is not counted).

The simulated bench runs in a **separate process** by default, as real instruments are
separate machines: the runner's threads then cannot slow the simulated instruments down (in
one process they would share the interpreter lock with the circuit solver, and work of the
runner that overlaps the acquisition would stretch the *measured* acquisition instead of
showing as overhead). ``--in-process`` runs it in the benchmark's process for comparison.

Definitions (per shot, wall clock):

* acquisition = the time the instruments themselves spend on the capture, what a real
  bench spends in the scope: arming the scope (``SINGle`` + ``*OPC?``), the fire command,
  the wait from firing until the scope holds the record (on the simulated bench: the circuit
  simulation and digitising of the shot), and the transfer of every channel (waveform source
  select, scaling preamble queries, binary block). The end of the wait is taken from the
  simulated scope itself: the instant it first answers a status query with "acquisition
  complete" (the simulated instruments share one lock with the circuit solver, so a query
  sent during the solve is answered when the solve ends, as a busy real scope answers late),
  or the instant the record was complete if the runner only started waiting after it; the
  time from there to the tool acting on it is *trigger polling latency*, overhead.
  The wait counts from the fire command: work the runner starts between the fire command and
  its wait for the trigger overlaps the acquisition (and is latency when it outlasts it).
* overhead = per-shot time - acquisition: everything else on the runner's critical path —
  pulse/scope configuration (sent only when changed) with their error-queue drains, bus
  set-up and read-back, trigger polling latency, the raw-record write, waiting until the
  previous shot is stored (raw record synced in "power-loss" mode and its results row
  committed: the runner never fires before that), reading the previous shot's analysed
  result, device re-selection when needed, attempt bookkeeping, progress and logging (the
  device check and the temperature read-back are asked during the acquisition, on helper
  threads: what the main thread waits for them counts too).

The runner writes each shot to the raw record itself (the sync of "power-loss" mode runs on
the record's own thread while the next shot is prepared); its pending results row is
committed on a second thread from the moment the shot fires; the writer thread analyses it
and completes the row while the next shot is acquired (benchrun/runner/writer.py). That
background work is printed separately; only what the main thread spends or waits for is
overhead. (Tried and dropped because they moved time into the acquisition parts rather than
saving it, judged on the whole shot cycle: writing each channel as it arrives, during the
transfer; writing the raw record on a thread beside the arming; reading the next shot's bus
voltage on a helper thread during the transfer or the write; creating the shot's HDF5 objects
while the scope acquires. Python threads share one interpreter lock, and a per-shot write
through the HDF5 library was about a millisecond of cold-cache calls wherever it was placed.
What did cut it: the runner's uncompressed record keeps its shots in preallocated slots, raw
record format 3 (benchrun/store/raw_slots.py), so a shot is two positional writes and no
HDF5 object is made per shot.)

The simulator caches its circuit solution per shot condition, so repeated shots at one
setting cost only digitising and transfer. Both cases are measured and printed: *fresh*
(the solution cleared before each shot: every shot a new circuit solution, as for a lot where
each device is shot once per condition) and *cached* (repeats at one condition, the least
favourable case for the ratio).

Both durability modes of the store are measured (``RunOptions.durability``):
*power-loss* (the default: every shot's raw record is synced to disk before the next shot;
results rows are committed, and rebuilt from the raw record after a power cut) and *process*
(every shot handed to the operating system before the next shot: safe against ``kill -9``,
not against a power cut). The run folders go to the system
temp folder or ``--out-dir``; the disk under it sets the cost of every sync.

Goal: overhead < 10 % of the acquisition time. Prints the figures and a breakdown; the
machine's load average is printed too (other processes on the machine inflate both).

    python benchmarks/shot_overhead.py [--repeats 20] [--out-dir DIR] [--in-process]
"""

from __future__ import annotations

import argparse
import itertools
import multiprocessing
import os
import statistics
import sys
import tempfile
import threading
import time
from collections import defaultdict
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # measure the tree this script belongs to

from sim_setup import BENCH_PATH, repeated_point, running_bench, sequence_text  # noqa: E402

#: acquisition parts, in display order
ACQ_PARTS = ("arm scope (SINGle, *OPC?)", "fire command", "fire -> record in scope",
             "waveform preamble (source, scaling)", "waveform blocks")
TRIGGER_POLL = "trigger polling latency"
BACKGROUND = ("results DB: pending row (from the fire on)",
              "analysis + condition check", "results DB: completed row")


def _instrument_bench(sim_bench, fresh: bool, last_done) -> None:
    """Patch one simulated bench: record when the scope's last acquisition completed and
    when the scope first reported it completed (``last_done[0]`` and ``[1]``, shared doubles
    of ``time.perf_counter()``, the same clock in every process on Linux) and, for *fresh*,
    clear the circuit-solution cache before every shot."""
    from benchrun.simulator import instruments_sim, physics

    scope_cls = instruments_sim.SimScope
    original_complete = scope_cls.complete_acquisition
    original_done = scope_cls.op_acquisition_done
    reported = {"done": True}

    def complete(self, *a, **k):
        result = original_complete(self, *a, **k)
        last_done[0] = time.perf_counter()
        reported["done"] = False
        return result

    def done(self, *a, **k):
        answer = original_done(self, *a, **k)
        if answer and not reported["done"]:  # the scope says "complete" for the first time
            reported["done"] = True
            last_done[1] = time.perf_counter()
        return answer

    scope_cls.complete_acquisition = complete
    scope_cls.op_acquisition_done = done
    if fresh:
        original_fire = type(sim_bench).fire

        def fire(self, *a, **k):
            physics.simulate_double_pulse.cache_clear()
            return original_fire(self, *a, **k)

        type(sim_bench).fire = fire


def measure(args: argparse.Namespace, fresh: bool, durability: str | None = None
            ) -> dict[str, float]:
    """One run; prints its figures and returns the median figures."""
    from benchrun.config import load_bench, load_sequence
    from benchrun.instruments import roles, session
    from benchrun.runner import cycle, station, writer
    from benchrun.runner.execute import RunOptions, run_sequence
    from benchrun.store.raw import RawRecord
    from benchrun.store.results import ResultsStore

    spent: dict[str, float] = defaultdict(float)
    lock = threading.Lock()
    patched: list[tuple[object, str, object]] = []
    main_thread = threading.main_thread()

    def add(label: str, seconds: float) -> None:
        with lock:
            spent[label] += seconds

    def patch(owner, name, make):
        original = getattr(owner, name)
        patched.append((owner, name, original))
        setattr(owner, name, make(original))

    def timed(owner, name, label, *, main_only=False):
        """Time calls of ``owner.name`` under ``label``; with ``main_only``, calls from other
        threads under ``label (helper thread)``."""
        def make(original):
            def wrapper(*a, **k):
                if main_only and threading.current_thread() is not main_thread:
                    # helper threads: timed apart, never on the critical path's list
                    t0 = time.perf_counter()
                    try:
                        return original(*a, **k)
                    finally:
                        add(f"{label} (helper thread)", time.perf_counter() - t0)
                    return original(*a, **k)
                t0 = time.perf_counter()
                try:
                    return original(*a, **k)
                finally:
                    add(label, time.perf_counter() - t0)
            return wrapper
        patch(owner, name, make)

    # --- acquisition: the instruments' own work ---
    timed(roles.Scope, "arm_single", ACQ_PARTS[0])
    last_done = multiprocessing.get_context("spawn").Array("d", 2, lock=False)
    fired = {"at": 0.0}  # when the last fire command was sent

    def make_fire(original):
        def wrapper(*a, **k):
            t0 = time.perf_counter()
            try:
                return original(*a, **k)
            finally:
                fired["at"] = time.perf_counter()
                add(ACQ_PARTS[1], fired["at"] - t0)
        return wrapper

    def make_wait(original):
        # the acquisition runs from the fire command on; what the runner does between the
        # fire command and this wait (starting the work that overlaps the acquisition) is
        # overhead only where the scope was done before the runner started waiting
        def wrapper(self, *a, **k):
            t0 = time.perf_counter()
            try:
                return original(self, *a, **k)
            finally:
                t1 = time.perf_counter()
                start = fired["at"] if 0.0 < fired["at"] <= t0 else t0
                completed, answered = last_done[0], last_done[1]
                if completed <= start:  # not this shot's acquisition (none recorded)
                    done = t1
                elif completed < t0:  # done before the runner asked: the rest is latency
                    done = completed
                else:  # the runner's query was waiting: the scope's answer ends it
                    done = answered if answered >= completed else t1
                done = min(max(done, start), t1)
                add(ACQ_PARTS[2], done - start)
                add(TRIGGER_POLL, t1 - done)
        return wrapper

    patch(roles.PulseSource, "fire", make_fire)

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
                add(ACQ_PARTS[4], in_block)
                add(ACQ_PARTS[3], time.perf_counter() - t0 - in_block)
        return wrapper

    patch(roles.Scope, "read_channel", make_read)

    # --- overhead on the main thread, by stage ---
    # (the device check and the temperature read-back run on the station's helper threads,
    # beside the bus set-up and during the acquisition: what the main thread waits for them
    # falls into "everything else")
    timed(station.Station, "select", "device re-selection", main_only=True)
    timed(station.Station, "configure_scope", "scope/pulse configuration + error queues")
    timed(station.Station, "configure_pulse", "scope/pulse configuration + error queues")
    timed(station.Station, "energise", "bus set-up and read-back", main_only=True)
    timed(writer.ShotWriter, "wait_stored", "waiting: previous shot stored")
    timed(writer.ShotTicket, "result", "waiting: previous shot analysed")
    # --- the writer thread (overlaps the next acquisition) ---
    timed(RawRecord, "append_shot", "raw record write (to the OS; sync in background)")
    timed(station.Station, "is_selected", "device check (helper thread)")
    timed(station.Station, "temperature", "temperature read-back (helper thread)")
    timed(ResultsStore, "record_pending", BACKGROUND[0])
    timed(cycle.ShotWriter, "_work", "writer thread total")
    from benchrun.runner import writer as writer_module

    timed(writer_module, "build_result", BACKGROUND[1])
    timed(ResultsStore, "complete_shot", BACKGROUND[2])

    case = (f"{'fresh' if fresh else 'cached'} circuit solution per shot, durability "
            f"{durability or 'default'}, simulated bench "
            f"{'in this process' if args.in_process else 'in its own process'}")
    with tempfile.TemporaryDirectory(dir=args.out_dir) as tmp:
        seq_path = Path(tmp) / "seq.yaml"
        seq_path.write_text(sequence_text(
            [repeated_point(args.repeats)],
            extra=f"timing: {{sample_interval: {args.sample_interval}}}\n"))
        stamps: list[float] = []
        snapshots: list[dict[str, float]] = []

        def on_stored(result) -> None:
            stamps.append(time.perf_counter())
            with lock:
                snapshots.append(dict(spent))

        load_bench(BENCH_PATH)
        load_sequence(seq_path)
        try:
            with running_bench(seq_path, in_process=args.in_process,
                               prepare=_instrument_bench,
                               prepare_args=(fresh, last_done),
                               start_timeout_s=60) as (resources, clock):
                extra = {} if durability is None else {"durability": durability}
                options = RunOptions(out_dir=Path(tmp) / "out", sim_resources=resources,
                                     clock=clock, show_progress=False,
                                     on_stored=on_stored, **extra)
                outcome = run_sequence(seq_path, BENCH_PATH, options)
        finally:
            for owner, name, original in reversed(patched):
                setattr(owner, name, original)
        for folder in (Path(tmp) / "out").iterdir():
            with RawRecord(folder / "raw.h5", "r") as raw:
                shot = raw.read_shot(raw.keys()[0])
                points = len(next(iter(shot.channels.values())).codes)
                channels = len(shot.channels)

    # steady state: intervals between consecutive concluded shots; the first shot (after the
    # trim shots) and the last (concluded with no shot after it: the pipeline drains) are
    # left out.
    # Headline: median over the shots (robust against other processes on the machine) and
    # mean; the breakdown uses means.
    intervals = [b - a for a, b in itertools.pairwise(stamps[1:-1])]
    n = len(intervals)
    labels = sorted(spent)
    per_shot = {label: [b.get(label, 0.0) - a.get(label, 0.0)
                        for a, b in itertools.pairwise(snapshots[1:-1])] for label in labels}
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

    def mean_ms(label: str) -> float:
        return statistics.fmean(per_shot.get(label, [0.0])) * 1e3

    print("acquisition (mean ms per shot):")
    for label in ACQ_PARTS:
        print(f"  {label:46s} {mean_ms(label):7.2f}")
    print("overhead on the critical path (mean ms per shot):")
    rest = mean["overhead"] * 1e3
    helpers = sorted(k for k in labels if k.endswith("(helper thread)"))
    background = set(BACKGROUND) | {"writer thread total"} | set(helpers)
    for label in sorted(labels, key=lambda k: -mean_ms(k)):
        if label in ACQ_PARTS or label in background:
            continue
        print(f"  {label:46s} {mean_ms(label):7.2f}")
        rest -= mean_ms(label)
    print(f"  {'everything else (bookkeeping, progress, log)':46s} {rest:7.2f}")
    if args.per_shot:
        print("per shot (ms): overhead, then each critical-path part")
        print("  overhead " + " ".join(f"{x * 1e3:5.2f}" for x in overheads))
        for label in labels:
            if label not in ACQ_PARTS and label not in background:
                print(f"  {label[:30]:30s} "
                      + " ".join(f"{x * 1e3:5.2f}" for x in per_shot[label]))
    print("writer and rows threads, overlapping the next acquisition (mean ms per shot):")
    for label in (*BACKGROUND, "writer thread total"):
        print(f"  {label:46s} {mean_ms(label):7.2f}")
    print("station helper threads, beside the bus set-up or the acquisition (mean ms per shot):")
    for label in helpers:
        print(f"  {label:46s} {mean_ms(label):7.2f}")
    return median


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--sample-interval", default="1 ns")
    parser.add_argument("--per-shot", action="store_true",
                        help="also print every shot's overhead and its critical-path parts")
    parser.add_argument("--in-process", action="store_true",
                        help="run the simulated bench in this process (shares the "
                        "interpreter lock with the runner)")
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
    for fresh, _, f in summary[:2]:  # the default durability mode (listed first)
        case = ("a new circuit solution per shot" if fresh else
                "the simulator's cached solution (repeats at one condition: no circuit "
                "solved, the acquisition is digitising and transfer only)")
        verdict = "met" if f["ratio"] < 0.10 else "NOT met"
        print(f"goal (overhead < 10 % of acquisition), default durability, {case}: "
              f"{verdict} ({f['ratio'] * 100:.1f} %)")
    load = os.getloadavg()
    print(f"load average after: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")


if __name__ == "__main__":
    main()
