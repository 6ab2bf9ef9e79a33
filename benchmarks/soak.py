"""Soak: a long unattended run keeps the runner's memory flat.

Runs one long sequence (one device, 25 degC, test points of at most 1,000 repeats, shot
spacing 0) on the simulated bench and prints the runner process's resident set size (RSS, from
``/proc/self/statm``) after every 1,000 stored shots, beside the bytes the C allocator holds in
use (glibc ``mallinfo2``: live native and large Python/numpy blocks; RSS also counts pages the
allocator touched and keeps free), then the growth per shot after a warm-up of the first
2,000 shots (caches, allocator pools and the preallocated raw-record slots fill first): the
least-squares slope over every sample from the warm-up on, the growth between the first and
last of those samples, and the growth over the last half of the run. The simulated bench runs
in a separate process (as real instruments are separate machines), so its memory does not count;
``--in-process`` runs it in the runner's process, as ``benchrun run`` starts it for ``sim``
resources, and counts it. Its circuit solution is cached per condition, so the repeats cost
only digitising, transfer, storing and analysis: the work the runner repeats for every shot.
Captures carry the simulator's noise (un-quantised noise before 8-bit quantisation); the gate
resistance alternates between 10 and 12 ohm from one test point to the next, so the pulse
settings, the trim and the circuit solution change during the run as well (``--vary 0`` keeps
one).

``--trace`` also prints the ten allocation sites of what was allocated after the warm-up and
is still alive at the end of the run (``tracemalloc`` from the warm-up on; slower).

Goal: RSS growth after the warm-up (fitted slope) below 0.1 kB per shot (flat: 20,000 shots
add < 2 MB).

    python benchmarks/soak.py [--shots 20000] [--durability process] [--trace]
"""

from __future__ import annotations

import argparse
import ctypes
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # measure the tree this script belongs to

from sim_setup import BENCH_PATH, repeated_point, running_bench, sequence_text  # noqa: E402

EVERY = 1000
WARMUP = 2000
GOAL_KB_PER_SHOT = 0.1
MAX_REPEATS = 1000


