"""Simulated-bench speed: a 1,000,000-point two-channel capture (simulate + digitise).

Two cases, each timed over several shots (wall clock and process CPU time):

* new operating point — the physics is not cached: the double-pulse circuit is solved for a
  device / temperature not simulated before, then the capture is digitised (bandwidth filter,
  resampling to the record, noise, 8-bit quantisation);
* repeated shot — same operating point again: the solved circuit and the filtered waveforms
  are cached, only resampling, noise and quantisation are redone.

Target (issue 3): < 50 ms per capture.  The machine is shared (2 cores); the load average is
printed before and after so the figures can be read against it — the minimum is the best
estimate for a quiet machine, the median what a shared machine gives.
Run: python benchmarks/simulator.py
"""

from __future__ import annotations

import os
import statistics
import time

import numpy as np

from benchrun.simulator.acquisition import AcquisitionSettings, digitize
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.physics import (
    Fixture,
    PulseTiming,
    SwitchModel,
    first_pulse_for_current,
    simulate_double_pulse,
)

N_POINTS = 1_000_000
N_NEW = 12
N_REPEAT = 12
TARGET_S = 50e-3


def _row(label: str, wall: list[float], cpu: list[float]) -> str:
    med = statistics.median(wall)
    verdict = "meets" if med < TARGET_S else "MISSES"
    return (
        f"{label:<36} wall median {med * 1e3:6.1f} ms, min {min(wall) * 1e3:6.1f} ms; "
        f"CPU median {statistics.median(cpu) * 1e3:6.1f} ms  ({verdict} < 50 ms)"
    )


def main() -> None:
    load_before = os.getloadavg()[0]
    catalog = load_virtual_parts()
    lot = catalog.lot("LT-0117")
    serials = lot.serials
    fixture = Fixture()
    switch = SwitchModel()
    t1 = first_pulse_for_current(fixture, 600.0, 30.0)
    timing = PulseTiming(first_pulse_s=t1, off_time_s=10e-6, second_pulse_s=5e-6)
    # the record covers the end of the first pulse, the off time and the second pulse
    dt = (timing.second_off_s + 2e-6 - (t1 - 2e-6)) / N_POINTS
    acq = AcquisitionSettings(
        sample_interval_s=dt,
        record_length=N_POINTS,
        t_start_s=t1 - 2e-6,
        channel_ranges={"diode_voltage": (1500.0, -600.0), "diode_current": (120.0, 0.0)},
        bandwidth_hz={"diode_voltage": 200e6, "diode_current": 100e6},
        skew_s={"diode_current": 2e-9},
        seed=1,
    )
    rng = np.random.default_rng(2)
    # warm-up (imports, first allocations) at an operating point not used below
    digitize(simulate_double_pulse(fixture, switch, lot.device(serials[0]), timing, 600.0, 290.0),
             acq, rng)

    new_wall, new_cpu, solve_wall, digitise_wall = [], [], [], []
    for k in range(N_NEW):
        diode = lot.device(serials[k % len(serials)])
        temperature = 298.15 + 5.0 * k  # every shot a new (device, temperature) pair
        t0, c0 = time.perf_counter(), time.process_time()
        wf = simulate_double_pulse(fixture, switch, diode, timing, 600.0, temperature)
        t_sim = time.perf_counter()
        digitize(wf, acq, rng)
        t_end, c_end = time.perf_counter(), time.process_time()
        new_wall.append(t_end - t0)
        new_cpu.append(c_end - c0)
        solve_wall.append(t_sim - t0)
        digitise_wall.append(t_end - t_sim)

    diode = lot.device(serials[0])
    digitize(simulate_double_pulse(fixture, switch, diode, timing, 600.0, 298.15), acq, rng)
    rep_wall, rep_cpu = [], []
    for _ in range(N_REPEAT):
        t0, c0 = time.perf_counter(), time.process_time()
        wf = simulate_double_pulse(fixture, switch, diode, timing, 600.0, 298.15)
        digitize(wf, acq, rng)
        rep_wall.append(time.perf_counter() - t0)
        rep_cpu.append(time.process_time() - c0)

    med = statistics.median
    print(f"capture: {N_POINTS:,} points x 2 channels, dt = {dt * 1e12:.1f} ps; "
          f"{len(wf.t):,} simulator points per shot")
    print(_row(f"new operating point ({N_NEW} shots):", new_wall, new_cpu))
    print(f"{'':<36} of which circuit solve {med(solve_wall) * 1e3:.1f} ms, "
          f"digitise (with filtering) {med(digitise_wall) * 1e3:.1f} ms (medians)")
    print(_row(f"repeated shot, cached ({N_REPEAT} shots):", rep_wall, rep_cpu))
    print(f"load average (1 min) before {load_before:.2f}, after {os.getloadavg()[0]:.2f} "
          f"on {os.cpu_count()} cores (shared with other work)")


if __name__ == "__main__":
    main()
