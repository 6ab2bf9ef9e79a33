"""Durability modes of the store and the cheaper per-shot write path.

* ``durability="power-loss"`` (default) syncs every stored shot to disk; ``"process"`` only
  hands it to the operating system, which is what survives ``kill -9`` (POSIX: data written
  with ``write()`` belongs to the kernel once the call returned; SQLite documentation,
  "PRAGMA synchronous": "transactions are durable across application crashes regardless of
  the synchronous setting or journal mode").
* The shot attributes written through h5py's low-level API must be exactly what h5py's
  high-level ``attrs[name] = value`` writes (h5py is the outside reference here).
* A writer killed with SIGKILL in the cheapest mode (``"process"``, background sync not
  awaited) still loses nothing it acknowledged.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import h5py
import numpy as np
import pytest
from sqlalchemy import text

from benchrun.analysis import ChannelData as Channel
from benchrun.analysis import ProbeCalibration as Probe
from benchrun.errors import StoreError
from benchrun.records import ShotResult, TestPoint
from benchrun.store import RawRecord, ResultsStore
from benchrun.store.raw import _write_new_attrs, shot_ref

REPO = Path(__file__).resolve().parents[1]


def _shot(seed: int = 0) -> tuple[dict[str, Channel], dict[str, Probe]]:
    rng = np.random.default_rng(seed)
    channels = {name: Channel(rng.integers(-128, 128, 2000).astype(np.int8), 0.01, -0.2,
                              -128, 127) for name in ("diode_voltage", "diode_current")}
    return channels, {name: Probe(100.0, 1e-9) for name in channels}


#: The call the raw record syncs a shot with (fdatasync where the platform has it).
SYNC = "fdatasync" if hasattr(os, "fdatasync") else "fsync"


@pytest.fixture
def fsync_calls(monkeypatch):
    """Every per-shot sync call: (file descriptor, name of the calling thread)."""
    calls: list[tuple[int, str]] = []
    real = getattr(os, SYNC)

    def counting(fd):
        calls.append((fd, threading.current_thread().name))
        return real(fd)

    monkeypatch.setattr(os, SYNC, counting)
    return calls


def test_power_loss_mode_syncs_every_shot(tmp_path, fsync_calls):
    channels, probes = _shot()
    with RawRecord(tmp_path / "raw.h5", "w") as raw:
        assert raw.durability == "power-loss"  # the default
        fsync_calls.clear()
        for n in range(3):
            raw.append_shot(f"s{n}", 0.0, 1e-9, channels, probes, {"n": n})
        assert len(fsync_calls) == 3
        assert all(name == threading.current_thread().name for _, name in fsync_calls)


def test_background_sync_is_awaited_and_its_failure_reported(tmp_path, fsync_calls,
                                                             monkeypatch):
    channels, probes = _shot()
    with RawRecord(tmp_path / "raw.h5", "w") as raw:
        fsync_calls.clear()
        ref = raw.append_shot("s0", 0.0, 1e-9, channels, probes, {"n": 0}, wait=False)
        assert ref == shot_ref("s0") == "shots/s0"
        raw.wait_durable()
        assert len(fsync_calls) == 1
        assert fsync_calls[0][1] != threading.current_thread().name  # synced in the background
        assert raw.read_shot("s0").attrs == {"n": 0}  # readable at once, complete

        def failing(fd):
            raise OSError(5, "Input/output error")

        monkeypatch.setattr(os, SYNC, failing)
        raw.append_shot("s1", 0.0, 1e-9, channels, probes, {"n": 1}, wait=False)
        with pytest.raises(StoreError, match="cannot sync"):
            raw.wait_durable()
        # the next write is not blocked by a failure already reported
        monkeypatch.undo()
        raw.append_shot("s2", 0.0, 1e-9, channels, probes, {"n": 2})
        assert raw.keys() == ["s0", "s1", "s2"]


def test_next_write_waits_for_a_pending_sync(tmp_path, monkeypatch):
    channels, probes = _shot()
    order: list[str] = []
    release = threading.Event()
    real = getattr(os, SYNC)

    def slow(fd):
        release.wait(5.0)
        order.append("synced")
        return real(fd)

    with RawRecord(tmp_path / "raw.h5", "w") as raw:
        monkeypatch.setattr(os, SYNC, slow)
        raw.append_shot("s0", 0.0, 1e-9, channels, probes, {}, wait=False)
        threading.Timer(0.05, release.set).start()
        raw.append_shot("s1", 0.0, 1e-9, channels, probes, {}, wait=False)  # waits for s0's
        order.append("second written")
        raw.wait_durable()
    assert order.index("synced") < order.index("second written")


def test_process_mode_hands_data_to_the_os_without_syncing(tmp_path, fsync_calls):
    channels, probes = _shot()
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", durability="process") as raw:
        fsync_calls.clear()
        for n in range(3):
            raw.append_shot(f"s{n}", 0.0, 1e-9, channels, probes, {"n": n})
        assert fsync_calls == []
        # handed to the OS: another process sees every shot while the writer has it open
        probe = ("import h5py, sys\n"
                 "with h5py.File(sys.argv[1], 'r', locking=False) as f:\n"
                 "    print(sorted(k for k, g in f['shots'].items() if g.attrs['complete']))")
        seen = subprocess.run([sys.executable, "-c", probe, str(path)], capture_output=True,
                              text=True, timeout=60)
        assert seen.stdout.strip() == "['s0', 's1', 's2']", seen.stderr
    with RawRecord(path, "r") as raw:
        assert raw.read_shot("s2").attrs == {"n": 2}


def test_unknown_durability_is_refused(tmp_path):
    with pytest.raises(StoreError, match="durability"):
        RawRecord(tmp_path / "raw.h5", "w", durability="sometimes")
    with pytest.raises(StoreError, match="durability"):
        ResultsStore(f"sqlite:///{tmp_path / 'r.db'}", durability="fast")


def test_low_level_attributes_equal_h5py_high_level(tmp_path):
    values = {"f": -1.25e-9, "i": -128, "big": 2**40, "b": True, "no": False,
              "s": "DX-4417 é µs", "js": '{"a":[1,2]}'}
    with h5py.File(tmp_path / "a.h5", "w", libver="earliest") as f:
        reference = f.create_group("reference")
        for name, value in values.items():
            reference.attrs[name] = value
        ours = f.create_group("ours")
        _write_new_attrs(ours, values)
    with h5py.File(tmp_path / "a.h5", "r") as f:
        for name in values:
            ref_value, our_value = f["reference"].attrs[name], f["ours"].attrs[name]
            assert type(our_value) is type(ref_value)
            assert our_value == ref_value
            ref_type = h5py.h5a.open(f["reference"].id, name.encode()).get_type()
            our_type = h5py.h5a.open(f["ours"].id, name.encode()).get_type()
            assert our_type == ref_type, name


@pytest.mark.parametrize(("durability", "expected"), [("power-loss", 2), ("process", 1)])
def test_sqlite_sync_level(tmp_path, durability, expected):
    # PRAGMA synchronous reads back 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA (SQLite documentation)
    store = ResultsStore(f"sqlite:///{tmp_path / 'r.db'}", durability=durability)
    with store, store._engine.connect() as conn:
        assert conn.execute(text("PRAGMA synchronous")).scalar() == expected
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"


def test_next_attempts_matches_next_attempt(tmp_path):
    with ResultsStore(f"sqlite:///{tmp_path / 'r.db'}") as store:
        store.create_run("R1", "DX-4417", "LT-0117")
        stored = [("S1", 0, 0, 0), ("S1", 0, 0, 1), ("S1", 1, 0, 0), ("S2", 0, 1, 0),
                  ("S2", 0, 1, 2)]
        for serial, index, repeat, attempt in stored:
            point = TestPoint(index=index, temperature_K=298.15, bus_voltage_V=600.0,
                              forward_current_A=30.0)
            store.add_shot(ShotResult(run_id="R1", part="DX-4417", lot="LT-0117",
                                      serial=serial, point=point, repeat=repeat,
                                      attempt=attempt, timestamp="2031-04-02T10:00:00+00:00",
                                      conditions={}, metrics={},
                                      raw_ref=f"shots/{serial}-{index}-{repeat}-{attempt}"))
        table = store.next_attempts("R1")
        assert table == {("S1", 0, 0): 2, ("S1", 1, 0): 1, ("S2", 0, 1): 3}
        for (serial, index, repeat), expected in table.items():
            assert store.next_attempt("R1", serial, index, repeat) == expected
        assert store.next_attempts("other run") == {}


WRITER = r"""
import sys
from dataclasses import dataclass

