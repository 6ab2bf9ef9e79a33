"""Compaction of a finished raw record: the same shots, compressed, in a smaller file.

The slots of a record being written are preallocated and uncompressed (:mod:`.raw_slots`):
the per-shot write must not wait for a compressor, and the last block is partly empty.
Once a run is over, :func:`compact_record` rewrites the record with every current shot's
codes and header in a *packed* block: the same block layout (``/slots/<block>/codes`` of
(slot, channel row, point) and ``/slots/<block>/header``), holding only the shots' own slots,
chunked one slot per chunk and compressed with HDF5's standard filters (byte shuffle for
16-bit codes, then deflate level 1), which every HDF5 reader has. Shot groups of format 2
are copied as they are. The views and the table of :mod:`.raw_views` are built for the new
file, run-level attributes are kept.

Never during a run: the caller checks the run is over (``benchrun compact`` refuses a run
whose manifest says it is running). The new file is written next to the old one, every
shot is read back from it with its SHA-256 checked against the digest the original holds
(digests are computed from the content, so they do not change), and only then does it
replace the original (an atomic rename). A packed block is read through HDF5 and never
written to: a resumed run appends its shots to new blocks.
"""

from __future__ import annotations

import contextlib
import os
import time
import zlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from benchrun.errors import StoreError
from benchrun.store.digests import shot_digest
from benchrun.store.raw import DURABILITY_PROCESS, RawRecord, _fsync_dir
from benchrun.store.raw_read import SHOTS_GROUP
from benchrun.store.raw_slots import SLOTS_DESCRIPTION, SLOTS_GROUP, _parse_header
from benchrun.store.raw_views import DESCRIBED_ATTR, TABLE_NAME, is_described, is_view

#: deflate level of a compacted record (1: fastest; HDF5 and zlib level numbering).
DEFLATE_LEVEL = 1


@dataclass(frozen=True)
class CompactResult:
    """What a compaction did: shot count, file size before and after (bytes), seconds."""

    shots: int
    bytes_before: int
    bytes_after: int
    seconds: float

    @property
    def ratio(self) -> float:
        return self.bytes_before / self.bytes_after if self.bytes_after else float("inf")


def _shuffle(raw: bytes, itemsize: int) -> bytes:
    """HDF5's byte shuffle filter (H5Z_FILTER_SHUFFLE): byte *k* of every element, for
    each *k* in turn."""
    if itemsize == 1:
        return raw
    return np.frombuffer(raw, np.uint8).reshape(-1, itemsize).T.tobytes()


def _packed_block(dst: h5py.Group, codes: np.ndarray, headers: list[bytes]) -> None:
    """Write one packed block: ``codes`` (slots, channels, length), one header per slot."""
    n, n_channels, length = codes.shape
    itemsize = codes.dtype.itemsize
    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_chunk((1, n_channels, length))
    if itemsize > 1:
        dcpl.set_shuffle()
    dcpl.set_deflate(DEFLATE_LEVEL)
    dcpl.set_obj_track_times(False)
    space = h5py.h5s.create_simple(codes.shape)
    dsid = h5py.h5d.create(dst.id, b"codes", h5py.h5t.py_create(codes.dtype), space, dcpl=dcpl)
    # compressed here as HDF5's filters would have (zlib releases the interpreter lock: the
    # slots of a block are compressed on every core), written in slot order
    def compress(slot: int) -> bytes:
        return zlib.compress(_shuffle(codes[slot].tobytes(), itemsize), DEFLATE_LEVEL)

    with ThreadPoolExecutor(max_workers=max(1, min(4, os.cpu_count() or 1))) as pool:
        for slot, chunk in enumerate(pool.map(compress, range(n))):
            dsid.write_direct_chunk((slot, 0, 0), chunk)
    width = max(len(h) for h in headers) + 1
    table = np.zeros((n, width), np.uint8)
    for slot, header in enumerate(headers):
        table[slot, :len(header)] = np.frombuffer(header, np.uint8)
    dst.create_dataset("header", data=table, chunks=(min(n, 64), width),
                       compression="gzip", compression_opts=DEFLATE_LEVEL,
                       track_times=False)


def compact_record(path: str | os.PathLike[str]) -> CompactResult:
    """Rewrite the finished raw record at ``path`` compressed (module docstring).

    Every block keeps its name and every shot its slot, so the views under ``/shots``
    (virtual datasets naming a block and a slot) are copied, not rebuilt.

    Raises
    ------
    StoreError
        The record cannot be read, the new file cannot be written, or a shot of it does not
        match its digest (nothing is changed then).
    """
    path = Path(path)
    start = time.perf_counter()
    before = path.stat().st_size if path.exists() else 0
    tmp = path.with_name(f".{path.name}.compact.tmp")
    try:
        with RawRecord(path, "r") as src, h5py.File(tmp, "w", libver="earliest") as dst:
            digests, described = _copy_record(src, dst)
        if not described:
            with RawRecord(tmp, "a", compression=None, durability=DURABILITY_PROCESS) as new:
                new.describe(force=True)
        bad = _verify_packed(tmp, digests)
        if bad:
            damaged = _damaged(path, bad)
            raise StoreError(
                f"shots {', '.join((damaged or bad)[:5])} "
                + ("do not match their SHA-256 in the original record" if damaged else
                   "did not read back from the compacted copy") + "; nothing was changed")
        with open(tmp, "rb") as handle:
            os.fsync(handle.fileno())
        os.replace(tmp, path)
        _fsync_dir(path.parent)
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise StoreError(f"cannot compact raw record {path}: {exc}") from exc
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()
    return CompactResult(len(digests), before, path.stat().st_size,
                         time.perf_counter() - start)


