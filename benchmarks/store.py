"""Store cost per shot: durable HDF5 append (flush + fsync) and durable results-row commit.

Writes ``--shots`` shots of ``--channels`` channels x ``--samples`` int16 codes (a smooth
step with quantisation noise, like an 8-bit capture stored as int16) into a fresh raw record,
once with gzip (level 1 + shuffle, the default) and once uncompressed, and stores the same
number of result rows in a SQLite results database (WAL, synchronous=FULL) and, with ``--db``,
in any other database URL. Prints milliseconds per shot and bytes per shot.

Then times the runner's own case: every shot is written before the next one fires, so the
cost of one append is per-shot overhead. ``--runner-appends`` appends of 3 channels x 16617
int8 codes, uncompressed, in each durability mode (``"process"``: flushes only;
``"power-loss"``: flushes + ``fsync``), median milliseconds per append.

Then the cost on disk of a *finished* record, per shot, as the runner leaves it (slots,
uncompressed) and after ``benchrun compact`` (HDF5 deflate level 1, byte shuffle for 16-bit
codes: :mod:`benchrun.store.compact`), for ``--compact-shots`` shots of 3 x 16617 codes of
three kinds of content: 8-bit codes of a quiet capture, 8-bit codes of a ringing one, and
un-quantised noise (16-bit codes whose low bits are random). Prints bytes per shot, the
ratio, the seconds per 1,000 shots of the compaction (digest check of every shot included)
and of building the shot groups and table when the record is closed, and whether the
compaction goal (at least 2x smaller at under 1 s per 1,000 shots) is met.

Run: ``python benchmarks/store.py [--shots N] [--samples N] [--channels N] [--db URL]
[--runner-appends N] [--compact-shots N] [--only-compact]``
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import statistics
import tempfile
import time
import zlib
from pathlib import Path

import numpy as np

from benchrun.records import ShotResult, TestPoint
from benchrun.store import RawRecord, ResultsStore


@dataclasses.dataclass(frozen=True)
class _Channel:
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclasses.dataclass(frozen=True)
class _Probe:
    scale: float
    deskew_s: float = 0.0


def _channels(rng: np.random.Generator, n_channels: int, n: int) -> dict[str, _Channel]:
    t = np.arange(n)
    out = {}
    for c in range(n_channels):
        wave = 100 * np.tanh((t - n * 0.4) / (30 + 10 * c)) + rng.normal(0, 1.5, n)
        out[f"ch{c}"] = _Channel(np.round(wave).astype(np.int16), 0.01, 0.0, -128, 127)
    return out


def bench_raw(folder: Path, shots: int, n_channels: int, n: int, compression: str | None):
    rng = np.random.default_rng(1)
    probes = {f"ch{c}": _Probe(100.0) for c in range(n_channels)}
    data = [_channels(rng, n_channels, n) for _ in range(min(shots, 8))]
    path = folder / f"raw-{compression}.h5"
    times = []
    with RawRecord(path, "w", compression=compression) as raw:
        for i in range(shots):
            t0 = time.perf_counter()
            raw.append_shot(raw.next_key(), 0.0, 1e-9, data[i % len(data)], probes,
                            {"serial": f"S{i:04d}", "settings": {"bus_voltage_V": 600.0}})
            times.append(time.perf_counter() - t0)
    return statistics.median(times), path.stat().st_size / shots


RUNNER_CHANNELS = ("diode_voltage", "diode_current", "gate")
RUNNER_SAMPLES = 16617


def bench_runner_case(folder: Path, appends: int, durability: str) -> float:
    """Median seconds per ``append_shot`` of 3 x 16617 int8 codes, uncompressed."""
    rng = np.random.default_rng(2)
    probes = {name: _Probe(100.0, 1e-9) for name in RUNNER_CHANNELS}
    data = [
        {name: _Channel(rng.integers(-128, 128, RUNNER_SAMPLES).astype(np.int8), 0.01, -0.2,
                        -128, 127) for name in RUNNER_CHANNELS}
        for _ in range(8)
    ]
    path = folder / f"runner-{durability}.h5"
    times = []
    with RawRecord(path, "w", compression=None, durability=durability) as raw:
        for i in range(appends):
            attrs = {"serial": f"S{i:04d}", "point_index": i % 4, "repeat": 0, "attempt": 0,
                     "timestamp": "2031-04-02T10:00:00+00:00",
                     "settings": {"bus_voltage_V": 600.0, "forward_current_A": 30.0}}
            t0 = time.perf_counter()
            raw.append_shot(raw.next_key(), -2e-6, 2.5e-10, data[i % len(data)], probes, attrs)
            times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _content(kind: str, rng: np.random.Generator) -> dict[str, _Channel]:
    """Three channels of 16617 codes of one kind of content (module docstring)."""
    n = RUNNER_SAMPLES
    t = np.arange(n) / n
    step = np.tanh((t - 0.6) * 400)  # the commutation: a smooth step of the capture
    ring = np.exp(-(t - 0.6).clip(0) * 60) * np.sin(2 * np.pi * 180 * t) * (t > 0.6)
    out = {}
    for c, name in enumerate(RUNNER_CHANNELS):
        if kind == "8-bit quiet":
            wave = 90 * step + rng.normal(0, 0.6, n)
            codes, lo, hi = np.clip(np.round(wave), -128, 127).astype(np.int8), -128, 127
        elif kind == "8-bit ringing":
            wave = 70 * step + 50 * ring * (1 + c) / 3 + rng.normal(0, 1.5, n)
            codes, lo, hi = np.clip(np.round(wave), -128, 127).astype(np.int8), -128, 127
        else:  # un-quantised noise: a 16-bit record whose low bits are noise
            wave = 20000 * step + rng.normal(0, 300, n)
            codes, lo, hi = np.round(wave).astype(np.int16), -32768, 32767
        out[name] = _Channel(codes, 0.01, -0.2, lo, hi)
    return out


def bench_compaction(folder: Path, kind: str, shots: int) -> dict[str, float]:
    """Bytes per shot before and after compaction, and seconds per 1,000 shots."""
    from benchrun.store.compact import compact_record

    rng = np.random.default_rng(3)
    probes = {name: _Probe(100.0, 1e-9) for name in RUNNER_CHANNELS}
    data = [_content(kind, rng) for _ in range(8)]
    path = folder / f"finished-{kind.replace(' ', '-')}.h5"
    raw = RawRecord(path, "w", compression=None, durability="process")
    for i in range(shots):
        attrs = {"serial": f"SN0117-{i % 10 + 1:03d}", "repeat": i // 10, "attempt": 0,
                 "point": {"index": i % 2, "label": "nominal", "temperature_K": 298.15},
                 "timestamp": "2031-04-02T10:00:00+00:00", "temperature_K": 298.2,
                 "bus_voltage_V": 600.1, "settings": {"first_pulse_s": 6.6e-6}}
        raw.append_shot(f"p{i % 2:03d}-SN0117-{i % 10 + 1:03d}-r{i // 10:02d}-a0", -2e-6,
                        2.5e-10, data[i % len(data)], probes, attrs)
    # the filter alone: shuffle (16-bit) + deflate 1 of every shot's codes, one thread
    from benchrun.store.compact import DEFLATE_LEVEL, _shuffle

    t0 = time.perf_counter()
    for i in range(shots):
        rows = np.stack([ch.codes for ch in data[i % len(data)].values()])
        zlib.compress(_shuffle(rows.tobytes(), rows.dtype.itemsize), DEFLATE_LEVEL)
    filter_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    raw.close()  # builds the shot groups and the table
    described = time.perf_counter() - t0
    before = path.stat().st_size
    result = compact_record(path)
    return {"before": before / shots, "after": result.bytes_after / shots,
            "ratio": before / result.bytes_after, "compact_s": result.seconds * 1000 / shots,
            "describe_s": described * 1000 / shots, "filter_s": filter_s * 1000 / shots}


def bench_db(url: str, shots: int) -> float:
    times = []
    with ResultsStore(url) as store:
        run_id = f"BENCH-{time.time_ns()}"
        store.create_run(run_id, "DX-4417", "LT-0117")
        for i in range(shots):
            shot = ShotResult(
                run_id=run_id, part="DX-4417", lot="LT-0117", serial=f"S{i:04d}",
                point=TestPoint(0, 298.15, 600.0, 30.0), repeat=0, attempt=0,
                timestamp="2031-04-02T10:00:00+00:00",
                conditions={"if_A": 30.01, "didt_A_per_s": 5e8, "vr_V": 600.2,
                            "temperature_K": 298.2},
                metrics={k: 1e-7 * (i + 1) for k in ("trr_s", "ta_s", "tb_s", "qrr_C")},
                raw_ref=f"shots/{i:06d}",
            )
            t0 = time.perf_counter()
            store.add_shot(shot)
            times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shots", type=int, default=200)
    parser.add_argument("--samples", type=int, default=50_000)
    parser.add_argument("--channels", type=int, default=4)
    parser.add_argument("--db", default=None, help="extra database URL to time")
    parser.add_argument("--runner-appends", type=int, default=200,
                        help="appends timed for the runner's case (median of these)")
    parser.add_argument("--compact-shots", type=int, default=500,
                        help="shots of each finished record compacted")
    parser.add_argument("--only-compact", action="store_true",
                        help="only the finished-record (compaction) figures")
    args = parser.parse_args()
    load = os.getloadavg()
    print(f"load average before: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} "
          f"on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if args.only_compact:
            _print_compaction(folder, args.compact_shots)
            return
        print(f"{args.shots} shots, {args.channels} channels x {args.samples} int16 samples")
        for compression in ("gzip", None):
            median, size = bench_raw(folder, args.shots, args.channels, args.samples,
                                     compression)
            print(f"raw record ({compression or 'uncompressed'}): {median * 1e3:.2f} ms/shot "
                  f"(median, flush + fsync included), {size / 1e3:.1f} kB/shot")
        sqlite = bench_db(f"sqlite:///{folder / 'results.db'}", args.shots)
        print(f"results row (SQLite, WAL, synchronous=FULL): {sqlite * 1e3:.2f} ms/shot")
        if args.db:
            other = bench_db(args.db, args.shots)
            print(f"results row ({args.db.split(':')[0]}): {other * 1e3:.2f} ms/shot")
        appends = max(50, args.runner_appends)
        for durability in ("process", "power-loss"):
            median = bench_runner_case(folder, appends, durability)
            print(f"runner case, {len(RUNNER_CHANNELS)} x {RUNNER_SAMPLES} int8, uncompressed, "
                  f"durability {durability}: {median * 1e3:.3f} ms/append "
                  f"(median of {appends})")
        _print_compaction(folder, args.compact_shots)


def _print_compaction(folder: Path, shots: int) -> None:
    print(f"finished record, {shots} shots of {len(RUNNER_CHANNELS)} x {RUNNER_SAMPLES} codes: "
          "slots as written vs compacted (deflate 1)")
    met = True
    for kind in ("8-bit quiet", "8-bit ringing", "un-quantised noise"):
        r = bench_compaction(folder, kind, shots)
        ok = r["ratio"] >= 2.0 and r["compact_s"] < 1.0
        met = met and ok
        print(f"  {kind:<19} {r['before'] / 1e3:7.1f} kB/shot -> {r['after'] / 1e3:6.1f} "
              f"kB/shot ({r['ratio']:.2f}x); per 1,000 shots: compaction {r['compact_s']:.2f} s "
              f"(of it the deflate filter alone, one thread: {r['filter_s']:.2f} s), "
              f"shot groups + table at close {r['describe_s']:.2f} s"
              f"{'' if ok else '  (goal not met)'}")
    print("compaction goal (>= 2x smaller, < 1 s per 1,000 shots) "
          + ("met for every content" if met else "NOT met for every content"))
    load = os.getloadavg()
    print(f"load average after: {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")


if __name__ == "__main__":
    main()
