"""Benchmark: full recovery extraction on a 10,000,000-point × 2-channel record.

Compares ``analyze_recovery`` on the whole record (event location without hints, then every
metric, its capture uncertainty, corrections and flags) with ``np.sum`` over the same two
arrays, timed in the same run (best of several repeats), on four contents: 8-bit codes with
noise, un-quantised noise, clean, and 8-bit with ringing after the recovery. Goal: every
ratio ≤ 3.

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


def make_record(rng: np.random.Generator, *, quantise: bool = True, noise: bool = True,
                ringing: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Double pulse with the recovery about 60 % into the record.

    Variants: 8-bit codes with 1 LSB rms noise (default), un-quantised noise, clean, and a
    recovery followed by a 30 MHz ring (20 % of Irrm, decaying in 200 ns) on both channels.
    """
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
    if ringing:
        late = t >= ts + 3 * tau_e
        ring = np.sin(2 * np.pi * 30e6 * (t[late] - ts)) * np.exp(-(t[late] - ts) / 200e-9)
        i[late] += 0.2 * irrm * ring
        v[late] += 30.0 * ring
    lsb_i, lsb_v = 2 * 36.0 / 256, 2 * 720.0 / 256
    if noise:
        i += rng.normal(0, lsb_i, N)
        v += rng.normal(0, lsb_v, N)
    if quantise:
        i = np.round(i / lsb_i) * lsb_i
        v = np.round(v / lsb_v) * lsb_v
    return v, i


VARIANTS = {
    "8-bit + noise": dict(quantise=True, noise=True),
    "float + noise": dict(quantise=False, noise=True),
    "clean": dict(quantise=False, noise=False),
    "8-bit + noise, ringing": dict(quantise=True, noise=True, ringing=True),
}


def best_of(func, repeats: int = REPEATS) -> float:
    best = math.inf
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    print(f"record: {N:,} points x 2 channels (float64), dt = {DT:g} s")
    worst = 0.0
    for name, kwargs in VARIANTS.items():
        v, i = make_record(np.random.default_rng(1), **kwargs)
        result = analyze_recovery(None, v, i, dt=DT)
        # interleaved, best of each: a busy machine slows both alike
        baseline = analysis = math.inf
        for _ in range(REPEATS):
            baseline = min(baseline, best_of(lambda v=v, i=i: (np.sum(v), np.sum(i)), 1))
            analysis = min(analysis, best_of(lambda v=v, i=i: analyze_recovery(
                None, v, i, dt=DT), 1))
        worst = max(worst, analysis / baseline)
        print(f"{name:<24s} np.sum {baseline * 1e3:6.2f} ms  analyze_recovery "
              f"{analysis * 1e3:6.2f} ms  ratio {analysis / baseline:5.2f} x  "
              f"(Irrm {result.irrm_A:.3f} A, trr {result.trr_s * 1e9:.1f} ns, "
              f"Qrr {result.qrr_C * 1e9:.0f} nC, flags {[f.split(':')[0] for f in result.flags]})")
    print(f"worst ratio: {worst:.2f} x   (goal <= 3)")


if __name__ == "__main__":
    main()
