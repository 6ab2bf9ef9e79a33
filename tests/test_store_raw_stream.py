"""Raw record written channel by channel (RawRecord.begin_shot): the same shot as
append_shot writes, invisible until finished, refused twice."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.errors import StoreError
from benchrun.store.raw import RawRecord

ATTRS = {"serial": "S-1", "repeat": 0}


def test_streamed_shot_equals_the_shot_written_at_once(tmp_path):
    channels, probes = make_channels(3), make_probes()
    with RawRecord(tmp_path / "a.h5", "w", compression=None) as raw:
        ref_a = raw.append_shot("s0", -1e-6, 1e-9, channels, probes, ATTRS)
        builder = raw.begin_shot("s1")
        for name, ch in channels.items():
            builder.add_channel(name, ch)
        ref_b = builder.finish(-1e-6, 1e-9, probes, ATTRS)
        a, b = raw.read_shot(ref_a), raw.read_shot(ref_b)  # both verify their digest
        assert a.digest() == b.digest()
        for name in channels:
            assert np.array_equal(a.channels[name].codes, b.channels[name].codes)
            assert a.channels[name].codes.dtype == b.channels[name].codes.dtype
            assert a.channels[name].gain == b.channels[name].gain
        assert a.attrs == b.attrs and raw.keys() == ["s0", "s1"]


def test_unfinished_shot_is_invisible_and_the_key_stays_free(tmp_path):
    channels, probes = make_channels(4), make_probes()
    path = tmp_path / "r.h5"
    with RawRecord(path, "w", compression=None) as raw:
        builder = raw.begin_shot("s0")
        builder.add_channel("diode_voltage", channels["diode_voltage"])
        raw.flush()
        assert raw.keys() == [] and "s0" not in raw
    with h5py.File(path, "r") as f:  # a plain HDF5 reader sees no shot either
        assert list(f["shots"]) == []
    with RawRecord(path, "a", compression=None) as raw:
        raw.append_shot("s0", 0.0, 1e-9, channels, probes, ATTRS)  # key was never taken
        assert raw.keys() == ["s0"]


def test_builder_refuses_misuse(tmp_path):
    channels, probes = make_channels(5), make_probes()
    with RawRecord(tmp_path / "r.h5", "w", compression=None) as raw:
        raw.append_shot("s0", 0.0, 1e-9, channels, probes, ATTRS)
        with pytest.raises(StoreError, match="already in raw record"):
            raw.begin_shot("s0")
        builder = raw.begin_shot("s1")
        with pytest.raises(StoreError, match="no channels"):
            builder.finish(0.0, 1e-9, probes, ATTRS)
        builder.add_channel("gate", channels["gate"])
        with pytest.raises(StoreError, match="repeated channel"):
            builder.add_channel("gate", channels["gate"])
        with pytest.raises(StoreError, match="dt positive"):
            builder.finish(0.0, 0.0, probes, ATTRS)
        builder.finish(0.0, 1e-9, probes, ATTRS)
        with pytest.raises(StoreError, match="already finished"):
            builder.add_channel("diode_voltage", channels["diode_voltage"])
        # replace: the new content takes the key only when it is finished
        again = raw.begin_shot("s0", replace=True)
        again.add_channel("gate", channels["gate"])
        assert len(raw.read_shot("s0").channels) == len(channels)
        again.finish(0.0, 2e-9, probes, ATTRS)
        assert raw.read_shot("s0").dt == 2e-9 and list(raw.read_shot("s0").channels) == ["gate"]
