"""The raw record's low-level write path stores what h5py's high-level calls store.

``RawRecord.append_shot`` creates the code datasets and links the shot group through h5py's
low-level API (prepared property lists, no per-call argument handling). h5py's high-level
``Group.create_dataset(name, data=codes, ...)`` and ``group[name] = obj`` are the outside
reference: datatype, shape, storage layout, chunking, filter pipeline, fill and allocation
settings, timestamps, attribute order tracking and link name encoding must be the same.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from store_helpers import make_channels, make_probes

from benchrun.store import RawRecord
from benchrun.store.raw import (
    _CHUNK_BYTES,
    _SLOT_METADATA_CACHE_BYTES,
    _WRITE_METADATA_CACHE_BYTES,
)


def _dcpl_facts(ds: h5py.Dataset) -> dict[str, object]:
    plist = ds.id.get_create_plist()
    facts: dict[str, object] = {
        "layout": plist.get_layout(),
        "fill_time": plist.get_fill_time(),
        "alloc_time": plist.get_alloc_time(),
        "track_times": plist.get_obj_track_times(),
        "attr_order": plist.get_attr_creation_order(),
        "fill_value_defined": plist.fill_value_defined(),
        "filters": [plist.get_filter(i)[:3] for i in range(plist.get_nfilters())],
        "mtime": h5py.h5o.get_info(ds.id).mtime,  # 0 unless timestamps were written
    }
    if facts["layout"] == h5py.h5d.CHUNKED:
        facts["chunks"] = plist.get_chunk()
    return facts


@pytest.mark.parametrize("compression", ["gzip", None])
def test_code_datasets_equal_h5py_create_dataset(tmp_path, compression):
    channels = make_channels(seed=4, n=3001)
    channels["big_endian"] = type(channels["gate"])(
        codes=np.arange(-50, 50, dtype=">i2")[::2],  # non-native order, not contiguous
        gain=1.0, offset=0.0, code_min=-32768, code_max=32767,
    )
    probes = dict(make_probes(), big_endian=make_probes()["gate"])
    with RawRecord(tmp_path / "raw.h5", "w", compression=compression) as raw:
        raw.append_shot("000000", 0.0, 1e-9, channels, probes, {})
    with h5py.File(tmp_path / "ref.h5", "w", libver="earliest") as ref:
        group = ref.create_group("000000")
        for name, ch in channels.items():
            codes = np.asarray(ch.codes)
            options: dict[str, object] = {}
            if compression == "gzip":  # the options the record documents (module docstring)
                chunk = max(1, min(codes.size, _CHUNK_BYTES // codes.dtype.itemsize))
                options = {"compression": "gzip", "compression_opts": 1, "shuffle": True,
                           "chunks": (chunk,)}
            group.create_dataset(name, data=codes, **options)
    with h5py.File(tmp_path / "raw.h5", "r") as ours, h5py.File(tmp_path / "ref.h5", "r") as ref:
        for name, ch in channels.items():
            our_ds, ref_ds = ours["shots/000000"][name], ref["000000"][name]
            assert our_ds.id.get_type() == ref_ds.id.get_type(), name
            assert our_ds.dtype == ref_ds.dtype == np.asarray(ch.codes).dtype
            assert our_ds.shape == ref_ds.shape
            assert _dcpl_facts(our_ds) == _dcpl_facts(ref_ds), name
            np.testing.assert_array_equal(our_ds[()], np.asarray(ch.codes))
        filters = _dcpl_facts(ours["shots/000000/gate"])["filters"]
        expected = [h5py.h5z.FILTER_SHUFFLE, h5py.h5z.FILTER_DEFLATE] if compression else []
        assert [f[0] for f in filters] == expected


def test_shot_link_equals_h5py_group_setitem(tmp_path):
    with RawRecord(tmp_path / "raw.h5", "w") as raw:
        raw.append_shot("p0-S01-r0-a0", 0.0, 1e-9, make_channels(), make_probes(), {})
    with h5py.File(tmp_path / "raw.h5", "r+") as f:
        shots = f["shots"]
        shots["reference"] = f.create_group("elsewhere")  # the high-level way
        links = shots.id.links
        ours, ref = links.get_info(b"p0-S01-r0-a0"), links.get_info(b"reference")
        assert (ours.type, ours.cset) == (ref.type, ref.cset) == (h5py.h5l.TYPE_HARD,
                                                                  h5py.h5t.CSET_ASCII)


def test_empty_channel_round_trips(tmp_path):
    channels = make_channels(n=0)
    with RawRecord(tmp_path / "raw.h5", "w") as raw:
        raw.append_shot("000000", 0.0, 1e-9, channels, make_probes(), {})
        shot = raw.read_shot("000000")
    assert {name: ch.codes.size for name, ch in shot.channels.items()} == {
        name: 0 for name in channels}


def test_writer_metadata_cache_is_fixed_and_bounded(tmp_path):
    """Every H5Fflush walks the whole metadata cache: a record open for writing shot groups
    (compressed) keeps it at a fixed size however many shots it holds; a reader keeps HDF5's
    default cache."""
    path = tmp_path / "raw.h5"
    channels, probes = make_channels(n=500), make_probes()
    with RawRecord(path, "w", compression="gzip", durability="process") as raw:
        config = raw._f.id.get_mdc_config()
        assert (config.incr_mode, config.flash_incr_mode, config.decr_mode) == (0, 0, 0)
        for n in range(150):
            raw.append_shot(f"{n:06d}", 0.0, 1e-9, channels, probes, {"n": n})
        max_size, _, cur_size, _ = raw._f.id.get_mdc_size()
        # HDF5 may let the cache stand a little over its size until it next makes room
        # (observed: 262,536 bytes after the 150th shot group; the /shots name heap grows)
        assert max_size == _WRITE_METADATA_CACHE_BYTES
        assert cur_size <= 1.1 * max_size
    with RawRecord(path, "r") as raw, h5py.File(path, "r") as plain:
        assert raw._f.id.get_mdc_config().max_size == plain.id.get_mdc_config().max_size
        assert raw.read_shot("000149").attrs == {"n": 149}


def test_slot_writer_metadata_cache_is_small_and_stays_full_not_growing(tmp_path):
    """A record written in slots (the runner's) changes HDF5 metadata once per block only;
    its cache is the small fixed size, also when opened for writing again (``--resume``),
    and after enough blocks to fill it, more blocks leave its size and entry count within
    that size (the cache, held in about ten times its counted size of memory, is what grew
    a long run's memory by ~250 bytes a shot before it was made small)."""
    path = tmp_path / "raw.h5"
    channels, probes = make_channels(n=200), make_probes()
    samples = []
    with RawRecord(path, "w", compression=None, durability="process") as raw:
        config = raw._f.id.get_mdc_config()
        assert (config.incr_mode, config.flash_incr_mode, config.decr_mode) == (0, 0, 0)
        for n in range(2000):
            raw.append_shot(f"{n:06d}", 0.0, 1e-9, channels, probes, {"n": n})
            if n % 500 == 499:
                samples.append(raw._f.id.get_mdc_size())
        assert len(raw._slots.blocks) > 30
    for max_size, _, cur_size, _ in samples:
        assert max_size == _SLOT_METADATA_CACHE_BYTES >= cur_size
    assert _SLOT_METADATA_CACHE_BYTES < _WRITE_METADATA_CACHE_BYTES
    # full from the second sample on: the entries stop growing with the blocks
    assert samples[-1][3] <= samples[1][3]
    with RawRecord(path, "a", compression=None, durability="process") as raw:
        assert raw._f.id.get_mdc_config().max_size == _SLOT_METADATA_CACHE_BYTES
        raw.append_shot("002000", 0.0, 1e-9, channels, probes, {"n": 2000})
        assert raw.read_shot("000000").attrs == {"n": 0}
    with RawRecord(path, "r") as raw:
        assert raw.read_shot("002000").attrs == {"n": 2000}
        assert len(raw.keys()) == 2001
