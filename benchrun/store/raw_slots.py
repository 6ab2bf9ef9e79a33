"""Shots in preallocated slots (raw record format 3): the per-shot write without HDF5
metadata changes.

Creating a group, datasets and attributes for every shot costs about a millisecond of HDF5
library work per shot, most of it cold-cache work after the idle time of an acquisition, on
the runner's critical path. An uncompressed record instead keeps its shots in *blocks* of
slots allocated ahead::

    /slots/<block>/codes    int8 / int16 / uint8 / uint16 dataset (slots, channels, length):
                            slot s, row r, the first ``points`` (header) codes = the codes
                            of channel r of the shot in slot s (zero codes after them),
                            exactly as captured (a narrower signed channel is widened to the
                            block's type, and codes of the other byte order turned, and both
                            given back as captured on reading: the header keeps each type)
    /slots/<block>/header   uint8 dataset (slots, width): slot s = the shot's header, UTF-8
                            canonical JSON ended by a NUL byte; zero bytes = an empty slot

Both are contiguous datasets whose file space HDF5 allocates when the block is created
(allocation time *early*, fill time *never*), so the file offset of every slot is fixed. A
shot is two positional writes into that space at those offsets, codes first, header last:
no HDF5 object is created or changed, HDF5's metadata stays as the block's creation flushed
it, and any HDF5 reader still sees every slot through the two datasets. The header is::

    {"key": ..., "seq": n, "t_start_s": ..., "dt_s": ..., "points": <codes per channel>,
     "channels": [{"name": ..., "dtype": "|i1", "gain": ..., "offset": ...,
                   "code_min": ..., "code_max": ...}, ...],      (row order)
     "probes": {"<channel>": {"scale": ..., "deskew_s": ...}},
     "attrs": {...}, "content_sha256": "<hex>"}

``seq`` numbers the shots in the order written; a key written again (``replace``) is the
slot with the highest ``seq``. ``content_sha256`` is :func:`~benchrun.store.digests.shot_digest`
over the content, the same as in the group layouts.

Crash safety: a slot's header is written after its codes, so a ``kill -9`` leaves either a
complete slot or an empty (or partly written, unreadable) header, which is ignored. A power
cut can also lose codes whose header reached the disk; only the shot written after the last
completed sync can be affected (the record syncs every shot before the next one is written
in durability ``"power-loss"``), so on opening for writing (a resumed run), the newest
slot's digest is checked and a slot that fails it is cleared: its shot is fired again. Read
only, such a slot is listed and reported as damaged (what it is: its content was lost).
Blocks are created as every shot group is (:mod:`benchrun.store.raw`, "Crash safety"):
unlinked, flushed, then linked and flushed again.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
from collections.abc import Iterator, Mapping, MutableMapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import h5py
import numpy as np

from benchrun.errors import StoreError
from benchrun.store.canonical import canonical_json, with_attrs_json
from benchrun.store.digests import shot_digest
from benchrun.store.h5low import _LCPL_ASCII
from benchrun.store.raw_read import RawShot, make_shot

if TYPE_CHECKING:
    from benchrun.store.raw import ChannelLike, ProbeLike

log = logging.getLogger("benchrun.store")

#: Group holding the blocks of slots.
SLOTS_GROUP = "slots"
#: Smallest header width, bytes (a shot's header is about 1.5 kB; a wider one gets a block
#: of its own with room for twice its size).
MIN_HEADER_BYTES = 4096
#: Slots of the first block of a shape; each further block of that shape has twice as many,
#: up to :data:`MAX_BLOCK_SLOTS`.
FIRST_BLOCK_SLOTS = 8
MAX_BLOCK_SLOTS = 64
#: A new block's slots are longer than the shot that made it by 1/this (the record length
#: of a test point changes a little with a corrected first pulse); shots down to 3/4 of the
#: slot length share the block.
SLOT_LENGTH_MARGIN = 16
#: What the ``/slots`` group holds, stored as its ``description`` attribute for readers
#: with nothing but an HDF5 tool.
SLOTS_DESCRIPTION = (
    "Shots of this benchrun raw record, in blocks <block>/codes (slot, channel row, point) "
    "and <block>/header (slot, byte). A slot's header is UTF-8 JSON up to its first NUL "
    "byte (an empty slot starts with NUL): key, seq (write order; the highest seq of a key "
    "counts), t_start_s, dt_s, points (codes per channel: the first points of each row), "
    "channels (row order: name, dtype as captured, gain, offset, code_min, code_max), probes "
    "(scale, deskew_s), attrs, content_sha256. Measured quantity (V or A) = (codes * gain + "
    "offset) * probe scale.")
#: Shot keys and channel names: letters, digits, ``_ . -`` (ASCII: HDF5 link names too).
KEY_RE = re.compile(r"^[A-Za-z0-9_.%\-]+$")
#: Code types a block can hold (little-endian, as the file stores them).
_SIGNED = (np.dtype("i1"), np.dtype("<i2"))
_BLOCK_TYPES = (*_SIGNED, np.dtype("u1"), np.dtype("<u2"))


def checked_codes(key: str, name: str, channel: ChannelLike) -> np.ndarray:
    """The channel's codes as a contiguous 1-D int8/int16/uint8/uint16 array; StoreError
    for a bad channel name or codes of another kind."""
    if not KEY_RE.match(name):
        raise StoreError(f"shot {key}: invalid channel name {name!r}")
    codes = np.asarray(channel.codes)
    if codes.ndim != 1 or codes.dtype.kind not in "iu" or codes.dtype.itemsize > 2:
        raise StoreError(
            f"shot {key}: channel {name!r} codes must be a 1-D int8/int16 array, "
            f"got {codes.dtype} with shape {codes.shape}"
        )
    return np.ascontiguousarray(codes)


def scaling_of(channel: ChannelLike) -> dict[str, float | int]:
    """A channel's scaling as stored: ``gain``, ``offset``, ``code_min``, ``code_max``."""
    return {"gain": float(channel.gain), "offset": float(channel.offset),
            "code_min": int(channel.code_min), "code_max": int(channel.code_max)}