def _sequence_text(shots: int, vary: int) -> str:
    """Test points of at most 1,000 repeats each (the sequence schema's limit), the gate
    resistance alternating between 10 and 12 ohm from point to point (``vary``) or kept."""
    count = -(-shots // MAX_REPEATS)
    return sequence_text([
        repeated_point(min(MAX_REPEATS, shots - k * MAX_REPEATS),
                       gate="12 ohm" if vary and k % 2 else "10 ohm", label=f"p{k}")
        for k in range(count)])


def rss_kib() -> float:
    with open("/proc/self/statm") as fh:
        pages = int(fh.read().split()[1])
    return pages * os.sysconf("SC_PAGE_SIZE") / 1024.0


class _MallInfo2(ctypes.Structure):
    """glibc's ``struct mallinfo2`` (``malloc.h``, glibc 2.33 and later)."""

    _fields_ = [(name, ctypes.c_size_t) for name in (
        "arena", "ordblks", "smblks", "hblks", "hblkhd", "usmblks", "fsmblks", "uordblks",
        "fordblks", "keepcost")]


def _mallinfo2():
    try:
        fn = ctypes.CDLL(None).mallinfo2
    except (OSError, AttributeError):  # not glibc, or older than 2.33
        return None
    fn.restype = _MallInfo2
    return fn


_MALLINFO2 = _mallinfo2()


def heap_in_use_kib() -> float | None:
    """Bytes the C allocator holds in use (heap chunks plus mmap-ed blocks), kB; None where
    glibc's ``mallinfo2`` is missing."""
    if _MALLINFO2 is None:
        return None
    info = _MALLINFO2()
    return (info.uordblks + info.hblkhd) / 1024.0


def fitted_slope(rows: list[tuple[int, float]]) -> float | None:
    """Least-squares slope of ``(shots, kB)`` samples, kB per shot; None with fewer than two
    samples."""
    if len(rows) < 2:
        return None
    n_mean = sum(n for n, _ in rows) / len(rows)
    v_mean = sum(v for _, v in rows) / len(rows)
    sxx = sum((n - n_mean) ** 2 for n, _ in rows)
    sxy = sum((n - n_mean) * (v - v_mean) for n, v in rows)
    return sxy / sxx if sxx else None


def last_half_growth(rows: list[tuple[int, float]]
                     ) -> tuple[tuple[int, float], tuple[int, float], float] | None:
    """The first and last ``(shots, RSS kB)`` sample of the last half of the run and the
    growth between them in kB per shot; None with fewer than two samples in that half."""
    if not rows:
        return None
    middle = rows[-1][0] / 2
    half = [row for row in rows if row[0] >= middle]
    if len(half) < 2:
        return None
    (n0, r0), (n1, r1) = half[0], half[-1]
    return (n0, r0), (n1, r1), (r1 - r0) / (n1 - n0)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--shots", type=int, default=20000)
    parser.add_argument("--vary", type=int, default=1,
                        help="alternate the gate resistance between test points; 0: keep it")
    parser.add_argument("--durability", default="process", choices=("process", "power-loss"))
    parser.add_argument("--out-dir", type=Path, default=None)
    parser.add_argument("--in-process", action="store_true",
                        help="run the simulated bench in this process (as 'benchrun run' "
                             "does for sim resources): its memory is counted too")
    parser.add_argument("--trace", action="store_true")
    parser.add_argument("--warmup", type=int, default=WARMUP,
                        help=f"shots before the growth is measured (default {WARMUP})")
    args = parser.parse_args()

    from benchrun.runner.execute import RunOptions, run_sequence

    print(f"load average: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    with tempfile.TemporaryDirectory(dir=args.out_dir) as tmp:
        seq = Path(tmp) / "soak.yaml"
        seq.write_text(_sequence_text(args.shots, args.vary))
        rows: list[tuple[int, float, float, float | None]] = []
        state = {"n": 0, "t0": time.perf_counter(), "snap": None}

        def on_stored(result) -> None:
            state["n"] += 1
            n = state["n"]
            if n % EVERY == 0:
                rss, heap = rss_kib(), heap_in_use_kib()
                rows.append((n, rss, time.perf_counter() - state["t0"], heap))
                heap_text = "" if heap is None else f"  heap in use {heap / 1024:7.2f} MB"
                print(f"{n:7d} shots  RSS {rss / 1024:8.2f} MB{heap_text}  "
                      f"{rows[-1][2]:7.0f} s", flush=True)
            if args.trace and n == args.warmup:
                import tracemalloc

                tracemalloc.start(10)  # from here on: what is still alive at the end grew
            if args.trace and n == args.shots:
                import tracemalloc

                state["snap"] = tracemalloc.take_snapshot()  # while the run holds it

        # in process: as `benchrun run` does with sim resources; its memory counts too
        with running_bench(seq, in_process=args.in_process) as (resources, clock):
            options = RunOptions(out_dir=Path(tmp) / "runs", sim_resources=resources,
                                 clock=clock, show_progress=False, on_stored=on_stored,
                                 durability=args.durability)
            outcome = run_sequence(seq, BENCH_PATH, options)
        print(f"run {outcome.status}: {outcome.shots_stored} shots stored "
              f"({outcome.shots_valid} valid)")
        if args.trace and state["snap"] is not None:

            top = state["snap"].statistics("traceback")
            print("allocations made after the warm-up and still alive at the end:")
            for stat in top[:10]:
                print(f"  {stat.size / 1024:+9.1f} kB  {stat.count:+7d} blocks")
                for line in stat.traceback.format()[-10:]:
                    print(f"      {line}")
    after = [(n, rss) for n, rss, _, _ in rows if n >= args.warmup]
    slope = fitted_slope(after)
    if slope is not None:
        heap_after = [(n, heap) for n, _, _, heap in rows if n >= args.warmup and heap is not None]
        heap_slope = fitted_slope(heap_after)
        heap_text = "" if heap_slope is None else \
            f"; heap in use {heap_slope * 1024:+.0f} bytes per shot"
        print(f"fitted slope from {args.warmup} shots on ({len(after)} samples): RSS "
              f"{slope * 1024:+.0f} bytes per shot{heap_text}")
        (n0, r0), (n1, r1) = after[0], after[-1]
        print(f"RSS growth after {args.warmup} shots: {(r1 - r0) / 1024:+.2f} MB over {n1 - n0} "
              f"shots = {(r1 - r0) / (n1 - n0) * 1024:+.0f} bytes per shot")
        print(f"goal: fitted slope < {GOAL_KB_PER_SHOT * 1024:.0f} bytes per shot: "
              f"{'met' if slope < GOAL_KB_PER_SHOT else 'NOT met'}")
    half = last_half_growth([(n, rss) for n, rss, _, _ in rows])
    if half is not None:
        (n0, r0), (n1, r1), per_shot = half
        print(f"RSS growth over the last half ({n0} to {n1} shots): {(r1 - r0) / 1024:+.2f} MB "
              f"= {per_shot * 1024:+.0f} bytes per shot")
    return 0


if __name__ == "__main__":
    sys.exit(main())
