"""Simulated-bench speed: a 1,000,000-point two-channel capture (simulate + digitise).

Prints the time of a cold shot (new operating point: circuit solved, then digitised) and of a
repeated shot at the same operating point (cached physics: resampling, noise and quantisation
only), the median of several runs.  Target: < 50 ms per capture.
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


def main() -> None:
    catalog = load_virtual_parts()
    lot = catalog.lot("L2611-A")
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

    cold = []
    for k, serial in enumerate(serials[:6]):
        diode = lot.device(serial)
        t0, c0 = time.perf_counter(), time.process_time()
        wf = simulate_double_pulse(fixture, switch, diode, timing, 600.0, 298.15 + k)
        t_sim = time.perf_counter()
        digitize(wf, acq, rng)
        t_end, c_end = time.perf_counter(), time.process_time()
        cold.append((t_end - t0, t_sim - t0, t_end - t_sim, c_end - c0))

    diode = lot.device(serials[0])
    wf = simulate_double_pulse(fixture, switch, diode, timing, 600.0, 298.15)
    digitize(wf, acq, rng)
    warm, warm_cpu = [], []
    for _ in range(10):
        t0, c0 = time.perf_counter(), time.process_time()
        wf = simulate_double_pulse(fixture, switch, diode, timing, 600.0, 298.15)
        digitize(wf, acq, rng)
        warm.append(time.perf_counter() - t0)
        warm_cpu.append(time.process_time() - c0)

    med = statistics.median
    print(f"capture: {N_POINTS:,} points x 2 channels, dt = {dt * 1e12:.1f} ps")
    print(
        f"cold shot (new operating point): {med(c[0] for c in cold) * 1e3:.1f} ms median "
        f"(circuit solve {med(c[1] for c in cold) * 1e3:.1f} ms + digitise "
        f"{med(c[2] for c in cold) * 1e3:.1f} ms); CPU {med(c[3] for c in cold) * 1e3:.1f} ms"
    )
    print(
        f"repeat shot (cached physics):     {med(warm) * 1e3:.1f} ms median, CPU "
        f"{med(warm_cpu) * 1e3:.1f} ms (target < 50 ms)"
    )
    print(f"load average during the run: {os.getloadavg()[0]:.2f} (2 cores shared)")


if __name__ == "__main__":
    main()