def check_timing(key: str, t_start: float, dt: float) -> None:
    """StoreError unless ``t_start`` is finite and ``dt`` finite and positive."""
    if not (np.isfinite(t_start) and np.isfinite(dt) and dt > 0):
        raise StoreError(f"shot {key}: t_start must be finite and dt positive")


def block_dtype(dtypes: list[np.dtype]) -> np.dtype | None:
    """The code type of a block for channels of ``dtypes`` (None: they need a shot group):
    one type, or signed 8/16-bit codes together in the wider one."""
    kinds = {np.dtype(d).newbyteorder("<") for d in dtypes}
    if len(kinds) == 1 and next(iter(kinds)) in _BLOCK_TYPES:
        return next(iter(kinds))
    if kinds <= set(_SIGNED):
        return np.dtype("<i2")
    return None


@dataclass
class _Block:
    """One block of slots and where its slots lie in the file."""

    name: str
    n_slots: int
    n_channels: int
    length: int
    dtype: np.dtype
    width: int
    codes_offset: int | None
    header_offset: int | None
    #: slots in use (filled in order)
    used: int = 0
    #: position in :attr:`SlotStore.blocks`
    number: int = -1

    @property
    def packed(self) -> bool:
        """A block a compaction wrote (chunked and compressed, :mod:`.compact`): read
        through HDF5, never written to."""
        return self.codes_offset is None or self.header_offset is None

    @property
    def row_bytes(self) -> int:
        return self.n_channels * self.length * self.dtype.itemsize

    def holds(self, n_channels: int, length: int, dtype: np.dtype) -> bool:
        """Whether shots of this shape go to this block (full or not): the same channels
        and code type, and a length between 3/4 of the slot length and the slot length."""
        return (self.n_channels == n_channels and self.dtype == dtype
                and 4 * length >= 3 * self.length and length <= self.length)

    def fits(self, n_channels: int, length: int, dtype: np.dtype, header_bytes: int) -> bool:
        return (not self.packed and self.used < self.n_slots
                and self.holds(n_channels, length, dtype) and header_bytes <= self.width)


def _key_hash(key: str) -> int:
    """64-bit hash of a shot key (BLAKE2b, 8 bytes; the same in every process)."""
    return int.from_bytes(hashlib.blake2b(key.encode(), digest_size=8).digest(), "little")