def _copy_record(src: RawRecord, dst: h5py.File) -> tuple[dict[str, str], bool]:
    """Write the compacted copy of ``src`` into the new file ``dst``; returns key → digest
    of every complete shot, and whether the views and the table were copied (they are
    built afresh otherwise)."""
    f, slots = src._f, src._slots
    described = is_described(f, slots)
    for name, value in f.attrs.items():
        if described or name != DESCRIBED_ATTR:
            dst.attrs[name] = value
    digests: dict[str, str] = {}
    current = {(block.name, slot): key for key, (block, slot, _) in slots.index.items()}
    if slots.blocks:
        dst.create_group(SLOTS_GROUP).attrs["description"] = SLOTS_DESCRIPTION
    for block in slots.blocks:
        if not block.used:
            continue
        codes = np.frombuffer(slots._read(block, "codes", 0, block.used), block.dtype)
        heads = np.frombuffer(slots._read(block, "header", 0, block.used), np.uint8)
        heads = heads.reshape(block.used, block.width)
        headers = []
        for slot in range(block.used):
            row = heads[slot].tobytes()
            headers.append(row[:max(0, row.find(b"\0"))])  # an empty slot stays empty
            key = current.get((block.name, slot))
            if key is not None:
                header = _parse_header(row)
                if header is None:
                    raise StoreError(f"shot {key}: its slot header cannot be read")
                digests[key] = str(header["content_sha256"])
        _packed_block(dst[SLOTS_GROUP].create_group(block.name),
                      codes.reshape(block.used, block.n_channels, block.length), headers)
    source = f[SHOTS_GROUP]
    groups = [key for key in source if key not in slots.index]  # shot groups (format 1/2)
    if described:  # views of every slot shot, still valid (same block, same slot): one copy
        f.copy(source, dst, name=SHOTS_GROUP)
        f.copy(f[TABLE_NAME], dst, name=TABLE_NAME)
    else:
        dst.create_group(SHOTS_GROUP)
    for key in groups:
        group = source.get(key)
        complete = group is not None and not is_view(group) and group.attrs.get("complete")
        if complete:
            digests[key] = str(group.attrs["content_sha256"])
            if not described:
                f.copy(group, dst[SHOTS_GROUP], name=key)
        elif described and key in dst[SHOTS_GROUP]:
            del dst[SHOTS_GROUP][key]  # not a shot
    return digests, described


@dataclass(frozen=True)
class _Codes:
    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclass(frozen=True)
class _Probe:
    scale: float
    deskew_s: float


def _verify_packed(path: Path, digests: dict[str, str]) -> list[str]:
    """Keys whose content in the compacted file at ``path`` does not match ``digests``:
    the keys :class:`RawRecord` lists, and every shot's content digest recomputed from the
    file (a packed block read and decompressed at once, shot groups as RawRecord reads them).
    """
    bad: list[str] = []
    with RawRecord(path, "r") as new:
        if set(new.keys()) != set(digests):
            return sorted(set(new.keys()) ^ set(digests))
        f, slots = new._f, new._slots
        for block in slots.blocks:
            current = [(slot, key) for key, (b, slot, _) in slots.index.items() if b is block]
            if not current:
                continue
            codes = f[SLOTS_GROUP][block.name]["codes"][()]
            heads = f[SLOTS_GROUP][block.name]["header"][()]
            for slot, key in current:
                header = _parse_header(heads[slot].tobytes())
                if header is None or _slot_digest(header, codes[slot]) != digests[key]:
                    bad.append(key)
        for key in set(digests) - set(slots.index):
            if _bad(new, key):
                bad.append(key)
    return sorted(bad)


def _slot_digest(header: dict, rows: np.ndarray) -> str:
    """The content digest of one slot shot from its header and its codes (as
    :meth:`SlotStore.read` gives them back: each channel in its own code type)."""
    points = int(header["points"])
    channels = {ch["name"]: _Codes(rows[r, :points].astype(np.dtype(ch["dtype"])),
                                   float(ch["gain"]), float(ch["offset"]),
                                   int(ch["code_min"]), int(ch["code_max"]))
                for r, ch in enumerate(header["channels"])}
    probes = {n: _Probe(float(p["scale"]), float(p["deskew_s"]))
              for n, p in header["probes"].items()}
    return shot_digest(float(header["t_start_s"]), float(header["dt_s"]), channels, probes,
                       header["attrs"])


def _damaged(path: Path, keys: list[str]) -> list[str]:
    """Those of ``keys`` whose content in the original does not match their digest."""
    with RawRecord(path, "r") as src:
        return [key for key in keys if key in src and _bad(src, key)]


def _bad(src: RawRecord, key: str) -> bool:
    try:
        src.read_shot(key, verify=True)
    except StoreError:
        return True
    return False
