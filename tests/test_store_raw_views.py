"""The raw record as a general HDF5 tool sees it: /shots/<key> views of slot shots and the
/shot_table, checked with the HDF5 project's own command-line tools (h5ls, h5dump from
Debian's hdf5-tools package: an independent reader of the file format)."""

from __future__ import annotations

import re
import shutil
import subprocess

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.analysis.pipeline import ChannelData
from benchrun.store.raw import RawRecord, shot_ref

needs_tools = pytest.mark.skipif(shutil.which("h5dump") is None or shutil.which("h5ls") is None,
                                 reason="HDF5 command-line tools (Debian hdf5-tools) missing")

ATTRS = {"serial": "SN0117-004", "point": {"index": 1, "label": "nominal",
                                            "temperature_K": 398.15, "didt_A_per_s": None},
         "repeat": 2, "attempt": 0, "timestamp": "2031-04-02T10:11:12+00:00",
         "temperature_K": 398.4, "bus_voltage_V": None, "settings": {"t1_s": 8e-6}}


def h5ls_paths(path) -> dict[str, str]:
    """Object path → kind line of ``h5ls -r``."""
    out = subprocess.run(["h5ls", "-r", str(path)], capture_output=True, text=True,
                         check=True).stdout
    return {line.split()[0]: line.split(None, 1)[1] for line in out.splitlines() if line}


def h5dump_values(path, dataset) -> np.ndarray:
    """The values of a 1-D integer dataset as ``h5dump`` prints them."""
    out = subprocess.run(["h5dump", "-d", dataset, "-y", "-w", "0", "-m", "%d", str(path)],
                         capture_output=True, text=True, check=True).stdout
    data = out.split("DATA {", 1)[1].split("}", 1)[0]
    return np.array([int(v) for v in re.findall(r"-?\d+", data)])


def _write(path, n=3, compression=None):
    with RawRecord(path, "w", compression=compression) as raw:
        for k in range(n):
            raw.append_shot(f"p001-SN0117-004-r{k:02d}-a0", -1e-6, 2.5e-10,
                            make_channels(k, 700), make_probes(), {**ATTRS, "repeat": k})


@needs_tools
def test_h5ls_lists_every_slot_shot_by_key_and_h5dump_shows_its_codes(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path)
    listed = h5ls_paths(path)
    with RawRecord(path, "r") as raw:
        keys = raw.keys()
        assert len(keys) == 3
        for key in keys:
            assert listed[f"/shots/{key}"] == "Group"
            shot = raw.read_shot(key)
            for name, channel in shot.channels.items():
                assert listed[f"/shots/{key}/{name}"] == f"Dataset {{{channel.codes.size}}}"
                dumped = h5dump_values(path, f"/shots/{key}/{name}")
                np.testing.assert_array_equal(dumped, channel.codes)
    assert listed["/shot_table"] == "Dataset {3}"


def test_view_attributes_describe_the_shot_and_its_scaling(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 2)
    key = "p001-SN0117-004-r01-a0"
    with RawRecord(path, "r") as raw:
        shot = raw.read_shot(key)
    with h5py.File(path, "r") as f:
        group = f[shot_ref(key)]  # the reference a ShotResult holds names this group
        assert group.attrs["serial"] == "SN0117-004" and group.attrs["repeat"] == 1
        assert group.attrs["point_index"] == 1 and group.attrs["point_label"] == "nominal"
        assert group.attrs["temperature_K"] == 398.4
        assert "bus_voltage_V" not in group.attrs  # None: left out
        assert group.attrs["content_sha256"] == shot.digest()
        assert group.attrs["t_start_s"] == -1e-6 and group.attrs["dt_s"] == 2.5e-10
        for name, channel in shot.channels.items():
            ds = group[name]
            assert ds.is_virtual
            probe = shot.probes[name]
            expected = channel.volts() * probe.scale  # pipeline: volts x probe scale
            got = ds[()] * ds.attrs["scale"] + ds.attrs["offset"]
            np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12 * abs(
                expected).max())
            assert ds.attrs["units"] == ("A" if name == "diode_current" else "V")
            assert ds.attrs["deskew_s"] == probe.deskew_s
        table = f["shot_table"][()]
    assert [r.decode() for r in table["key"]] == sorted([key, "p001-SN0117-004-r00-a0"])
    row = table[1]
    assert row["serial"] == b"SN0117-004" and row["point"] == 1 and row["repeat"] == 1
    assert row["content_sha256"].decode() == shot.digest()
    assert np.isnan(row["bus_voltage_V"]) and row["temperature_K"] == 398.4
    assert row["group"].decode() == f"/{shot_ref(key)}"


