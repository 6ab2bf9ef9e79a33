"""Raw record format 3: shots of an uncompressed record in preallocated slots.

The layout is checked with h5py (the outside reference: any HDF5 reader must see every
slot through the two datasets of a block), and the crash cases are made the way a crash
leaves them: a header never written, a header whose codes a power cut lost.
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.analysis.pipeline import ChannelData
from benchrun.errors import StoreError
from benchrun.store import raw_slots
from benchrun.store.raw import FORMAT_VERSION, RawRecord
from benchrun.store.raw_slots import FIRST_BLOCK_SLOTS, SLOTS_GROUP, SlotStore


def _groups(f):
    """Shot groups under /shots, without the views of slot shots (raw_views)."""
    return [k for k, g in f["shots"].items() if "slot_view" not in g.attrs]


def _same_shot(got, channels) -> None:
    assert set(got.channels) == set(channels)
    for name, ch in channels.items():
        assert got.channels[name].codes.dtype == ch.codes.dtype
        np.testing.assert_array_equal(got.channels[name].codes, ch.codes)


def _write(path, n, *, start=0, **kwargs):
    with RawRecord(path, "a", compression=None, **kwargs) as raw:
        for k in range(start, start + n):
            raw.append_shot(f"{k:06d}", 0.0, 1e-9, make_channels(k, 500), make_probes(),
                            {"k": k})


def test_uncompressed_shots_go_to_slots_any_hdf5_reader_can_read(tmp_path):
    path = tmp_path / "raw.h5"
    channels = make_channels(1, 700)  # int16 and int8 channels: an int16 block
    with RawRecord(path, "w", compression=None) as raw:
        raw.append_shot("000000", -1e-6, 2.5e-10, channels, make_probes(), {"serial": "S1"})
    with h5py.File(path, "r") as f:
        assert f.attrs["format_version"] == FORMAT_VERSION == 3
        assert _groups(f) == []  # no shot group (a view of the slot only)
        assert "content_sha256" in f[SLOTS_GROUP].attrs["description"]  # self-described
        block = f[SLOTS_GROUP]["b000000"]
        codes, header = block["codes"], block["header"]
        # room for a slightly longer record of the same test point
        assert codes.shape == (FIRST_BLOCK_SLOTS, 3, 700 + 700 // 16 + 1)
        assert codes.dtype == np.int16
        text = header[0].tobytes().split(b"\0", 1)[0]
        described = json.loads(text)
        assert described["key"] == "000000" and described["attrs"] == {"serial": "S1"}
        assert described["points"] == 700
        for row, ch in enumerate(described["channels"]):
            original = channels[ch["name"]]
            np.testing.assert_array_equal(codes[0, row, :700], original.codes)
            assert not codes[0, row, 700:].any()
            assert np.dtype(ch["dtype"]) == original.codes.dtype
            assert ch["gain"] == original.gain
        assert not header[1].any()  # the next slot is empty
    with RawRecord(path, "r") as raw:
        shot = raw.read_shot("shots/000000")
    _same_shot(shot, channels)
    assert shot.t_start == -1e-6 and shot.dt == 2.5e-10


def test_blocks_grow_and_a_reopened_record_continues_in_its_block(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 20)
    _write(path, 30, start=20)  # the second block (32 slots) is half full on reopening
    with RawRecord(path, "r") as raw:
        assert raw.keys() == [f"{k:06d}" for k in range(50)]
        assert raw.next_key() == "000050"
        for k in (0, 15, 16, 19, 20, 49):
            shot = raw.read_shot(f"{k:06d}")
            assert shot.attrs == {"k": k}
            _same_shot(shot, make_channels(k, 500))
    with h5py.File(path, "r") as f:
        sizes = [f[SLOTS_GROUP][b]["codes"].shape[0] for b in sorted(f[SLOTS_GROUP])]
    assert sizes == [8, 16, 32]


def test_duplicate_replace_and_layout_fallbacks(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", compression=None) as raw:
        raw.append_shot("a", 0.0, 1e-9, make_channels(1, 300), make_probes(), {"v": 1})
        with pytest.raises(StoreError, match="already"):
            raw.append_shot("a", 0.0, 1e-9, make_channels(1, 300), make_probes(), {})
        raw.append_shot("a", 0.0, 1e-9, make_channels(2, 300), make_probes(), {"v": 2},
                        replace=True)
        # unequal lengths cannot share a slot: a shot group
        uneven = {**make_channels(3, 300), "gate": ChannelData(
            np.zeros(10, np.int8), 1.0, 0.0, -128, 127)}
        raw.append_shot("b", 0.0, 1e-9, uneven, make_probes(), {})
        # a shot group replaced by a slot, a slot replaced by a streamed shot group
        raw.append_shot("b", 0.0, 1e-9, make_channels(4, 300), make_probes(), {"v": 4},
                        replace=True)
        builder = raw.begin_shot("a", replace=True)
        for name, ch in make_channels(5, 300).items():
            builder.add_channel(name, ch)
        builder.finish(0.0, 1e-9, make_probes(), {"v": 5})
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["a", "b"]
        assert raw.read_shot("a").attrs == {"v": 5}
        assert raw.read_shot("b").attrs == {"v": 4}
        _same_shot(raw.read_shot("b"), make_channels(4, 300))
    with h5py.File(path, "r") as f:
        assert _groups(f) == ["a"]


def test_wide_header_gets_a_wider_block(tmp_path):
    path = tmp_path / "raw.h5"
    with RawRecord(path, "w", compression=None) as raw:
        raw.append_shot("s0", 0.0, 1e-9, make_channels(1, 100), make_probes(), {})
        raw.append_shot("s1", 0.0, 1e-9, make_channels(1, 100), make_probes(),
                        {"note": "x" * 9000})
        assert raw.read_shot("s1").attrs == {"note": "x" * 9000}
    with h5py.File(path, "r") as f:
        widths = [f[SLOTS_GROUP][b]["header"].shape[1] for b in sorted(f[SLOTS_GROUP])]
    assert widths[0] == raw_slots.MIN_HEADER_BYTES and widths[1] >= 2 * 9000


def test_shot_whose_header_was_never_written_is_invisible_and_its_slot_reused(
        tmp_path, monkeypatch):
    path = tmp_path / "raw.h5"
    _write(path, 2)
    original = SlotStore._pwrite
    calls = []

    def crash_on_header(self, offset, data):
        calls.append(offset)
        if len(calls) == 2:  # codes written, the process dies before the header
            raise KeyboardInterrupt
        return original(self, offset, data)

    monkeypatch.setattr(SlotStore, "_pwrite", crash_on_header)
    with pytest.raises(KeyboardInterrupt), RawRecord(path, "a", compression=None) as raw:
        raw.append_shot("000002", 0.0, 1e-9, make_channels(2, 500), make_probes(), {})
    monkeypatch.setattr(SlotStore, "_pwrite", original)
    with RawRecord(path, "a", compression=None) as raw:
        assert raw.keys() == ["000000", "000001"]
        raw.append_shot("000002", 0.0, 1e-9, make_channels(7, 500), make_probes(), {"k": 7})
    with RawRecord(path, "r") as raw:
        _same_shot(raw.read_shot("000002"), make_channels(7, 500))
    with h5py.File(path, "r") as f:  # the same slot, not a new one
        assert f[SLOTS_GROUP]["b000000"]["header"][3].sum() == 0


def _clear_codes(path, slot):
    with h5py.File(path, "r+") as f:
        f[SLOTS_GROUP]["b000000"]["codes"][slot] = 0


def test_newest_slot_whose_codes_a_power_cut_lost_is_dropped(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 3)
    _clear_codes(path, 2)  # its header reached the disk, its codes did not
    with RawRecord(path, "r") as raw:  # read only: listed, and found damaged
        assert raw.keys() == ["000000", "000001", "000002"]
        assert raw.damaged_keys() == ["000002"]
    with RawRecord(path, "a", compression=None) as raw:  # resumed: cleared, fired again
        assert raw.keys() == ["000000", "000001"]
        assert raw.next_key() == "000002"
    with h5py.File(path, "r") as f:
        assert f[SLOTS_GROUP]["b000000"]["header"][2, 0] == 0


def test_changed_older_slot_is_damaged_not_dropped(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 3)
    with h5py.File(path, "r+") as f:
        codes = f[SLOTS_GROUP]["b000000"]["codes"]
        row = codes[1]
        row[0, 5] ^= 1
        codes[1] = row
    with RawRecord(path, "r") as raw:
        assert raw.keys() == ["000000", "000001", "000002"]
        assert raw.damaged_keys() == ["000001"]
        with pytest.raises(StoreError, match="SHA-256"):
            raw.read_shot("000001")
        assert raw.read_shot("000001", verify=False).attrs == {"k": 1}


def test_record_of_a_newer_format_is_refused(tmp_path):
    path = tmp_path / "raw.h5"
    _write(path, 1)
    with h5py.File(path, "r+") as f:
        f.attrs["format_version"] = FORMAT_VERSION + 1
    with pytest.raises(StoreError, match="newer"):
        RawRecord(path, "r")


def test_slot_write_hands_the_shot_to_the_os_at_once(tmp_path):
    """Durability "process": no HDF5 flush per shot, yet another reader sees every shot as
    soon as append_shot returned (the slot's bytes are in the operating system)."""
    import subprocess
    import sys

    path = tmp_path / "raw.h5"
    probe = ("import h5py, sys\n"
             "with h5py.File(sys.argv[1], 'r', locking=False) as f:\n"
             "    h = f['slots/b000000/header']\n"
             "    print(sum(1 for row in h[()] if row[0]))")
    with RawRecord(path, "w", compression=None, durability="process") as raw:
        for k in range(3):
            raw.append_shot(f"{k:06d}", 0.0, 1e-9, make_channels(k, 200), make_probes(), {})
            seen = subprocess.run([sys.executable, "-c", probe, str(path)], check=True,
                                  capture_output=True, text=True).stdout.strip()
            assert seen == str(k + 1)


@pytest.mark.parametrize("rest", [{}, {"t_start": -1e-6, "dt": 1e-9}, {"b": [1, {"z": 0.1}]}])
@pytest.mark.parametrize("attrs", [{}, {"serial": "S1", "µ": [1.5, None]}])
def test_attrs_json_spliced_in_equals_canonical_json_of_the_whole(rest, attrs):
    # the reference is canonical_json itself (json.dumps with sorted keys) of the whole object
    from benchrun.store.canonical import canonical_json, with_attrs_json
    from benchrun.store.digests import shot_digest

    assert with_attrs_json(canonical_json(rest), canonical_json(attrs)) == \
        canonical_json({**rest, "attrs": attrs})
    channels, probes = make_channels(3, 50), make_probes()
    assert shot_digest(0.0, 1e-9, channels, probes, attrs,
                       attrs_json=canonical_json(attrs)) == \
        shot_digest(0.0, 1e-9, channels, probes, attrs)


def test_without_positional_io_slots_are_read_through_hdf5_and_shots_go_to_groups(
        tmp_path, monkeypatch):
    # a platform without os.pwrite (Windows): the record still reads, and appends shot groups
    import os

    path = tmp_path / "raw.h5"
    _write(path, 3)
    monkeypatch.delattr(os, "pwrite")
    with RawRecord(path, "r") as raw:
        for k in range(3):
            _same_shot(raw.read_shot(f"{k:06d}"), make_channels(k, 500))
    _write(path, 1, start=3)
    with h5py.File(path, "r") as f:
        assert _groups(f) == ["000003"]
    with RawRecord(path, "r") as raw:
        assert raw.keys() == [f"{k:06d}" for k in range(4)] and raw.damaged_keys() == []


def test_records_of_nearby_lengths_share_a_block(tmp_path):
    path = tmp_path / "raw.h5"
    # 1000 makes slots of 1063; 1040 and 990 share them; 760 is below 3/4 of 1063 and makes
    # slots of 808, shared with 700; 1100 is beyond 1063
    lengths = [1000, 1040, 990, 760, 700, 1100]
    with RawRecord(path, "w", compression=None) as raw:
        for k, n in enumerate(lengths):
            raw.append_shot(f"s{k}", 0.0, 1e-9, make_channels(k, n), make_probes(), {})
    with RawRecord(path, "r") as raw:
        for k, n in enumerate(lengths):
            _same_shot(raw.read_shot(f"s{k}"), make_channels(k, n))
    with h5py.File(path, "r") as f:
        blocks = [f[SLOTS_GROUP][b] for b in sorted(f[SLOTS_GROUP])]
        assert [b["codes"].shape[2] for b in blocks] == [1063, 808, 1169]
        used = [sum(1 for row in b["header"][()] if row[0]) for b in blocks]
    assert used == [3, 2, 1]


def test_damaged_newest_slot_without_positional_io_is_cleared_through_hdf5(tmp_path, monkeypatch):
    import os

    path = tmp_path / "raw.h5"
    _write(path, 2)
    _clear_codes(path, 1)
    monkeypatch.delattr(os, "pwrite")
    with RawRecord(path, "a", compression=None) as raw:  # cleared through HDF5
        assert raw.keys() == ["000000"]
        raw.append_shot("000001", 0.0, 1e-9, make_channels(9, 500), make_probes(), {})
    with h5py.File(path, "r") as f:
        assert f[SLOTS_GROUP]["b000000"]["header"][1, 0] == 0
        assert _groups(f) == ["000001"]
    with RawRecord(path, "r") as raw:  # the shot group now holds the key
        _same_shot(raw.read_shot("000001"), make_channels(9, 500))


def _strings_held(obj, seen=None) -> list[str]:
    """Every str reachable from ``obj`` through containers and numpy arrays' Python objects
    (not through the slot store the index points back to)."""
    import gc

    seen = set() if seen is None else seen
    out = []
    # a dict's keys explicitly: the collector does not visit string keys
    refs = [*obj.keys(), *obj.values()] if isinstance(obj, dict) else gc.get_referents(obj)
    for ref in refs:
        if id(ref) in seen or isinstance(ref, SlotStore | type):
            continue
        seen.add(id(ref))
        if isinstance(ref, str):
            out.append(ref)
        elif isinstance(ref, dict | list | tuple | set):
            out += _strings_held(ref, seen)
    return out


def test_key_index_holds_no_key_and_tells_keys_of_one_hash_apart(tmp_path, monkeypatch):
    # The index of a long run must not grow by a key string per shot (soak memory, issue 15):
    # it keeps hashes and slot positions; a matching hash is confirmed against the header on
    # disk. With every key given the same hash, lookups, the duplicate check, replace,
    # removal and reopening still find exactly the right slot.
    path = tmp_path / "raw.h5"
    _write(path, 12)
    with RawRecord(path, "a", compression=None) as raw:
        index = raw._slots.index
        names = [k for k in _strings_held(index) if k.isdigit()]
        assert names == []  # no key string is held by the index
        assert len(index) == 12 and sorted(index) == [f"{k:06d}" for k in range(12)]
    monkeypatch.setattr(raw_slots.SlotIndex, "MERGE_AT", 3)  # entries in dict and arrays
    monkeypatch.setattr(raw_slots, "_key_hash", lambda key: 7)  # every key one hash
    with RawRecord(path, "a", compression=None) as raw:
        assert raw.keys() == [f"{k:06d}" for k in range(12)]
        for k in (0, 6, 11):
            assert raw.read_shot(f"{k:06d}").attrs == {"k": k}
        assert "000012" not in raw
        with pytest.raises(StoreError, match="already in raw record"):
            raw.append_shot("000003", 0.0, 1e-9, make_channels(3, 500), make_probes(), {})
        raw.append_shot("000003", 0.0, 1e-9, make_channels(30, 500), make_probes(),
                        {"k": 30}, replace=True)
        for k in range(12, 16):  # the third merges the dict into the arrays
            raw.append_shot(f"{k:06d}", 0.0, 1e-9, make_channels(k, 500), make_probes(),
                            {"k": k})
        raw._slots.drop("000005")
        assert raw.read_shot("000003").attrs == {"k": 30}
        assert raw.read_shot("000014").attrs == {"k": 14}
        assert "000005" not in raw and len(raw._slots.index) == 15
        entries = dict(raw._slots.index.items())
        assert entries["000003"][2] == 12  # seq of the replacing slot
    with RawRecord(path, "r") as raw:
        assert raw.keys() == sorted({f"{k:06d}" for k in range(16)} - {"000005"})
        assert raw.read_shot("000003").attrs == {"k": 30}
        assert raw.read_shot("000015").attrs == {"k": 15}


def test_key_index_merges_in_place_into_reserved_arrays(tmp_path, monkeypatch):
    # The soak's memory (issue 15): a merge must not rebuild the arrays (a rebuild allocated
    # several whole-index arrays at every merge and fragmented the C heap). With the arrays
    # reserved ahead, merges keep the same buffers; hashes stay sorted with equal hashes
    # interleaved across merges, removals are compacted, and every key is still found.
    monkeypatch.setattr(raw_slots.SlotIndex, "MERGE_AT", 5)
    monkeypatch.setattr(raw_slots.SlotIndex, "RESERVE", 8)  # forces growth, then in place
    monkeypatch.setattr(raw_slots, "_key_hash", lambda key: int(key) % 7)  # collisions
    path = tmp_path / "raw.h5"
    with RawRecord(path, "a", compression=None) as raw:
        index = raw._slots.index
        buffers = set()
        for k in range(60):
            raw.append_shot(f"{k:06d}", 0.0, 1e-9, make_channels(1, 50), make_probes(),
                            {"k": k})
            buffers.add(id(index._hashes))
            hashes = index._hashes[:index._n]
            assert np.all(hashes[:-1] <= hashes[1:])
        # 8 → 16 → 32 → 64 entries: three growths for 60 keys, not one buffer per merge
        assert len(buffers) <= 5 and index._hashes.size == 64
        for k in range(0, 60, 2):
            raw._slots.drop(f"{k:06d}")
        for k in range(60, 70):  # merges after the removals compact the arrays
            raw.append_shot(f"{k:06d}", 0.0, 1e-9, make_channels(1, 50), make_probes(),
                            {"k": k})
        assert index._removed <= index._n // 4
        expected = sorted({f"{k:06d}" for k in range(70)} - {f"{k:06d}" for k in range(0, 60, 2)})
        assert raw.keys() == expected and len(index) == len(expected)
        for k in (1, 33, 59, 60, 69):
            assert raw.read_shot(f"{k:06d}").attrs == {"k": k}
        assert f"{2:06d}" not in raw
    with RawRecord(path, "r") as raw:
        assert raw.keys() == expected