class SlotIndex(MutableMapping):
    """Key → ``(block, slot, seq)`` of the newest slot of every key, in about 16 bytes a shot.

    A dict of the keys themselves held about 180 bytes a shot (the key string, a tuple, its
    integers and the dict entry), which grew a long run's memory shot by shot. This index keeps
    only a 64-bit hash of each key and the slot's position (block number, slot) in two sorted
    numpy arrays, plus the last :data:`MERGE_AT` keys in a small dict merged into the arrays
    when it fills. The key itself stays where it already is, in the slot's header on disk: a
    hash that matches is confirmed by reading that header (so two keys of one hash are still
    told apart), and ``seq`` is read from it as well. A hash that matches nothing (a new key:
    the duplicate check of every write) costs no read.
    """

    #: keys kept in the dict before they are merged into the sorted arrays
    MERGE_AT = 512
    #: entries the arrays are reserved for at first (1 MiB of address space for both; pages
    #: are committed only as entries are written, so memory grows by 16 bytes a shot)
    RESERVE = 65536

    def __init__(self, store: SlotStore) -> None:
        self._store = store
        #: sorted hashes and their positions (block number << 32 | slot; -1 for a removed
        #: entry) in the first ``_n`` elements of buffers reserved ahead (:meth:`_reserve`)
        self._hashes = np.empty(0, dtype=np.uint64)
        self._positions = np.empty(0, dtype=np.int64)
        self._n = 0
        self._removed = 0
        self._recent: dict[int, list[int]] = {}
        self._recent_count = 0
        self._count = 0

    @staticmethod
    def _encode(block: _Block, slot: int) -> int:
        return (block.number << 32) | int(slot)

    def _header_at(self, position: int) -> tuple[_Block, int, dict[str, Any] | None]:
        store = self._store
        block, slot = store.blocks[position >> 32], position & 0xFFFFFFFF
        return block, slot, _parse_header(store._read(block, "header", slot))

    def _find(self, key: str) -> tuple[int, int, tuple[_Block, int, int]] | None:
        """(where: -1 the dict, else the array index; list index in the dict; the entry)."""
        h = _key_hash(key)
        candidates: list[tuple[int, int, int]] = []
        if self._n:
            hashes = self._hashes[:self._n]
            lo = int(np.searchsorted(hashes, np.uint64(h), side="left"))
            hi = int(np.searchsorted(hashes, np.uint64(h), side="right"))
            candidates += [(i, 0, int(self._positions[i])) for i in range(lo, hi)
                           if self._positions[i] >= 0]
        candidates += [(-1, j, p) for j, p in enumerate(self._recent.get(h, ()))]
        for where, j, position in candidates:
            block, slot, header = self._header_at(position)
            if header is not None and header["key"] == key:
                return where, j, (block, slot, int(header["seq"]))
        return None

    def __getitem__(self, key: str) -> tuple[_Block, int, int]:
        found = self._find(key)
        if found is None:
            raise KeyError(key)
        return found[2]

    def __contains__(self, key: object) -> bool:
        return isinstance(key, str) and self._find(key) is not None

    def __setitem__(self, key: str, value: tuple[_Block, int, int]) -> None:
        """Point ``key`` at ``(block, slot, seq)``; the slot's header must already name it."""
        block, slot, _ = value
        position = self._encode(block, slot)
        found = self._find(key)
        if found is not None:
            where, j, _entry = found
            if where < 0:
                self._recent[_key_hash(key)][j] = position
            else:
                self._positions[where] = position
            return
        self._recent.setdefault(_key_hash(key), []).append(position)
        self._recent_count += 1
        self._count += 1
        if self._recent_count >= self.MERGE_AT:
            self._merge()

    def __delitem__(self, key: str) -> None:
        found = self._find(key)
        if found is None:
            raise KeyError(key)
        where, j, _entry = found
        if where < 0:
            h = _key_hash(key)
            del self._recent[h][j]
            if not self._recent[h]:
                del self._recent[h]
            self._recent_count -= 1
        else:
            self._positions[where] = -1
            self._removed += 1
        self._count -= 1

    def _reserve(self, n: int) -> None:
        """Make room for ``n`` entries in the arrays, keeping the first ``_n``."""
        if n <= self._hashes.size:
            return
        size = max(n, self.RESERVE, 2 * self._hashes.size)
        hashes, positions = np.empty(size, np.uint64), np.empty(size, np.int64)
        hashes[:self._n], positions[:self._n] = self._hashes[:self._n], self._positions[:self._n]
        self._hashes, self._positions = hashes, positions

    def _merge(self) -> None:
        """Move the dict's entries into the sorted arrays, in place.

        The arrays are not rebuilt: each old entry moves right by the number of new entries
        that sort before it, one slice per new entry, from the back (a rebuild allocated
        several arrays of the whole index at every merge, a little larger each time, which
        left the C heap fragmented and a long run's memory growing by steps).
        """
        if self._removed > self._n // 4:
            self._compact()
        new_h = np.fromiter((h for h, ps in self._recent.items() for _ in ps), np.uint64)
        new_p = np.fromiter((p for ps in self._recent.values() for p in ps), np.int64)
        order = np.argsort(new_h, kind="stable")
        new_h, new_p = new_h[order], new_p[order]
        n, m = self._n, new_h.size
        self._reserve(n + m)
        hashes, positions = self._hashes, self._positions
        # old entries before which new entry j goes (equal hashes: the old one first)
        cut = np.searchsorted(hashes[:n], new_h, side="right")
        end = n
        for j in range(m - 1, -1, -1):
            start = int(cut[j])
            if end > start:  # old entries [start, end) move right by j + 1
                hashes[start + j + 1:end + j + 1] = hashes[start:end]
                positions[start + j + 1:end + j + 1] = positions[start:end]
            hashes[start + j], positions[start + j] = new_h[j], new_p[j]
            end = start
        self._n = n + m
        self._recent, self._recent_count = {}, 0

    def _compact(self) -> None:
        """Drop removed entries from the arrays (in place)."""
        keep = np.flatnonzero(self._positions[:self._n] >= 0)
        k = keep.size
        self._hashes[:k] = self._hashes[keep]
        self._positions[:k] = self._positions[keep]
        self._n, self._removed = k, 0

    def __len__(self) -> int:
        return self._count

    def _live(self) -> Iterator[tuple[str, tuple[_Block, int, int]]]:
        """Every entry, read from the slot headers (one read per block), in slot order."""
        live = {int(p) for p in self._positions[:self._n] if p >= 0}
        live.update(p for ps in self._recent.values() for p in ps)
        store = self._store
        for block in store.blocks:
            mine = [slot for slot in range(block.used) if self._encode(block, slot) in live]
            if not mine:
                continue
            rows = store._read(block, "header", 0, block.used)
            for slot in mine:
                header = _parse_header(rows[slot * block.width:(slot + 1) * block.width])
                if header is not None:
                    yield header["key"], (block, slot, int(header["seq"]))

    def __iter__(self) -> Iterator[str]:
        return (key for key, _ in self._live())

    def items(self) -> list[tuple[str, tuple[_Block, int, int]]]:  # type: ignore[override]
        return list(self._live())

    def load(self, entries: Mapping[str, tuple[_Block, int, int]]) -> None:
        """Replace the content by ``entries`` (opening a record: read from every header)."""
        hashes = np.array([_key_hash(k) for k in entries], dtype=np.uint64)
        positions = np.array([self._encode(b, s) for b, s, _ in entries.values()],
                             dtype=np.int64)
        order = np.argsort(hashes, kind="stable")
        self._n = self._removed = 0
        self._reserve(order.size)
        self._hashes[:order.size], self._positions[:order.size] = hashes[order], positions[order]
        self._n = order.size
        self._recent, self._recent_count, self._count = {}, 0, len(entries)


