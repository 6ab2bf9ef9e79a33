"""An in-process simulated bench for bench files whose resources are ``sim``.

:func:`simulated_bench` starts :class:`benchrun.simulator.server.SimulatedBench` holding the
sequence's virtual lot, on a fixture built from the bench file (with the load inductor a few
percent off its nameplate, as real inductors are, so the trim shots have work to do), and
yields what :func:`benchrun.runner.execute.run_sequence` needs: resources, the accelerated
clock and the virtual catalogue's part ratings.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from benchrun.config.bench import BenchConfig
from benchrun.config.sequence import PartRatings, SequenceConfig
from benchrun.errors import ConfigError

#: Simulated seconds per wall-clock second (thermal lag, bus charge and bleeder discharge).
DEFAULT_SPEEDUP = 200.0

#: The simulated load inductor's deviation from the bench file's nameplate value.
INDUCTOR_DEVIATION = -0.04


class AcceleratedClock:
    """The runner's clock on the simulated bench's time: waits are shortened by the speed-up,
    readings of time come from the bench, so dwell, soak and discharge logic run unchanged."""

    def __init__(self, bench: Any) -> None:
        self.bench = bench
        self.speedup = float(bench.clock_speedup)

    def monotonic(self) -> float:
        return float(self.bench.now())

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds / self.speedup)


class RemoteClock:
    """The runner's clock on a simulated bench in another process, started at ``t0`` (a
    ``time.monotonic()`` reading) with a clock speed-up: the same law as
    :class:`AcceleratedClock`, since ``time.monotonic`` is system-wide."""

    def __init__(self, t0: float, speedup: float) -> None:
        self.t0, self.speedup = t0, speedup

    def monotonic(self) -> float:
        return (time.monotonic() - self.t0) * self.speedup

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds / self.speedup)


@contextlib.contextmanager
def bench_in_child_process(target: Any, args: tuple, start_timeout_s: float = 120.0
                           ) -> Iterator[tuple[dict[str, str], RemoteClock]]:
    """Run a simulated bench in a spawned child process and yield ``(resources, clock)``.

    ``target(*args, conn, stop)`` must start the bench, send ``(resources, t0, speedup)``
    through ``conn`` and wait on ``stop``; the child is stopped when the block ends.
    """
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    parent, child = ctx.Pipe()
    stop = ctx.Event()
    proc = ctx.Process(target=target, args=(*args, child, stop), daemon=True)
    proc.start()
    child.close()
    try:
        if not parent.poll(start_timeout_s):
            raise RuntimeError("the simulated bench process did not start")
        resources, t0, speedup = parent.recv()
        yield resources, RemoteClock(t0, speedup)
    finally:
        stop.set()
        proc.join(10)


@dataclass
class SimulatedSetup:
    """A running simulated bench and what the runner needs from it."""

    bench: Any
    resources: dict[str, str]
    clock: AcceleratedClock
    catalog: Any

    def ratings(self, part: str) -> PartRatings | None:
        """Ratings of a virtual part (VRRM, IF max, Tj range) as the sequence schema has them."""
        try:
            found = self.catalog.part(part).ratings
        except ConfigError:
            return None
        return PartRatings(vrrm=found.vrrm_V, if_max=found.if_max_A, tj_max=found.tj_max_K,
                           tj_min=found.tj_min_K)


def sim_fixture(bench: BenchConfig) -> Any:
    """The simulator's fixture from the bench file's fixture values."""
    from benchrun.simulator.physics import Fixture

    fx = bench.fixture
    return Fixture(
        load_inductance_H=fx.load_inductance * (1.0 + INDUCTOR_DEVIATION),
        load_resistance_ohm=fx.load_resistance,
        stray_inductance_H=fx.stray_inductance,
        bus_capacitance_F=fx.bus_capacitance,
        bleeder_resistance_ohm=fx.bleeder_resistance,
    )


def sim_capture_model(bench: BenchConfig) -> Any:
    """The simulator's capture model with the probe errors the bench file states
    (``probes.<signal>.simulated``), or None (the simulator's defaults) when none states any."""
    from benchrun.simulator.capture import DEFAULT_BANDWIDTH_HZ, PhysicsCaptureModel

    stated = {name: p.simulated for name, p in bench.probes.items() if p.simulated is not None}
    if not stated:
        return None
    bandwidth = dict(DEFAULT_BANDWIDTH_HZ)
    bandwidth.update({n: e.bandwidth for n, e in stated.items() if e.bandwidth is not None})
    return PhysicsCaptureModel(
        bandwidth_hz=bandwidth,
        skew_s={n: e.skew for n, e in stated.items()},
        gain_error={n: e.gain_error for n, e in stated.items()},
        offset_error={n: float(e.offset) for n, e in stated.items()},
    )


@contextlib.contextmanager
def simulated_bench(bench: BenchConfig, sequence: SequenceConfig, *, seed: int = 1,
                    speedup: float = DEFAULT_SPEEDUP) -> Iterator[SimulatedSetup]:
    """Start the simulated bench with the sequence's lot in its handler."""
    from benchrun.simulator.devices import load_virtual_parts
    from benchrun.simulator.server import SimulatedBench

    catalog = load_virtual_parts()
    lot = catalog.lot(sequence.lot)
    if lot.part.name != sequence.part:
        raise ConfigError(f"virtual lot {sequence.lot} holds {lot.part.name}, not "
                          f"{sequence.part}", field="lot")
    families = {role: entry.family for role, entry in bench.instruments.items()}
    wiring = {probe.channel: name for name, probe in bench.probes.items()}
    sim = SimulatedBench(lot, sim_fixture(bench), seed=seed, clock_speedup=speedup,
                         families=families, wiring=wiring,
                         capture_model=sim_capture_model(bench))
    resources = sim.start()
    try:
        yield SimulatedSetup(sim, resources, AcceleratedClock(sim), catalog)
    finally:
        sim.stop()
