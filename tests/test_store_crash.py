"""Crash safety at the store level: a writer killed with SIGKILL loses only the shot in flight.

A child process writes shots (raw record first, then the results row) and prints
``COMMITTED ...`` only after both calls returned. The parent kills it with ``kill -9`` at
several moments, then checks that the raw file still opens, that every acknowledged shot is in
both the HDF5 record and the database, and that continuing (the ``--resume`` logic of
``tested_keys``) completes the plan without a duplicate row.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest

from benchrun.store import RawRecord, ResultsStore

RUN_ID = "R-crash"
SERIALS, POINTS, REPEATS = 6, 2, 2

CHILD = r"""
import sys
from dataclasses import dataclass

import numpy as np

from benchrun.records import ShotResult, TestPoint
from benchrun.store import RawRecord, ResultsStore


@dataclass(frozen=True)
class Channel:  # duck-typed like benchrun.analysis.pipeline.ChannelData (no scipy import)
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclass(frozen=True)
class Probe:
    scale: float
    deskew_s: float = 0.0


raw_path, url = sys.argv[1], sys.argv[2]
serials, points, repeats = (int(x) for x in sys.argv[3:6])
plan = [(f"S{s:02d}", p, r) for s in range(serials) for p in range(points) for r in range(repeats)]
rng = np.random.default_rng(0)
probes = {"diode_voltage": Probe(100.0), "diode_current": Probe(100.0, 1e-9)}
with ResultsStore(url) as store, RawRecord(raw_path) as raw:
    if store.get_run("R-crash") is None:
        store.create_run("R-crash", "DX-4417", "LT-0117")
    done = store.tested_keys("R-crash")
    print("START", len(done), flush=True)
    for serial, p, r in plan:
        if (serial, p, r) in done:
            continue
        channels = {
            name: Channel(rng.integers(-128, 128, 50000).astype(np.int16), 0.01, 0.0, -128, 127)
            for name in probes
        }
        attrs = {"serial": serial, "point_index": p, "repeat": r}
        ref = raw.append_shot(raw.next_key(), 0.0, 1e-9, channels, probes, attrs)
        point = TestPoint(index=p, temperature_K=298.15, bus_voltage_V=600.0,
                          forward_current_A=30.0)
        store.add_shot(ShotResult(
            run_id="R-crash", part="DX-4417", lot="LT-0117", serial=serial, point=point,
            repeat=r, attempt=0, timestamp="2031-04-02T10:00:00+00:00",
            conditions={"if_A": 30.0 + rng.random()}, metrics={"trr_s": 1e-7 * rng.random()},
            raw_ref=ref,
        ))
        print("COMMITTED", serial, p, r, ref, flush=True)
print("DONE", flush=True)
"""


def _start_child(script: Path, raw_path: Path, url: str) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, str(script), str(raw_path), url, str(SERIALS), str(POINTS),
         str(REPEATS)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip


def _parse(line: str) -> tuple[tuple[str, int, int], str]:
    _, serial, p, r, ref = line.split()
    return (serial, int(p), int(r)), ref


def _check_store(raw_path: Path, url: str, acknowledged: dict) -> None:
    with RawRecord(raw_path, "r") as raw, ResultsStore(url) as store:
        shots = store.shots(RUN_ID)
        keys = Counter((s.serial, s.point.index, s.repeat, s.attempt) for s in shots)
        assert all(count == 1 for count in keys.values()), "duplicate shot rows"
        by_key = {(s.serial, s.point.index, s.repeat): s for s in shots}
        raw_keys = set(raw.keys())
        for key, ref in acknowledged.items():
            assert key in by_key, f"acknowledged shot {key} missing from the database"
            assert by_key[key].raw_ref == ref
            assert ref.removeprefix("shots/") in raw_keys, f"shot {ref} missing from raw.h5"
        for shot in shots:  # every stored row points at an intact raw shot of its own
            raw_shot = raw.read_shot(shot.raw_ref, verify=True)
            assert raw_shot.attrs == {
                "serial": shot.serial, "point_index": shot.point.index, "repeat": shot.repeat
            }  # fmt: skip


@pytest.mark.slow
@pytest.mark.parametrize(
    "backend", ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
)
def test_kill_9_loses_only_the_shot_in_flight(tmp_path, request, backend):
    if backend == "sqlite":
        url = f"sqlite:///{tmp_path / 'results.db'}"
    else:
        url = request.getfixturevalue("postgres_url")
    script = tmp_path / "writer.py"
    script.write_text(CHILD)
    raw_path = tmp_path / "raw.h5"
    acknowledged: dict[tuple[str, int, int], str] = {}
    kills = 0
    # kill after this many acknowledged shots of each session, then wait this long (s) so the
    # signal lands somewhere inside the next shot's HDF5 write or database commit
    for kill_after, delay in ((2, 0.0), (3, 0.002), (4, 0.006)):
        child = _start_child(script, raw_path, url)
        assert child.stdout is not None
        seen = 0
        for line in child.stdout:
            if line.startswith("COMMITTED"):
                key, ref = _parse(line)
                assert key not in acknowledged, "a tested point was fired twice"
                acknowledged[key] = ref
                seen += 1
                if seen == kill_after:
                    time.sleep(delay)
                    os.kill(child.pid, signal.SIGKILL)
                    kills += 1
                    break
            elif line.startswith("DONE"):
                break
        remaining, err = child.communicate(timeout=60)
        for line in remaining.splitlines():  # printed before the signal arrived
            if line.startswith("COMMITTED"):
                key, ref = _parse(line)
                acknowledged[key] = ref
        assert child.returncode == -signal.SIGKILL, err
        _check_store(raw_path, url, acknowledged)

    # continue to the end: the plan completes with exactly one row per test
    child = _start_child(script, raw_path, url)
    out, err = child.communicate(timeout=120)
    assert child.returncode == 0, err
    assert out.strip().endswith("DONE")
    for line in out.splitlines():
        if line.startswith("COMMITTED"):
            key, ref = _parse(line)
            assert key not in acknowledged, "a tested point was fired twice"
            acknowledged[key] = ref
    _check_store(raw_path, url, acknowledged)
    with ResultsStore(url) as store, RawRecord(raw_path, "r") as raw:
        shots = store.shots(RUN_ID)
        assert len(shots) == SERIALS * POINTS * REPEATS
        # a kill that lands after a commit completed but before the child printed its line
        # leaves a stored shot nobody acknowledged (at most one per kill); never the reverse
        assert len(shots) - kills <= len(acknowledged) <= len(shots)
        # raw shots without a row can only come from a kill between the two writes
        assert len(shots) <= len(raw.keys()) <= len(shots) + kills
