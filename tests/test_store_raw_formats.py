"""Raw records of both shot layouts stay readable, and the content digest keeps its definition.

Format 1 (records written before format 2) kept each channel's ``gain``, ``offset``,
``code_min`` and ``code_max`` as attributes of the channel's dataset; format 2 keeps them for
every channel in the shot group's ``channels_json``. An auditor may open runs of either
format, and a run continued with ``--resume`` holds both. The format-1 files here are written
with h5py's high-level API directly (the layout as the module docstring of
``benchrun.store.raw`` describes it), not through ``RawRecord``.

The digest is recomputed from its documented definition with ``hashlib`` and ``json`` only
(SHA-256, FIPS 180-4), and pinned to the value format-1 writers produced for a fixed shot.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json

import h5py
import numpy as np
import pytest

from benchrun.analysis import ChannelData as Channel
from benchrun.analysis import ProbeCalibration as Probe
from benchrun.errors import StoreError
from benchrun.store.raw import RawRecord, file_sha256, shot_digest

T_START, DT = -2.0e-6 / 3.0, 2.5e-10
CHANNELS = {
    "vd": Channel(np.array([-128, -1, 0, 1, 127, 5], dtype=np.int8), 0.1 + 0.2, -1.0 / 3.0,
                  -128, 127),
    "id": Channel(np.array([-32768, 0, 258, 32767], dtype=">i2"), 2.0**-15, 5e-324,
                  -32768, 32767),
}
PROBES = {"vd": Probe(100.0, -1.25e-9), "id": Probe(1.0 / 0.01, 3.3e-9)}
ATTRS = {"serial": "S042", "settings": {"bus_voltage_V": 600.0, "flags": [1, 2]},
         "note": "µs é"}
#: shot_digest(T_START, DT, CHANNELS, PROBES, ATTRS) as computed by the format-1 writer
#: (benchrun before format 2): the digest must stay the same function of a shot's content
FORMAT_1_DIGEST = "dc4d0d54f80d9b27d74cfea716d3d4410fe44e89b43dada8160939eec14afe23"


def documented_digest(t_start, dt_s, channels, probes, attrs) -> str:
    """The content digest as ``shot_digest``'s docstring defines it: SHA-256 over canonical
    JSON (sorted keys, no spaces) of timing, scaling, probes and attributes, then per channel
    in name order the name, a NUL byte and the little-endian code bytes."""
    header = {
        "t_start": t_start, "dt": dt_s,
        "channels": {n: {"gain": c.gain, "offset": c.offset, "code_min": c.code_min,
                         "code_max": c.code_max,
                         "dtype": c.codes.dtype.newbyteorder("<").str,
                         "length": c.codes.size} for n, c in channels.items()},
        "probes": {n: {"scale": p.scale, "deskew_s": p.deskew_s} for n, p in probes.items()},
        "attrs": attrs,
    }
    h = hashlib.sha256(json.dumps(header, sort_keys=True, separators=(",", ":")).encode())
    for name in sorted(channels):
        codes = channels[name].codes
        h.update(name.encode() + b"\0" + codes.astype(codes.dtype.newbyteorder("<")).tobytes())
    return h.hexdigest()


def write_format_1_record(path, shots, *, compression=None) -> None:
    """A raw record in format 1, with h5py's high-level API: per-dataset scaling attributes.

    ``shots``: key → (t_start, dt, channels, probes, attrs).
    """
    with h5py.File(path, "w", libver="earliest") as f:
        f.attrs["format"] = "benchrun-raw-record"
        f.attrs["format_version"] = 1
        f.attrs["software_version"] = "0.1.0"
        f.attrs["created"] = dt.datetime(2031, 4, 2, 10, 0, tzinfo=dt.UTC).isoformat()
        group_of_shots = f.create_group("shots")
        for key, (t_start, dt_s, channels, probes, attrs) in shots.items():
            group = group_of_shots.create_group(key)
            for name, ch in channels.items():
                options = ({"compression": "gzip", "compression_opts": 1, "shuffle": True}
                           if compression else {})
                ds = group.create_dataset(name, data=ch.codes, **options)
                ds.attrs["gain"] = float(ch.gain)
                ds.attrs["offset"] = float(ch.offset)
                ds.attrs["code_min"] = int(ch.code_min)
                ds.attrs["code_max"] = int(ch.code_max)
            group.attrs["t_start_s"] = float(t_start)
            group.attrs["dt_s"] = float(dt_s)
            group.attrs["probes_json"] = json.dumps(
                {n: {"scale": p.scale, "deskew_s": p.deskew_s} for n, p in probes.items()},
                sort_keys=True, separators=(",", ":"))
            group.attrs["attrs_json"] = json.dumps(attrs, sort_keys=True, separators=(",", ":"))
            group.attrs["content_sha256"] = documented_digest(t_start, dt_s, channels, probes,
                                                              attrs)
            group.attrs["complete"] = True


def _assert_same_shot(shot, t_start, dt_s, channels, probes, attrs) -> None:
    assert (shot.t_start, shot.dt, shot.attrs) == (t_start, dt_s, attrs)
    assert set(shot.channels) == set(channels)
    for name, ch in channels.items():
        got = shot.channels[name]
        assert got.codes.dtype == ch.codes.dtype
        np.testing.assert_array_equal(got.codes, ch.codes)
        assert (got.gain, got.offset, got.code_min, got.code_max) == (
            ch.gain, ch.offset, ch.code_min, ch.code_max)
    assert {n: (p.scale, p.deskew_s) for n, p in shot.probes.items()} == {
        n: (p.scale, p.deskew_s) for n, p in probes.items()}


def test_digest_is_unchanged_and_matches_its_definition():
    assert shot_digest(T_START, DT, CHANNELS, PROBES, ATTRS) == FORMAT_1_DIGEST
    assert documented_digest(T_START, DT, CHANNELS, PROBES, ATTRS) == FORMAT_1_DIGEST


@pytest.mark.parametrize("compression", ["gzip", None])
def test_format_1_record_reads_back_and_verifies(tmp_path, compression):
    path = tmp_path / "raw.h5"
    second = {"vd": CHANNELS["vd"]}
    write_format_1_record(path, {"000000": (T_START, DT, CHANNELS, PROBES, ATTRS),
                                 "000001": (0.0, 1e-9, second, PROBES, {"n": 1})},
                          compression=compression)
    with h5py.File(path, "r") as f:  # the file is the format-1 layout
        assert f["shots/000000"].attrs["content_sha256"] == FORMAT_1_DIGEST
        assert "channels_json" not in f["shots/000000"].attrs
        assert f["shots/000000/vd"].attrs["gain"] == 0.1 + 0.2
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000", "000001"]
        assert raw.run_attrs["format_version"] == 1
        assert raw.damaged_keys() == []
        shot = raw.read_shot("shots/000000")
        assert shot.digest() == FORMAT_1_DIGEST
        _assert_same_shot(shot, T_START, DT, CHANNELS, PROBES, ATTRS)
        _assert_same_shot(raw.read_shot("000001"), 0.0, 1e-9, second, PROBES, {"n": 1})


def test_changed_format_1_scaling_is_detected(tmp_path):
    path = tmp_path / "raw.h5"
    write_format_1_record(path, {"000000": (T_START, DT, CHANNELS, PROBES, ATTRS)})
    with h5py.File(path, "r+") as f:
        f["shots/000000/id"].attrs["offset"] = 0.0
    with RawRecord(path, "r") as raw:
        with pytest.raises(StoreError, match="SHA-256"):
            raw.read_shot("000000")
        assert raw.damaged_keys() == ["000000"]
    with h5py.File(path, "r+") as f:
        del f["shots/000000/id"].attrs["offset"]
    with RawRecord(path, "r") as raw, pytest.raises(StoreError, match="cannot be read"):
        raw.read_shot("000000", verify=False)


@pytest.mark.parametrize("compression", ["gzip", None])
def test_continuing_a_format_1_record_writes_current_shots(tmp_path, compression):
    path = tmp_path / "raw.h5"
    write_format_1_record(path, {"000000": (T_START, DT, CHANNELS, PROBES, ATTRS)})
    untouched = file_sha256(path)
    with RawRecord(path, "a") as raw:  # opened for writing, nothing appended
        assert raw.keys() == ["000000"]
    assert file_sha256(path) == untouched  # the format mark waits for a shot
    # one length for both channels (int8 and big-endian int16): a slot when uncompressed
    channels = {"vd": Channel(CHANNELS["vd"].codes[:4], 0.1 + 0.2, -1.0 / 3.0, -128, 127),
                "id": CHANNELS["id"]}
    with RawRecord(path, "a", compression=compression, durability="process") as raw:
        assert raw.next_key() == "000001"
        raw.append_shot("000001", 0.0, 1e-9, channels, PROBES, {"n": 1})
    with h5py.File(path, "r") as f:
        assert f.attrs["format_version"] == 3  # the file may now hold format-2/3 shots
        assert f.attrs["format_version"].dtype == np.int64  # same type, changed in place
        old = f["shots/000000"]
        assert "channels_json" not in old.attrs and "gain" in old["vd"].attrs
        if compression is None:  # format 3: a slot
            assert [k for k, g in f["shots"].items() if "slot_view" not in g.attrs] == ["000000"]
            assert "b000000" in f["slots"]
        else:  # a format-2 shot group
            new = f["shots/000001"]
            assert "channels_json" in new.attrs and len(new["vd"].attrs) == 0
            assert new.attrs["content_sha256"] == documented_digest(0.0, 1e-9, channels,
                                                                    PROBES, {"n": 1})
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000", "000001"]
        assert raw.damaged_keys() == []
        _assert_same_shot(raw.read_shot("000000"), T_START, DT, CHANNELS, PROBES, ATTRS)
        _assert_same_shot(raw.read_shot("000001"), 0.0, 1e-9, channels, PROBES, {"n": 1})
