"""Low-level HDF5 writing for the raw record: attributes, dataset layouts and link
properties built once and reused, writing exactly what h5py's high-level calls write
(``tests/test_raw_write_speedpath.py`` checks that field by field), at a fraction of the cost
per shot. Used by :mod:`benchrun.store.raw` and :mod:`benchrun.store.raw_shot`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import h5py
import numpy as np

#: Chunk size of a compressed channel, bytes.
_CHUNK_BYTES = 256 * 1024

_SCALAR_SPACE = h5py.h5s.create(h5py.h5s.SCALAR)
#: (numpy dtype, HDF5 file type, memory type for the write) per attribute kind: what h5py's
#: ``attrs[name] = value`` stores for a Python bool, int, float and str. For the numbers the
#: memory type is the file type, so HDF5 copies the value without setting up a conversion;
#: a string goes through h5py's own conversion from Python objects, from the memory type
#: h5py would build for it on every write (``py_create`` of the array's dtype), built once.
_ATTR_TYPES = {
    kind: (dtype, htype, h5py.h5t.py_create(dtype) if kind == "str" else htype)
    for kind, dtype in (("bool", np.dtype(bool)), ("int", np.dtype(np.int64)),
                        ("float", np.dtype(np.float64)), ("str", h5py.string_dtype()))
    for htype in (h5py.h5t.py_create(dtype, logical=True),)
}


#: Link creation properties h5py's ``group[name] = obj`` uses for an ASCII name (shot keys
#: and channel names are ASCII, see ``_KEY_RE``), made once instead of per link.
_LCPL_ASCII = h5py.h5p.create(h5py.h5p.LINK_CREATE)
_LCPL_ASCII.set_create_intermediate_group(True)
_LCPL_ASCII.set_char_encoding(h5py.h5t.CSET_ASCII)
#: HDF5 file type per codes dtype: what h5py's ``create_dataset(data=codes)`` stores
_CODE_TYPES: dict[np.dtype, Any] = {}


def _code_type(dtype: np.dtype) -> Any:
    htype = _CODE_TYPES.get(dtype)
    if htype is None:
        htype = _CODE_TYPES[dtype] = h5py.h5t.py_create(dtype, logical=True)
    return htype


def _codes_create_plist(compression: str | None, size: int, itemsize: int) -> Any:
    """Dataset creation properties of one channel's codes: exactly what h5py's
    ``create_dataset(name, data=codes, compression="gzip", compression_opts=1,
    shuffle=True, chunks=(chunk,))`` (or, uncompressed, ``create_dataset(name, data=codes)``)
    sets: optional chunking with byte shuffle then deflate level 1, no object timestamps,
    attribute creation order not tracked."""
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    if compression == "gzip" and size:
        dcpl.set_chunk((max(1, min(size, _CHUNK_BYTES // itemsize)),))
        dcpl.set_shuffle()
        dcpl.set_deflate(1)
    dcpl.set_obj_track_times(False)
    dcpl.set_attr_creation_order(0)
    return dcpl


#: Metadata cache of a record open for writing, bytes (fixed; HDF5's default adapts from
#: 2 MiB). Every ``H5Fflush`` walks all entries in the cache, clean or dirty, to list the
#: dirty ones, and the default cache keeps ~6000 entries of past shots, which made each
#: flush several times dearer than its writes (and dearer the longer the run). This size
#: holds a shot's own objects and the ``/shots`` index many times over.
_WRITE_METADATA_CACHE_BYTES = 256 * 1024

#: Metadata cache of a record open for writing shots into slots (uncompressed, the runner's
#: record), bytes. A slot shot changes no HDF5 metadata; only a new block of slots (one per
#: 64 shots) adds objects (a group, two datasets, a link in ``/slots``): about 1.7 kB of
#: cached metadata, which HDF5 holds in about 16 kB of memory (measured: ~9.5 bytes of memory
#: per byte the cache counts). The 256 KiB cache above filled only after ~150 blocks
#: (~9,000 shots), so a long run's memory grew ~250 bytes a shot up to ~2.4 MB; this size
#: holds a block's creation many times over and is full within the first ~1,000 shots (about
#: 0.3 MB of memory), after which memory stays flat.
_SLOT_METADATA_CACHE_BYTES = 32 * 1024


def _fix_metadata_cache(f: h5py.File, size: int = _WRITE_METADATA_CACHE_BYTES) -> None:
    """Give ``f`` a metadata cache of fixed ``size`` bytes (HDF5 ``H5Fset_mdc_config``).

    A smaller cache only evicts (clean) entries of older shots sooner; what a flush writes,
    and when, is unchanged. Mode 0 is ``H5C_incr__off``, ``H5C_flash_incr__off`` and
    ``H5C_decr__off`` of HDF5's ``H5Cpublic.h``: no automatic resizing.
    """
    config = f.id.get_mdc_config()
    config.set_initial_size = True
    config.initial_size = config.max_size = size
    config.min_size = min(config.min_size, size)
    config.incr_mode = config.flash_incr_mode = config.decr_mode = 0
    f.id.set_mdc_config(config)


def _write_new_attrs(obj: Any, values: Mapping[str, str | int | float | bool]) -> None:
    """Write attributes on an object created a moment ago (none of the names exist yet).

    Stores exactly what ``obj.attrs[name] = value`` stores (HDF5 enum bool, int64, float64,
    variable-length UTF-8 string), through the low-level API: h5py's high-level path checks
    for an existing attribute and builds the types again for every value, which costs more
    than the write itself for the small attributes of a shot. ``obj`` is an h5py object or
    a low-level object identifier.
    """
    oid = obj.id if isinstance(obj, h5py.HLObject) else obj  # h5py object or low-level id
    for name, value in values.items():
        if isinstance(value, bool | np.bool_):
            kind, value = "bool", bool(value)
        elif isinstance(value, str):
            kind = "str"
        elif isinstance(value, int | np.integer):
            kind, value = "int", int(value)
        else:
            kind, value = "float", float(value)
        dtype, htype, mtype = _ATTR_TYPES[kind]
        attr = h5py.h5a.create(oid, name.encode(), htype, _SCALAR_SPACE)
        try:
            attr.write(np.array(value, dtype=dtype), mtype=mtype)
        finally:
            attr.close()