import numpy as np

from benchrun.records import ShotResult, TestPoint
from benchrun.store import RawRecord, ResultsStore
from benchrun.store.raw import shot_ref


@dataclass(frozen=True)
class Channel:
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclass(frozen=True)
class Probe:
    scale: float
    deskew_s: float = 0.0


raw_path, url, durability, compression = sys.argv[1:5]
rng = np.random.default_rng(0)
probes = {"diode_voltage": Probe(100.0), "diode_current": Probe(100.0)}
with ResultsStore(url, durability=durability) as store, \
        RawRecord(raw_path, durability=durability,
                  compression=None if compression == "none" else compression) as raw:
    if store.get_run("R") is None:
        store.create_run("R", "DX-4417", "LT-0117")
    done = store.tested_keys("R")
    in_raw = set(raw.keys())
    for n in range(40):
        if (f"S{n:02d}", 0, 0) in done:
            continue
        if f"k{n:02d}" in in_raw:
            # killed between the raw shot and its row: the row is added from the raw record
            # (what the runner's resume does with such a shot), the shot is not written again
            ref = shot_ref(f"k{n:02d}")
        else:
            channels = {name: Channel(rng.integers(-128, 128, 20000).astype(np.int8), 0.01,
                                      0.0, -128, 127) for name in probes}
            ref = raw.append_shot(f"k{n:02d}", 0.0, 1e-9, channels, probes, {"n": n},
                                  wait=False)
            raw.wait_durable()  # as the runner does before the results row
        point = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0,
                          forward_current_A=30.0)
        store.add_shot(ShotResult(run_id="R", part="DX-4417", lot="LT-0117",
                                  serial=f"S{n:02d}", point=point, repeat=0, attempt=0,
                                  timestamp="2031-04-02T10:00:00+00:00", conditions={},
                                  metrics={}, raw_ref=ref))
        print("COMMITTED", n, ref, flush=True)
