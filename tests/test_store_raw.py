"""Raw HDF5 record: exact round trip, crash leftovers, damage and tamper detection."""

from __future__ import annotations

import hashlib
import json
import struct

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.errors import StoreError
from benchrun.store.raw import RawRecord, file_sha256


def _bits(x: float) -> bytes:
    return struct.pack("<d", x)


def test_file_sha256_matches_fips_180_example(tmp_path):
    # FIPS 180-2, Appendix B.1: SHA-256("abc")
    p = tmp_path / "abc.bin"
    p.write_bytes(b"abc")
    assert file_sha256(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    # and a multi-chunk file agrees with hashlib over the whole content
    data = bytes(range(256)) * 5000
    p.write_bytes(data)
    assert file_sha256(p, chunk_size=1000) == hashlib.sha256(data).hexdigest()


def test_file_sha256_missing_file(tmp_path):
    with pytest.raises(StoreError, match="cannot read"):
        file_sha256(tmp_path / "missing.h5")


@pytest.mark.parametrize("compression", ["gzip", None])
def test_round_trip_is_exact(tmp_path, compression):
    channels, probes = make_channels(1), make_probes()
    attrs = {
        "serial": "S007",
        "point": {"index": 3, "temperature_K": 398.15},
        "timestamp": "2031-04-02T10:11:12+00:00",
        "settings": {"t1_s": 1.0e-5 / 3.0, "bus_voltage_V": 600.0, "flags": [1, 2]},
        "instruments": {"scope": "KORVANE,SCOPE-X,0001,1.0"},
    }
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", compression=compression) as raw:
        raw.set_run_attrs(run_id="R-1", identities={"scope": ["a", "b"]})
        ref = raw.append_shot("000000", -2.0e-6 / 3.0, 2.5e-10, channels, probes, attrs)
    assert ref == "shots/000000"

    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000"]
        assert "shots/000000" in raw
        run = raw.run_attrs
        shot = raw.read_shot(ref)
    assert run["run_id"] == "R-1"
    assert run["identities"] == {"scope": ["a", "b"]}
    assert run["format_version"] == 3  # slots (uncompressed) or groups with channels_json
    assert "software_version" in run
    assert _bits(shot.t_start) == _bits(-2.0e-6 / 3.0)
    assert _bits(shot.dt) == _bits(2.5e-10)
    assert shot.attrs == attrs
    assert set(shot.channels) == set(channels)
    for name, ch in channels.items():
        got = shot.channels[name]
        assert got.codes.dtype == ch.codes.dtype
        np.testing.assert_array_equal(got.codes, ch.codes)
        assert _bits(got.gain) == _bits(ch.gain)
        assert _bits(got.offset) == _bits(ch.offset)
        assert (got.code_min, got.code_max) == (ch.code_min, ch.code_max)
    for name, p in probes.items():
        assert _bits(shot.probes[name].scale) == _bits(p.scale)
        assert _bits(shot.probes[name].deskew_s) == _bits(p.deskew_s)
    assert shot.raw_ref == ref


def test_records_are_plain_hdf5(tmp_path):
    """Any HDF5 reader sees the codes under /shots/<key>/<channel> and their scaling in the
    shot group's channels_json (plain JSON), as the module docstring describes."""
    channels = make_channels(2)
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, channels, make_probes(), {})
    with h5py.File(path, "r") as f:
        group = f["shots/000000"]
        ds = group["diode_current"]
        np.testing.assert_array_equal(ds[()], channels["diode_current"].codes)
        scaling = json.loads(group.attrs["channels_json"])
        assert set(scaling) == set(group) == set(channels)
        for name, ch in channels.items():
            assert scaling[name] == {"gain": ch.gain, "offset": ch.offset,
                                     "code_min": ch.code_min, "code_max": ch.code_max}
        volts = ds[()] * scaling["diode_current"]["gain"] + scaling["diode_current"]["offset"]
        assert volts[0] == channels["diode_current"].codes[0] * 2.0**-15 + 5e-324
        assert group.attrs["dt_s"] == 1e-9
        assert bool(group.attrs["complete"])
        assert f.attrs["format_version"] == 3


