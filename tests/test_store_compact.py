"""Compaction of a finished raw record: same shots, same digests, smaller, still a record
that resumes and that any HDF5 reader (h5py here, h5dump in test_export_run) reads."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.analysis.pipeline import ChannelData
from benchrun.errors import StoreError
from benchrun.store.compact import compact_record
from benchrun.store.digests import file_sha256
from benchrun.store.raw import RawRecord


def _smooth(seed: int, n: int = 4000) -> dict[str, ChannelData]:
    """Channels of a smooth, slightly noisy capture (compressible, as real captures are)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    wave = 90 * np.tanh((t - n * 0.6) / 40) + rng.normal(0, 0.7, n)
    return {"diode_voltage": ChannelData(np.round(wave).astype(np.int8), 0.5, 0.1, -128, 127),
            "diode_current": ChannelData(np.round(-wave).astype(np.int8), 0.25, 0.0, -128, 127)}


def _mixed(path):
    with RawRecord(path, "w", compression=None) as raw:
        for k in range(10):
            raw.append_shot(f"s{k:02d}", -1e-6, 1e-9, _smooth(k), make_probes(), {"n": k})
        raw.append_shot("s03", -1e-6, 1e-9, _smooth(33), make_probes(), {"n": 33},
                        replace=True)  # a superseded slot stays behind
        raw.append_shot("wide", 0.0, 1e-9, make_channels(1, 900), make_probes(), {"w": 1})
        uneven = {**make_channels(3, 300), "gate": ChannelData(
            np.zeros(10, np.int8), 1.0, 0.0, -128, 127)}
        raw.append_shot("group", 0.0, 1e-9, uneven, make_probes(), {"g": 1})  # format 2
    with RawRecord(path, "a", compression="gzip") as raw:
        raw.append_shot("zipped", 0.0, 1e-9, make_channels(4, 500), make_probes(), {"z": 1})


def _digests(path):
    with RawRecord(path, "r") as raw:
        return {k: raw.read_shot(k, verify=True).digest() for k in raw}


def test_compaction_keeps_every_shot_and_digest_and_shrinks_the_file(tmp_path):
    path = tmp_path / "raw.h5"
    _mixed(path)
    digests = _digests(path)
    result = compact_record(path)
    assert result.shots == len(digests) == 13
    assert result.bytes_after == path.stat().st_size < result.bytes_before / 2
    assert _digests(path) == digests
    with RawRecord(path, "r") as raw:
        assert raw.read_shot("s03").attrs == {"n": 33}  # the replacing shot, not the old one
        assert raw.damaged_keys() == []
    with h5py.File(path, "r") as f:
        codes = f["slots/b000000/codes"]
        assert codes.compression == "gzip" and codes.chunks[0] == 1
        # the views still map onto the (packed) slots: any HDF5 reader sees the codes
        np.testing.assert_array_equal(f["shots/s03/diode_current"][()],
                                      _smooth(33)["diode_current"].codes)
        assert sorted(k.decode() for k in f["shot_table"]["key"]) == sorted(digests)
    assert not list(tmp_path.glob(".*tmp"))  # no temporary file left


def test_a_compacted_record_resumes_into_new_blocks(tmp_path):
    path = tmp_path / "raw.h5"
    _mixed(path)
    compact_record(path)
    with RawRecord(path, "a", compression=None) as raw:
        raw.append_shot("s10", -1e-6, 1e-9, _smooth(10), make_probes(), {"n": 10})
    with h5py.File(path, "r") as f:
        blocks = list(f["slots"])
        assert f[f"slots/{blocks[-1]}/codes"].chunks is None  # a new, contiguous block
        np.testing.assert_array_equal(f["shots/s10/diode_voltage"][()],
                                      _smooth(10)["diode_voltage"].codes)
    assert _digests(path)["s10"]
    compact_record(path)  # and compacts again
    assert len(_digests(path)) == 14


def test_a_record_without_views_gets_them_in_compaction(tmp_path):
    path = tmp_path / "raw.h5"
    _mixed(path)
    with h5py.File(path, "r+") as f:
        del f["shots/s05"], f["shot_table"]
    compact_record(path)
    with h5py.File(path, "r") as f:
        assert "slot_view" in f["shots/s05"].attrs and len(f["shot_table"]) == 13


def test_a_damaged_shot_stops_compaction_and_changes_nothing(tmp_path):
    path = tmp_path / "raw.h5"
    _mixed(path)
    with h5py.File(path, "r") as f:
        codes = f["slots/b000000/codes"]
        _, n_channels, length = codes.shape
        offset = codes.id.get_offset() + n_channels * length  # slot 1 (int8 codes)
    data = bytearray(path.read_bytes())
    data[offset + 17] ^= 0x04  # a code of slot 1's first channel
    path.write_bytes(bytes(data))
    before = file_sha256(path)
    with pytest.raises(StoreError, match="s01 do not match their SHA-256 in the original"):
        compact_record(path)
    assert file_sha256(path) == before