print("DONE", flush=True)
"""


@pytest.mark.parametrize("compression", ["gzip", "none"])  # shot groups, slots
@pytest.mark.parametrize("durability", ["process", "power-loss"])
def test_kill_9_in_every_durability_mode_loses_nothing_acknowledged(tmp_path, durability,
                                                                     compression):
    script = tmp_path / "writer.py"
    script.write_text(WRITER)
    raw_path, url = tmp_path / "raw.h5", f"sqlite:///{tmp_path / 'results.db'}"
    env = {**os.environ, "PYTHONPATH": str(REPO)}  # the tree under test, not an install
    acknowledged: dict[int, str] = {}
    for kill_after in (3, 5, 8):
        child = subprocess.Popen([sys.executable, str(script), str(raw_path), url, durability,
                                  compression],
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                 env=env)
        assert child.stdout is not None
        seen = 0
        for line in child.stdout:
            if line.startswith("COMMITTED"):
                _, n, ref = line.split()
                acknowledged[int(n)] = ref
                seen += 1
                if seen == kill_after:
                    os.kill(child.pid, signal.SIGKILL)  # lands inside the next shot's write
                    break
        out, err = child.communicate(timeout=60)
        for line in out.splitlines():
            if line.startswith("COMMITTED"):
                _, n, ref = line.split()
                acknowledged[int(n)] = ref
        assert child.returncode == -signal.SIGKILL, err
        with RawRecord(raw_path, "r") as raw, ResultsStore(url) as store:
            rows = {s.serial: s.raw_ref for s in store.shots("R")}
            for n, ref in acknowledged.items():
                assert rows[f"S{n:02d}"] == ref
                assert raw.read_shot(ref, verify=True).attrs == {"n": n}
            for ref in rows.values():  # every row points at an intact raw shot
                raw.read_shot(ref, verify=True)