def test_keys_next_key_and_duplicates(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        assert raw.keys() == []
        assert raw.next_key() == "000000"
        for _ in range(3):
            raw.append_shot(raw.next_key(), 0.0, 1e-9, make_channels(), make_probes(), {"n": 1})
        assert raw.keys() == ["000000", "000001", "000002"]
        assert len(raw) == 3
        with pytest.raises(StoreError, match="already"):
            raw.append_shot("000001", 0.0, 1e-9, make_channels(), make_probes(), {})
        raw.append_shot("000001", 0.0, 1e-9, make_channels(9), make_probes(), {"n": 2},
                        replace=True)  # fmt: skip
        assert raw.read_shot("000001").attrs == {"n": 2}
    # reopening for append keeps everything and continues the numbering
    with RawRecord(path, "a") as raw:
        assert raw.next_key() == "000003"
        assert raw.read_shot("000000").attrs == {"n": 1}


@pytest.mark.parametrize(
    ("key", "channels_override", "message"),
    [
        ("bad/key", None, "invalid shot key"),
        ("000000", {"v": np.zeros(4, dtype=np.float64)}, "int8/int16"),
        ("000000", {"v": np.zeros(4, dtype=np.int32)}, "int8/int16"),
        ("000000", {"v": np.zeros((2, 2), dtype=np.int16)}, "1-D"),
        ("000000", {}, "no channels"),
    ],
)
def test_bad_shots_are_refused(tmp_path, key, channels_override, message):
    channels = make_channels()
    if channels_override is not None:
        ch = channels["gate"]
        channels = {
            name: type(ch)(codes=codes, gain=1.0, offset=0.0, code_min=-1, code_max=1)
            for name, codes in channels_override.items()
        }
    with RawRecord(tmp_path / "raw.h5") as raw, pytest.raises(StoreError, match=message):
        raw.append_shot(key, 0.0, 1e-9, channels, make_probes(), {})


def test_bad_timing_is_refused(tmp_path):
    with RawRecord(tmp_path / "raw.h5") as raw, pytest.raises(StoreError, match="dt positive"):
        raw.append_shot("000000", 0.0, 0.0, make_channels(), make_probes(), {})


def test_read_only_and_missing(tmp_path):
    path = tmp_path / "raw.h5"
    with pytest.raises(StoreError, match="does not exist"):
        RawRecord(path, "r")
    with pytest.raises(StoreError, match="folder"):
        RawRecord(tmp_path / "nowhere" / "raw.h5", "a")
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
    with RawRecord(path, "r") as raw:
        with pytest.raises(StoreError, match="read-only"):
            raw.append_shot("000001", 0.0, 1e-9, make_channels(), make_probes(), {})
        with pytest.raises(StoreError, match="no shot"):
            raw.read_shot("000009")
    with pytest.raises(StoreError, match="mode"):
        RawRecord(path, "x")


def test_incomplete_shot_left_by_a_crash_is_dropped(tmp_path):
    """A group without the completion mark (killed mid-write) is invisible, then removed."""
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
    with h5py.File(path, "r+") as f:  # what a kill between datasets and the mark leaves
        g = f["shots"].create_group("000001")
        g.create_dataset("diode_voltage", data=np.zeros(10, dtype=np.int16))
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000"]
        assert "000001" not in raw
        with pytest.raises(StoreError, match="no shot"):
            raw.read_shot("000001")
    with RawRecord(path, "a") as raw:
        assert raw.next_key() == "000001"
        raw.append_shot("000001", 0.0, 1e-9, make_channels(3), make_probes(), {"ok": True})
        assert raw.keys() == ["000000", "000001"]
        assert raw.read_shot("000001").attrs == {"ok": True}


def test_link_to_an_object_a_crash_left_unwritten_is_invisible(tmp_path):
    """A kill -9 can leave a link whose object header never reached the file (seen with
    HDF5's metadata cache before shots were linked only once written): h5py cannot open,
    delete or move it. Reading and reopening for writing must still work around it."""
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
    with h5py.File(path, "r+") as f:
        address = h5py.h5o.get_info(f["shots"].create_group("000001").id).addr
    data = bytearray(path.read_bytes())
    data[address : address + 16] = bytes(16)  # the object header as a crash leaves it: zeros
    path.write_bytes(bytes(data))
    with h5py.File(path, "r") as f:
        assert f["shots"].get("000001") is None  # the state described above
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000"]
        assert "000001" not in raw
        assert raw.damaged_keys() == []
        with pytest.raises(StoreError, match="no shot"):
            raw.read_shot("000001")
    with RawRecord(path, "a") as raw:
        assert raw.keys() == ["000000"]
        key = raw.next_key()
        assert key == "000002"
        raw.append_shot(key, 0.0, 1e-9, make_channels(2), make_probes(), {"ok": True})
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000", "000002"]
        assert raw.read_shot("000002").attrs == {"ok": True}


def test_empty_file_from_a_crash_before_the_first_flush_is_recreated(tmp_path):
    path = tmp_path / "raw.h5"
    path.write_bytes(b"")
    with RawRecord(path) as raw:
        assert raw.keys() == []
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000"]


def test_damaged_or_foreign_files_raise_store_error(tmp_path):
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"this is not an HDF5 file at all" * 10)
    with pytest.raises(StoreError, match="cannot be opened"):
        RawRecord(junk, "r")
    with pytest.raises(StoreError, match="cannot be opened"):
        RawRecord(junk, "a")

    foreign = tmp_path / "foreign.h5"
    with h5py.File(foreign, "w") as f:
        f["x"] = np.arange(3)
    with pytest.raises(StoreError, match="not a benchrun raw record"):
        RawRecord(foreign, "r")

    # a record cut in half (disk full, copy interrupted) is refused with StoreError
    path = tmp_path / "raw.h5"
    with RawRecord(path, compression=None) as raw:
        for i in range(4):
            raw.append_shot(f"{i:06d}", 0.0, 1e-9, make_channels(i, 20000), make_probes(), {})
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(StoreError), RawRecord(path, "r") as raw:
        for key in ["000000", "000001", "000002", "000003"]:
            raw.read_shot(key)


