"""Benchmark: full recovery extraction on a 10,000,000-point × 2-channel record.

Compares ``analyze_recovery`` on the whole record (event location without hints, then every
metric) with ``np.sum`` over the same two arrays, timed in the same run (best of several
repeats). Goal: ratio ≤ 3.

Run: ``python benchmarks/analysis.py``
"""

from __future__ import annotations

import math
import time

import numpy as np

from benchrun.analysis import analyze_recovery

N = 10_000_000
DT = 0.2e-9  # 5 GS/s → a 2 ms record
REPEATS = 7


def make_record(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Double pulse with the recovery about 60 % into the record, 8-bit quantised with noise."""
    t = np.arange(N) * DT
    i = np.zeros(N)
    v = np.full(N, -600.0)
    t_off, t_on = 0.4e-3, 1.2e-3  # end of first pulse, second turn-on
    IF, a, tau_e, irrm = 30.0, 200e6, 40e-9, 17.0
    ts = t_on + (IF + irrm) / a
    free = (t >= t_off) & (t < t_on)
    i[free] = IF
    v[free] = 1.2
    ramp = (t >= t_on) & (t < ts)
    i[ramp] = IF - a * (t[ramp] - t_on)
    v[ramp] = 1.2
    tail = t >= ts
    i[tail] = -irrm * np.exp(-(t[tail] - ts) / tau_e)
    v[tail] = -600.0 - 20.0 * np.exp(-(t[tail] - ts) / tau_e)
    lsb_i, lsb_v = 2 * 36.0 / 256, 2 * 720.0 / 256
    i = np.round((i + rng.normal(0, lsb_i, N)) / lsb_i) * lsb_i
    v = np.round((v + rng.normal(0, lsb_v, N)) / lsb_v) * lsb_v
    return v, i


def best_of(func, repeats: int = REPEATS) -> float:
    best = math.inf
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    v, i = make_record(np.random.default_rng(1))
    baseline = best_of(lambda: (np.sum(v), np.sum(i)))
    result = analyze_recovery(None, v, i, dt=DT)
    analysis = best_of(lambda: analyze_recovery(None, v, i, dt=DT))
    print(f"record: {N:,} points x 2 channels (float64), dt = {DT:g} s")
    print(f"np.sum over both arrays : {baseline * 1e3:8.2f} ms")
    print(f"analyze_recovery        : {analysis * 1e3:8.2f} ms")
    print(f"ratio                   : {analysis / baseline:8.2f} x   (goal <= 3)")
    print(f"found: IF = {result.if_A:.3f} A, Irrm = {result.irrm_A:.3f} A, "
          f"trr = {result.trr_s * 1e9:.2f} ns, Qrr = {result.qrr_C * 1e9:.1f} nC, "
          f"flags = {list(result.flags)}")


if __name__ == "__main__":
    main()