class SlotStore:
    """The slots of one open raw record: index, reading and writing.

    Parameters
    ----------
    f
        The open HDF5 file (sec2 driver: its file descriptor is used for the slot I/O).
    path
        The file's path, for messages.
    writable
        Whether blocks may be created and slots written (and a damaged newest slot cleared).

    Raises
    ------
    StoreError
        A block whose datasets are not contiguous and allocated (the file was rewritten by a
        tool that changed the layout: read it with a copy of the original instead).
    """

    def __init__(self, f: h5py.File, path: Path, *, writable: bool) -> None:
        self._f = f
        self.path = path
        self.writable = writable
        self.blocks: list[_Block] = []
        #: key → (block, slot, seq) of the newest slot of every key (:class:`SlotIndex`)
        self.index = SlotIndex(self)
        self._next_seq = 0
        fd = f.id.get_vfd_handle()  # the file's descriptor while it is open (sec2 driver)
        #: positional I/O on HDF5's own descriptor (POSIX); elsewhere slots are read through
        #: HDF5 and shots are written as shot groups
        self.direct = isinstance(fd, int) and fd >= 0 and hasattr(os, "pwrite")
        self._fd = fd if self.direct else -1
        self._load()

    # --- file access ------------------------------------------------------------------------
    def _read(self, block: _Block, part: str, first: int, count: int = 1) -> bytes:
        """The bytes of slots ``first`` to ``first + count - 1`` of a block's ``part``
        (``"codes"`` or ``"header"``)."""
        if not self.direct or block.packed:
            rows = self._f[SLOTS_GROUP][block.name][part][first:first + count]
            return np.ascontiguousarray(rows).tobytes()
        size = block.row_bytes if part == "codes" else block.width
        base = block.codes_offset if part == "codes" else block.header_offset
        return self._pread(base + first * size, count * size)

    def _pread(self, offset: int, nbytes: int) -> bytes:
        """Bytes at ``offset``; space HDF5 allocated beyond the end of the file reads as
        zeros (it was never written)."""
        fd, parts, got = self._fd, [], 0
        while got < nbytes:
            part = os.pread(fd, nbytes - got, offset + got)
            if not part:
                break
            parts.append(part)
            got += len(part)
        data = b"".join(parts)
        return data + bytes(nbytes - len(data))

    def _pwrite(self, offset: int, data: bytes | memoryview) -> None:
        if not self.direct:
            raise StoreError(f"raw record {self.path}: slots are written on POSIX systems only")
        fd, view = self._fd, memoryview(data).cast("B")
        try:
            while view:
                written = os.pwrite(fd, view, offset)
                view, offset = view[written:], offset + written
        except OSError as exc:
            raise StoreError(f"cannot write to raw record {self.path}: {exc}") from exc

    def _clear(self, block: _Block, slot: int) -> None:
        """Empty a slot: the first byte of its header zero (through HDF5 where positional
        I/O is missing, then flushed)."""
        if self.direct and block.header_offset is not None:
            self._pwrite(block.header_offset + slot * block.width, b"\0")
            return
        try:
            self._f[SLOTS_GROUP][block.name]["header"][slot, 0] = 0
            self._f.flush()
        except (OSError, ValueError, KeyError) as exc:
            raise StoreError(f"cannot write to raw record {self.path}: {exc}") from exc

    # --- loading ----------------------------------------------------------------------------
    def _load(self) -> None:
        group = self._f.get(SLOTS_GROUP)
        if group is None:
            return
        newest: tuple[int, str] | None = None
        found: dict[str, tuple[_Block, int, int]] = {}  # only while the record is opened
        for name in sorted(group):
            block = self._open_block(name, group[name])
            block.number = len(self.blocks)
            self.blocks.append(block)
            raw = np.frombuffer(self._read(block, "header", 0, block.n_slots),
                                dtype=np.uint8).reshape(block.n_slots, block.width)
            filled = np.flatnonzero(raw[:, 0])
            block.used = int(filled[-1]) + 1 if filled.size else 0
            for slot in filled:
                header = _parse_header(raw[slot].tobytes())
                if header is None:
                    continue  # a header a crash left half-written: an empty slot
                key, seq = header["key"], int(header["seq"])
                self._next_seq = max(self._next_seq, seq + 1)
                known = found.get(key)
                if known is None or known[2] < seq:
                    found[key] = (block, int(slot), seq)
                if newest is None or seq > newest[0]:
                    newest = (seq, key)
        self.index.load(found)
        if self.writable and newest is not None and found[newest[1]][2] == newest[0]:
            del found
            self._check_newest(newest[1])

    def _open_block(self, name: str, group: h5py.Group) -> _Block:
        try:
            codes, header = group["codes"], group["header"]
            codes_offset, header_offset = codes.id.get_offset(), header.id.get_offset()
            n_slots, n_channels, length = codes.shape
            width = header.shape[1]
            dtype = codes.dtype.newbyteorder("<")
        except (KeyError, ValueError, TypeError, OSError) as exc:
            raise StoreError(f"raw record {self.path}: slot block {name} cannot be read "
                             f"({exc})") from exc
        contiguous = codes_offset is not None and header_offset is not None
        packed = codes.chunks is not None and header.chunks is not None
        if not (contiguous or packed) or dtype not in _BLOCK_TYPES or \
                header.shape[0] != n_slots or codes.dtype != dtype:
            raise StoreError(f"raw record {self.path}: slot block {name} is not in the layout "
                             "benchrun writes (contiguous and allocated, or chunked by "
                             "compaction; little-endian)")
        if not contiguous:
            codes_offset = header_offset = None
        return _Block(name, n_slots, n_channels, length, dtype, width, codes_offset,
                      header_offset)

    def _check_newest(self, key: str) -> None:
        """The newest slot is the only one a power cut can have left with a header but not
        its codes: keep it only when its content matches its digest (a writable record)."""
        try:
            self.read(key, verify=True)
            return
        except StoreError:
            pass
        block, slot, _ = self.index.pop(key)
        log.warning("raw record %s: the newest shot %s does not match its SHA-256 (its data "
                    "did not reach the disk before a power cut?): its slot is cleared and the "
                    "shot counts as not written", self.path, key)
        self._clear(block, slot)
        # an older slot of the same key (written before a replace) is the key's shot again
        older = [(seq, b, s) for b in self.blocks for s, seq, k in self._headers_of(b)
                 if k == key and (b is not block or s != slot)]
        if older:
            seq, b, s = max(older, key=lambda item: item[0])
            self.index[key] = (b, s, seq)

    def _headers_of(self, block: _Block) -> list[tuple[int, int, str]]:
        out = []
        for slot in range(block.used):
            header = _parse_header(self._read(block, "header", slot))
            if header is not None:
                out.append((slot, int(header["seq"]), header["key"]))
        return out

    # --- reading ----------------------------------------------------------------------------
    def __contains__(self, key: str) -> bool:
        return key in self.index

    def keys(self) -> list[str]:
        return list(self.index)

    def read(self, key: str, *, verify: bool = True) -> RawShot:
        """The shot in the newest slot of ``key`` (KeyError when there is none).

        Raises
        ------
        StoreError
            Unreadable header or data, or (``verify``) content that differs from what was
            written.
        """
        block, slot, _ = self.index[key]
        header = _parse_header(self._read(block, "header", slot))
        try:
            if header is None or header["key"] != key:
                raise ValueError("the slot's header is unreadable or names another shot")
            rows = np.frombuffer(
                self._read(block, "codes", slot),
                dtype=block.dtype).reshape(block.n_channels, block.length)
            points = int(header["points"])
            if not 0 < points <= block.length:
                raise ValueError(f"{points} points described, slots hold {block.length}")
            described = header["channels"]
            if len(described) != block.n_channels:
                raise ValueError(f"{len(described)} channels described, {block.n_channels} "
                                 "stored")
            channels = {
                ch["name"]: (rows[r, :points].astype(np.dtype(ch["dtype"]), copy=True), ch)
                for r, ch in enumerate(described)
            }
            return make_shot(key, self.path, float(header["t_start_s"]),
                             float(header["dt_s"]), channels, header["probes"],
                             header["attrs"], str(header["content_sha256"]), verify=verify)
        except (KeyError, ValueError, TypeError) as exc:
            raise StoreError(f"shot {key} in {self.path} cannot be read: {exc}") from exc

    # --- writing ----------------------------------------------------------------------------
    def drop(self, key: str) -> None:
        """Clear every slot of ``key`` (a shot group replaces it)."""
        self.index.pop(key, None)
        for block in self.blocks:
            for slot, _, k in self._headers_of(block):
                if k == key:
                    self._clear(block, slot)

    def write(self, key: str, t_start: float, dt: float, channels: Mapping[str, ChannelLike],
              probes: Mapping[str, ProbeLike], attrs: dict[str, Any], dtype: np.dtype) -> None:
        """Write one shot (as :meth:`RawRecord.append_shot` takes it) into the next free slot
        of a block of its shape, created when there is none: codes first, header last.
        ``channels`` share one length; ``dtype`` from :func:`block_dtype`. A slot longer than
        the shot is filled up with zero codes (not part of the shot: its header gives its
        ``points``).

        Raises
        ------
        StoreError
            Bad timing, channel name or codes; a write failure.
        """
        check_timing(key, t_start, dt)
        stored = {name: (checked_codes(key, name, ch), scaling_of(ch))
                  for name, ch in channels.items()}
        attrs_json = canonical_json(attrs)
        seq = self._next_seq
        length = next(iter(stored.values()))[0].size
        header = with_attrs_json(canonical_json({
            "key": key, "seq": seq, "t_start_s": float(t_start), "dt_s": float(dt),
            "points": length,
            "channels": [{"name": name, "dtype": codes.dtype.str, **scaling}
                         for name, (codes, scaling) in stored.items()],
            "probes": {n: {"scale": float(p.scale), "deskew_s": float(p.deskew_s)}
                       for n, p in probes.items()},
            "content_sha256": shot_digest(t_start, dt, channels, probes, attrs,
                                          attrs_json=attrs_json),
        }), attrs_json).encode() + b"\0"
        block = next((b for b in self.blocks
                      if b.fits(len(stored), length, dtype, len(header))), None)
        if block is None:
            block = self._new_block(len(stored), length, dtype, len(header))
        rows = np.zeros((len(stored), block.length), dtype=dtype)
        for r, (codes, _) in enumerate(stored.values()):
            rows[r, :length] = codes
        slot = block.used
        self._pwrite(block.codes_offset + slot * block.row_bytes, rows.data)
        self._pwrite(block.header_offset + slot * block.width, header)  # the shot is now in
        block.used += 1
        self.index[key] = (block, slot, seq)
        self._next_seq = seq + 1

    def _new_block(self, n_channels: int, length: int, dtype: np.dtype,
                   header_bytes: int) -> _Block:
        same = [b for b in self.blocks if b.holds(n_channels, length, dtype)]
        n_slots = min(MAX_BLOCK_SLOTS, 2 * same[-1].n_slots) if same else FIRST_BLOCK_SLOTS
        if same:  # slots as long as the block's it follows
            length = same[-1].length
        else:  # room for the record length to grow by a trim correction
            length += -(-length // SLOT_LENGTH_MARGIN)
        width = max(MIN_HEADER_BYTES, 1 << (2 * header_bytes - 1).bit_length())
        f = self._f
        name = f"b{len(self.blocks):06d}"
        try:
            dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
            dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)  # the file space exists now
            dcpl.set_fill_time(h5py.h5d.FILL_TIME_NEVER)  # and HDF5 never writes it
            dcpl.set_obj_track_times(False)
            group = h5py.h5g.create(f.id, None)  # unlinked until written and flushed
            for ds_name, htype, shape in (
                    (b"codes", h5py.h5t.py_create(dtype), (n_slots, n_channels, length)),
                    (b"header", h5py.h5t.py_create(np.dtype("u1")), (n_slots, width))):
                ds = h5py.h5d.create(f.id, None, htype, h5py.h5s.create_simple(shape),
                                     dcpl=dcpl)
                h5py.h5o.link(ds, group, ds_name, lcpl=_LCPL_ASCII)
            f.flush()  # the block's objects reach the file before the link to them
            slots = f.get(SLOTS_GROUP)
            if slots is None:
                slots = f.create_group(SLOTS_GROUP)
                slots.attrs["description"] = SLOTS_DESCRIPTION
            h5py.h5o.link(group, slots.id, name.encode(), lcpl=_LCPL_ASCII)
            f.flush()
            block = self._open_block(name, slots[name])
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise StoreError(f"cannot add a block of slots to {self.path}: {exc}") from exc
        block.number = len(self.blocks)
        self.blocks.append(block)
        return block


def _parse_header(row: bytes) -> dict[str, Any] | None:
    """A slot's header, or None for an empty or unreadable one."""
    end = row.find(b"\0")
    if end <= 0:
        return None
    try:
        header = json.loads(row[:end].decode())
    except (UnicodeDecodeError, ValueError):
        return None
    if not isinstance(header, dict) or not isinstance(header.get("key"), str) or \
            not isinstance(header.get("seq"), int):
        return None
    return header