def _offset_of_codes(path, key, channel):
    """File offset of a stored channel's first code (uncompressed shot group or slot)."""
    with h5py.File(path, "r") as f:
        if key in f["shots"] and "slot_view" not in f["shots"][key].attrs:  # not a view
            return f[f"shots/{key}/{channel}"].id.get_offset()
        block = f["slots/b000000"]
        for slot, row in enumerate(block["header"][()]):
            header = json.loads(row.tobytes().split(b"\0", 1)[0] or b"{}")
            if header.get("key") == key:
                names = [ch["name"] for ch in header["channels"]]
                codes = block["codes"]
                _, n_channels, length = codes.shape
                return codes.id.get_offset() + codes.dtype.itemsize * length * (
                    slot * n_channels + names.index(channel))
    raise KeyError(key)


@pytest.mark.parametrize("layout", ["slot", "group"])
def test_flipped_waveform_byte_is_detected(tmp_path, layout):
    path = tmp_path / "raw.h5"
    with RawRecord(path, compression=None) as raw:
        for key, seed, serial in (("000000", 0, "S1"), ("000001", 1, "S2")):
            if layout == "slot":  # what append_shot does with an uncompressed record
                raw.append_shot(key, 0.0, 1e-9, make_channels(seed), make_probes(),
                                {"serial": serial})
                continue
            builder = raw.begin_shot(key)  # a shot group, uncompressed
            for name, ch in make_channels(seed).items():
                builder.add_channel(name, ch)
            builder.finish(0.0, 1e-9, make_probes(), {"serial": serial})
    offset = _offset_of_codes(path, "000001", "diode_current")
    before = file_sha256(path)
    data = bytearray(path.read_bytes())
    data[offset + 101] ^= 0x01
    path.write_bytes(bytes(data))
    assert file_sha256(path) != before
    with RawRecord(path, "r") as raw:
        raw.read_shot("000000")  # untouched shot still reads
        with pytest.raises(StoreError, match="SHA-256"):
            raw.read_shot("000001")
        assert raw.damaged_keys() == ["000001"]
        # without verification the changed code is visible: one bit differs
        shot = raw.read_shot("000001", verify=False)
    original = make_channels(1)["diode_current"].codes
    assert np.count_nonzero(shot.channels["diode_current"].codes != original) == 1