def test_views_follow_replaced_shots_and_stale_views_are_rebuilt_on_reopening(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 2)
    key = "p001-SN0117-004-r00-a0"
    with RawRecord(path, "a", compression=None) as raw:
        raw.append_shot(key, 0.0, 1e-9, make_channels(7, 700), make_probes(), {"v": 2},
                        replace=True)
        assert raw.keys() == sorted([key, "p001-SN0117-004-r01-a0"])
    with h5py.File(path, "r") as f:
        np.testing.assert_array_equal(f[f"shots/{key}/gate"][()],
                                      make_channels(7, 700)["gate"].codes)
        assert f[f"shots/{key}"].attrs["v"] == 2
    # a run killed before its record was closed: views missing; opening for writing adds them
    with h5py.File(path, "r+") as f:
        del f[f"shots/{key}"], f["shot_table"]
    with RawRecord(path, "a", compression=None):
        pass
    with h5py.File(path, "r") as f:
        assert f[f"shots/{key}"].attrs["v"] == 2 and len(f["shot_table"]) == 2
    with RawRecord(path, "r") as raw:
        assert raw.damaged_keys() == []


def test_a_described_record_is_not_rewritten_and_old_records_stay_untouched(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 2)
    before = path.read_bytes()
    with RawRecord(path, "a", compression=None) as raw:
        assert raw.describe() is False
    assert path.read_bytes() == before


def test_shot_groups_and_slots_share_the_table(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", compression=None) as raw:
        raw.append_shot("a", 0.0, 1e-9, make_channels(1, 300), make_probes(), {"serial": "S1"})
        uneven = {**make_channels(3, 300), "gate": ChannelData(
            np.zeros(10, np.int8), 1.0, 0.0, -128, 127)}  # unequal lengths: a shot group
        raw.append_shot("b", 0.0, 1e-9, uneven, make_probes(), {"serial": "S2"})
        digest_b = raw.read_shot("b").digest()
    with h5py.File(path, "r") as f:
        table = f["shot_table"][()]
        assert "slot_view" in f["shots/a"].attrs and "slot_view" not in f["shots/b"].attrs
    assert [k.decode() for k in table["key"]] == ["a", "b"]
    assert table[1]["serial"] == b"S2" and table[1]["content_sha256"].decode() == digest_b
    assert table[1]["points"] == 300


DESCRIBE_CHILD = r"""
import sys
from dataclasses import dataclass

import numpy as np

from benchrun.store import RawRecord


@dataclass(frozen=True)
class Channel:  # duck-typed like ChannelData (no scipy import)
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclass(frozen=True)
class Probe:
    scale: float
    deskew_s: float = 0.0


rng = np.random.default_rng(0)
probes = {"diode_voltage": Probe(100.0), "diode_current": Probe(100.0, 1e-9)}
raw = RawRecord(sys.argv[1], "w", compression=None, durability="process")
for k in range(int(sys.argv[2])):
    channels = {name: Channel(rng.integers(-128, 128, 2000).astype(np.int8), 0.01, 0.0,
                              -128, 127) for name in probes}
    raw.append_shot(f"k{k:04d}", 0.0, 1e-9, channels, probes, {"serial": f"S{k % 7}"})
print("WRITTEN", flush=True)
raw.close()  # describes the record: killed somewhere in here
print("CLOSED", flush=True)
"""


@pytest.mark.slow
@pytest.mark.parametrize("delay", [0.0, 0.02, 0.1, 0.3])
def test_a_kill_while_describing_loses_nothing_and_reopening_completes_it(tmp_path, delay):
    import os
    import signal
    import sys
    import time

    script = tmp_path / "child.py"
    script.write_text(DESCRIBE_CHILD)
    path = tmp_path / "raw.h5"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    with subprocess.Popen([sys.executable, str(script), str(path), "300"], env=env,
                          stdout=subprocess.PIPE, text=True) as child:
        assert child.stdout.readline().strip() == "WRITTEN"
        time.sleep(delay)
        child.send_signal(signal.SIGKILL)
        out = child.stdout.read()
        child.wait()
    del out  # where the kill landed depends on the machine's speed: every moment must be safe
    with RawRecord(path, "a", compression=None) as raw:  # opens; describes what is missing
        keys = raw.keys()
        assert keys == [f"k{k:04d}" for k in range(300)]
        assert raw.damaged_keys() == []
    with h5py.File(path, "r") as f:
        assert all(f"shots/{k}/diode_current" in f for k in keys)
        assert len(f["shot_table"]) == 300
