"""The station's bus read-back started ahead (``Station.read_bus_ahead``).

The runner starts the next shot's bus read-back on a helper thread once the scope holds a
record, while the main thread reads and stores that record. The read must be taken by the
next ``energise`` at the same set-point (one supply query per shot, not two), dropped for
another set-point, never started when more than a read-back is due (a new set-point or the
supply off: charging the bus keeps its place before the scope is armed), and finished before
anything else uses the supply (one query at a time on an instrument's connection).
"""

from __future__ import annotations

import threading
import time
from contextlib import contextmanager

from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.runner.station import Station


@contextmanager
def _station(tmp_path):
    bench = load_bench(BENCH)
    seq = load_sequence(write_sequence(tmp_path, devices="[KFR-2611A-001]",
                                       temperatures="[25 degC]"))
    with simulated_bench(bench, seq) as sim:
        station = Station(bench, sim.resources, sim.clock)
        try:
            yield station
        finally:
            station.make_safe()
            station.close()


def _count_reads(station, monkeypatch, *, delay_s: float = 0.0):
    """Record (thread name, start, end) of every bus read-back of ``station``'s supply;
    ``delay_s``: reads on helper threads answer that much later."""
    main = threading.current_thread()
    reads: list[tuple[str, float, float]] = []
    supply = station.supply
    original = type(supply).measure_voltage

    def measure(self, *a, **k):
        start = time.monotonic()
        if delay_s and threading.current_thread() is not main:
            time.sleep(delay_s)
        try:
            return original(self, *a, **k)
        finally:
            reads.append((threading.current_thread().name, start, time.monotonic()))

    monkeypatch.setattr(type(supply), "measure_voltage", measure)
    return reads


def test_the_next_energise_takes_the_read_started_ahead(tmp_path, monkeypatch):
    with _station(tmp_path) as station:
        first = station.energise(600.0)
        assert abs(first - 600.0) <= 6.0  # within the 1 % band
        reads = _count_reads(station, monkeypatch)
        station.read_bus_ahead(600.0)
        volts = station.energise(600.0)
        assert abs(volts - 600.0) <= 6.0
        # one read in all, and not on this thread: energise took the helper's result
        assert len(reads) == 1, reads
        assert reads[0][0] != threading.current_thread().name


def test_a_read_ahead_for_another_set_point_is_dropped(tmp_path, monkeypatch):
    with _station(tmp_path) as station:
        station.energise(600.0)
        reads = _count_reads(station, monkeypatch)
        station.read_bus_ahead(600.0)
        volts = station.energise(300.0)  # a new set-point: the bus is brought to it here
        assert abs(volts - 300.0) <= 3.0
        main = threading.current_thread().name
        assert reads[0][0] != main  # the read started ahead ...
        assert reads[-1][0] == main  # ... is not what energise returned


def test_no_read_ahead_when_more_than_a_read_back_is_due(tmp_path, monkeypatch):
    with _station(tmp_path) as station:
        reads = _count_reads(station, monkeypatch)
        station.read_bus_ahead(600.0)  # nothing sent yet, the supply off
        station.energise(600.0)
        station.read_bus_ahead(400.0)  # another set-point than the one sent
        time.sleep(0.05)
        assert all(name == threading.current_thread().name for name, _, _ in reads), reads


def test_other_uses_of_the_supply_wait_for_a_read_ahead(tmp_path, monkeypatch):
    with _station(tmp_path) as station:
        station.energise(600.0)
        reads = _count_reads(station, monkeypatch, delay_s=0.2)  # a slow answer
        station.read_bus_ahead(600.0)
        time.sleep(0.02)  # the helper is inside its read now
        station.forget_settings()  # e.g. after an instrument fault
        settled = time.monotonic()
        assert len(reads) == 1 and reads[0][2] <= settled  # the read had finished
        # and it is dropped: the settings are sent again, the bus read on this thread
        station.energise(600.0)
        assert reads[-1][0] == threading.current_thread().name
        # discharging waits too
        station.read_bus_ahead(600.0)
        time.sleep(0.02)
        before = len(reads)  # the helper's read is in flight, not recorded yet
        station.discharge()
        main = threading.current_thread().name
        helper = [r for r in reads[before:] if r[0] != main]
        mains = [r for r in reads[before:] if r[0] == main]
        assert len(helper) == 1 and mains
        assert helper[0][2] <= min(start for _, start, _ in mains)