def test_changed_attribute_is_detected(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {"serial": "S1"})
        raw.append_shot("000001", 0.0, 1e-9, make_channels(), make_probes(), {"serial": "S2"})
    with h5py.File(path, "r+") as f:
        group = f["shots/000000"]
        scaling = json.loads(group.attrs["channels_json"])
        scaling["diode_voltage"]["gain"] = 0.3
        group.attrs["channels_json"] = json.dumps(scaling)
        f["shots/000001"].attrs["dt_s"] = 2e-9
    with RawRecord(path, "r") as raw:
        for key in ("000000", "000001"):
            with pytest.raises(StoreError, match="SHA-256"):
                raw.read_shot(key)
        assert raw.damaged_keys() == ["000000", "000001"]


def test_scaling_that_does_not_name_the_datasets_cannot_be_read(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
    with h5py.File(path, "r+") as f:
        group = f["shots/000000"]
        scaling = json.loads(group.attrs["channels_json"])
        del scaling["gate"]
        group.attrs["channels_json"] = json.dumps(scaling)
    with RawRecord(path, "r") as raw, pytest.raises(StoreError, match="cannot be read"):
        raw.read_shot("000000", verify=False)


def test_read_shot_gives_the_analysis_pipeline_types(tmp_path):
    """Stored shots feed benchrun.analysis.pipeline.analyze_channels unchanged."""
    from benchrun.analysis import pipeline

    with RawRecord(tmp_path / "raw.h5") as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
        shot = raw.read_shot("000000")
    assert all(isinstance(c, pipeline.ChannelData) for c in shot.channels.values())
    assert all(isinstance(p, pipeline.ProbeCalibration) for p in shot.probes.values())
    original = make_channels()["gate"]
    np.testing.assert_array_equal(shot.channels["gate"].volts(), original.volts())


def test_second_writer_process_is_refused(tmp_path):
    """HDF5 file locking keeps a second process from writing the record at the same time."""
    import subprocess
    import sys

    path = tmp_path / "raw.h5"
    code = (
        "import sys\n"
        "from benchrun.errors import StoreError\n"
        "from benchrun.store.raw import RawRecord\n"
        "try:\n"
        "    RawRecord(sys.argv[1], 'a')\n"
        "except StoreError as exc:\n"
        "    print('refused:', exc)\n"
        "    sys.exit(3)\n"
    )
    with RawRecord(path) as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), {})
        busy = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                              text=True, timeout=60)  # fmt: skip
    assert busy.returncode == 3, busy.stdout + busy.stderr
    assert "another process" in busy.stdout
    free = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                          text=True, timeout=60)  # fmt: skip
    assert free.returncode == 0, free.stdout + free.stderr


def test_numpy_values_in_attrs_are_stored_as_plain_json(tmp_path):
    attrs = {"adc_bits": np.int64(8), "range_V": np.float32(0.5), "taps": np.arange(3),
             "ok": np.bool_(True), "pair": (1, 2)}  # fmt: skip
    with RawRecord(tmp_path / "raw.h5") as raw:
        raw.append_shot("000000", 0.0, 1e-9, make_channels(), make_probes(), attrs)
        shot = raw.read_shot("000000")  # also checks the stored digest
    assert shot.attrs == {"adc_bits": 8, "range_V": 0.5, "taps": [0, 1, 2], "ok": True,
                          "pair": [1, 2]}  # fmt: skip
    with RawRecord(tmp_path / "raw.h5") as raw, pytest.raises(StoreError, match="JSON"):
        raw.append_shot("000001", 0.0, 1e-9, make_channels(), make_probes(), {"x": object()})
