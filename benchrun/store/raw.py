"""The raw record: every shot's ADC codes, scaling and settings in one HDF5 file per run.

Layout (HDF5, readable by any HDF5 tool; format_version 3)::

    /                       attrs: format, format_version, software_version, created,
                                   run_id and any other run-level attribute (JSON strings
                                   for non-scalar values, see :meth:`RawRecord.run_attrs`)
    /slots/<block>/codes    shots of an uncompressed record: preallocated slots of ADC codes
    /slots/<block>/header   and one JSON header per slot (format 3, :mod:`.raw_slots`)
    /shots/<key>/           a shot group (format 2): attrs t_start_s, dt_s (float64,
                                   seconds), channels_json, probes_json, attrs_json (JSON
                                   text), content_sha256 (hex), complete (bool)
    /shots/<key>/<channel>  int8 / int16 dataset: ADC codes exactly as captured
    /shots/<key>/           a slot shot's *view* (no ``complete`` mark; attribute slot_view):
                                   its channels as virtual datasets of the slot's codes,
                                   with scale/offset/units, its conditions as attributes
    /shot_table             compound dataset: one row per complete shot (key, serial,
                                   point, repeat, time, group, content_sha256 ...)

The views and the table (:mod:`benchrun.store.raw_views`) are built when a writable record
is closed (the end of a run) and when a record with slots is opened for writing (a resumed
run), so ``shots/<key>`` names a group of every complete shot in any HDF5 tool; benchrun
itself reads shots from the slots and groups only, and checks their digests there.
A finished record can be rewritten compressed (:mod:`benchrun.store.compact`: packed blocks).

Where a shot goes: :meth:`RawRecord.append_shot` writes a shot of an uncompressed record
(``compression=None``, what the runner writes) into a slot when its channels share one
length and a code type a block can hold (:func:`~benchrun.store.raw_slots.block_dtype`):
two positional writes, no HDF5 object created per shot. A compressed record (gzip, chunked
datasets), a shot whose channels differ in length, and a shot written channel by channel
(:meth:`RawRecord.begin_shot`) get a shot group. :meth:`RawRecord.keys` and
:meth:`RawRecord.read_shot` see both the same way; a key is in one place only.

``channels_json`` maps each channel (dataset) name of the shot to its scaling,
``{"<channel>": {"gain": ..., "offset": ..., "code_min": ..., "code_max": ...}}``;
``probes_json`` maps it to ``{"scale": ..., "deskew_s": ...}`` (a slot header holds the same
fields); floats in the JSON read back bit-exactly (:mod:`benchrun.store.canonical`). Channel
volts are ``codes * gain + offset`` (the scope's own scaling recipe), the physical quantity
is channel volts times the probe ``scale``; see :mod:`benchrun.analysis.pipeline`. Codes are never
rescaled or resampled before they are stored, so re-analysis of the record reproduces the
runner's numbers exactly.

Older formats, still read: format 1 kept the scaling as four attributes of each channel
dataset (``gain``, ``offset`` float64; ``code_min``, ``code_max`` int64) and had no
``channels_json``; format 2 is the shot group above, and had no slots. A shot's layout is
told by where it is and by its own attributes, so :meth:`RawRecord.read_shot` reads all of
them, also in one file: appending to an older record writes current shots and, with the
first of them, raises its ``format_version`` to 3. A record of a newer format than this
module writes is refused. ``content_sha256`` (:func:`shot_digest`) is computed from the
shot's content, not from its layout, so it is the same in every format.

Crash safety
------------
A slot: codes first, header last (:mod:`benchrun.store.raw_slots`). A shot group: group →
datasets → attributes → ``complete = True`` last, then the file is flushed (``H5Fflush``:
everything handed to the operating system) before :meth:`RawRecord.append_shot` returns.
The group is created unlinked and flushed before it is linked under ``/shots``: HDF5 may
hand a changed link table to the operating system before the header of the object it points
to, and a ``kill -9`` in between would leave a link that cannot be opened, deleted or
replaced. A ``kill -9`` at any moment therefore loses at most the shot in flight: a group
left without the ``complete`` mark (or one that cannot be opened) is invisible to
:meth:`RawRecord.keys` and is deleted, where HDF5 can, when the file is next opened for
writing. The file uses the earliest HDF5 file format (superblock version 0), which has no
"file open for writing" status flag, so it reopens after a crash without ``h5clear``.

Durability (``durability=``):

``"power-loss"`` (default)
    every flush is followed by ``fsync``: a returned shot survives a power cut or an
    operating-system crash too (as far as the disk honours the sync).
``"process"``
    flush only (data handed to the operating system, which writes it back on its own): a
    returned shot survives the *process* being killed (``kill -9``, a crash of Python), not a
    power cut. Cheaper per shot; choose it only for a bench on a UPS or where a lost shot is
    simply fired again.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import logging
import os
from collections.abc import Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol

import h5py
import numpy as np

from benchrun import __version__
from benchrun.errors import StoreError
from benchrun.store.canonical import canonical_json
from benchrun.store.digests import file_sha256 as file_sha256  # re-exported
from benchrun.store.digests import shot_digest as shot_digest  # re-exported
from benchrun.store.h5low import (  # noqa: F401 (names the write path and tests reach here)
    _CHUNK_BYTES,
    _LCPL_ASCII,
    _SLOT_METADATA_CACHE_BYTES,
    _WRITE_METADATA_CACHE_BYTES,
    _code_type,
    _codes_create_plist,
    _fix_metadata_cache,
    _write_new_attrs,
)
from benchrun.store.raw_read import (  # noqa: F401 (RawShot, scaling_types re-exported)
    SHOTS_GROUP,
    RawShot,
    _attr_str,
    read_shot_group,
    scaling_types,
)
from benchrun.store.raw_slots import KEY_RE as _KEY_RE
from benchrun.store.raw_slots import SlotStore, block_dtype
from benchrun.store.raw_views import describe_record, is_view

if TYPE_CHECKING:
    from benchrun.store.raw_shot import RawShotBuilder


log = logging.getLogger("benchrun.store")

#: Value of the root ``format`` attribute: identifies a benchrun raw record.
FORMAT_NAME = "benchrun-raw-record"
#: Layout version written by this module (module docstring; formats 1 and 2 are read too).
FORMAT_VERSION = 3


#: Durability: every flush is also ``fsync``-ed (survives power loss). The default.
DURABILITY_POWER_LOSS = "power-loss"
#: Durability: flushes hand the data to the operating system only (survives ``kill -9``).
DURABILITY_PROCESS = "process"
DURABILITY_MODES = (DURABILITY_POWER_LOSS, DURABILITY_PROCESS)


def check_durability(durability: str) -> str:
    """``durability`` if it is one of :data:`DURABILITY_MODES`, else StoreError."""
    if durability not in DURABILITY_MODES:
        raise StoreError(f"durability must be one of {', '.join(DURABILITY_MODES)}, "
                         f"not {durability!r}")
    return durability


def _is_complete(group: Any) -> bool:
    """True for a shot group with the ``complete`` mark. A group h5py cannot open (``None``:
    a link to an object a crash left unwritten) or whose attributes cannot be read is not."""
    if group is None:
        return False
    try:
        return bool(group.attrs.get("complete", False))
    except (OSError, KeyError, ValueError):
        return False


class ChannelLike(Protocol):
    """Anything with the fields of :class:`benchrun.analysis.pipeline.ChannelData`."""

    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


class ProbeLike(Protocol):
    """Anything with the fields of :class:`benchrun.analysis.pipeline.ProbeCalibration`."""

    scale: float
    deskew_s: float


def shot_ref(key: str) -> str:
    """The reference :meth:`RawRecord.append_shot` returns for ``key`` (``"shots/<key>"``)."""
    return f"{SHOTS_GROUP}/{_key_of(key)}"


def _key_of(key_or_ref: str) -> str:
    key = key_or_ref.removeprefix("/").removeprefix(f"{SHOTS_GROUP}/")
    if not _KEY_RE.match(key):
        raise StoreError(
            f"invalid shot key {key_or_ref!r}: use letters, digits, '_', '-', '.', '%' only"
        )
    return key


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems cannot sync a directory; the file itself is synced
    finally:
        os.close(fd)


class RawRecord:
    """The raw HDF5 record of one run, opened as a context manager.

    Parameters
    ----------
    path
        File path (conventionally ``<run_dir>/raw.h5``).
    mode
        ``"r"`` read only; ``"a"`` read/write, create if missing (default); ``"w"`` create,
        truncating an existing file. Opening for writing removes shots left incomplete by a
        crash.
    compression
        ``"gzip"`` (level 1 with byte shuffle: standard HDF5 filters any HDF5 reader has, about
        3x smaller for 8-bit captures) or ``None``. Only affects newly written shots.
    durability
        ``"power-loss"`` (default: every flush is ``fsync``-ed) or ``"process"`` (flushes
        reach the operating system only: safe against ``kill -9``, not against power loss);
        see the module docstring.

    Raises
    ------
    StoreError
        The file is missing (mode ``"r"``), not an HDF5 file, damaged, locked by another
        writer, or a different kind of HDF5 file.

    Examples
    --------
    >>> with RawRecord(run_dir / "raw.h5") as raw:            # doctest: +SKIP
    ...     ref = raw.append_shot(raw.next_key(), t0, dt, channels, probes, {"serial": "S01"})
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        mode: str = "a",
        *,
        compression: str | None = "gzip",
        durability: str = DURABILITY_POWER_LOSS,
    ) -> None:
        if mode not in ("r", "a", "w"):
            raise StoreError(f"raw record mode must be 'r', 'a' or 'w', not {mode!r}")
        if compression not in ("gzip", None):
            raise StoreError(f"compression must be 'gzip' or None, not {compression!r}")
        self.path = Path(path)
        self.mode = mode
        self.compression = compression
        self.durability = check_durability(durability)
        self._file: h5py.File | None = None
        self._syncer: ThreadPoolExecutor | None = None  # background fsync (see append_shot)
        self._pending_sync: Future[None] | None = None
        self._shots_group: h5py.Group | None = None
        self._next_number: int | None = None  # cache of next_key(); None = not yet scanned
        # per (length, itemsize): dataset creation properties and data space of the codes,
        # made once per record instead of once per channel and shot
        self._codes_layout: dict[tuple[int, int], tuple[Any, Any]] = {}
        self._layout_marked = False  # root format_version says which layouts may be present
        self._slot_store: SlotStore | None = None
        self._wrote = False  # a shot was written since opening (close describes the record)
        self._open()

    # -- opening and closing -------------------------------------------------------------
    def _open(self) -> None:
        path = self.path
        if self.mode == "r" and not path.exists():
            raise StoreError(f"raw record {path} does not exist")
        if self.mode != "r" and not path.parent.is_dir():
            raise StoreError(f"cannot create raw record {path}: folder {path.parent} is missing")
        # A file of zero bytes holds nothing: a crash before the first flush of a new record.
        fresh = self.mode == "w" or not path.exists() or path.stat().st_size == 0
        h5mode = "r" if self.mode == "r" else ("w" if fresh else "r+")
        try:
            # best-effort locking: a second writer is refused, yet file systems without
            # lock support (some network shares) still work
            self._file = h5py.File(path, h5mode, libver="earliest", locking="best-effort")
        except (OSError, ValueError) as exc:
            raise StoreError(
                f"raw record {path} cannot be opened ({exc}); the file is not an HDF5 file, "
                "is damaged (for example half-written when the machine lost power), or is "
                "open for writing in another process"
            ) from exc
        f = self._file
        if self.mode != "r":
            _fix_metadata_cache(f)
        if fresh:
            f.attrs["format"] = FORMAT_NAME
            f.attrs["format_version"] = FORMAT_VERSION
            f.attrs["software_version"] = __version__
            f.attrs["created"] = _dt.datetime.now(_dt.UTC).isoformat()
            f.create_group(SHOTS_GROUP)
            self._layout_marked = True
            self.flush()
            _fsync_dir(path.parent)  # the new file's directory entry is durable too
        elif _attr_str(f.attrs.get("format", "")) != FORMAT_NAME or SHOTS_GROUP not in f:
            self.close()
            raise StoreError(f"{path} is an HDF5 file but not a benchrun raw record")
        elif int(f.attrs.get("format_version", 1)) > FORMAT_VERSION:
            version = int(f.attrs["format_version"])
            self.close()
            raise StoreError(f"raw record {path} is in format {version}, written by a newer "
                             f"benchrun (this one reads formats 1 to {FORMAT_VERSION})")
        elif self.mode != "r":
            self._drop_incomplete()
        try:
            self._slot_store = SlotStore(f, path, writable=self.mode != "r")
        except StoreError:
            self.close()
            raise
        if self.mode != "r" and self.compression is None and self._slot_store.direct:
            _fix_metadata_cache(f, _SLOT_METADATA_CACHE_BYTES)  # shots go to slots
        if self.mode != "r" and not fresh and self._slot_store.blocks:
            self._describe_quietly()  # a record opened again (resume): views of every shot

    def _drop_incomplete(self) -> None:
        shots = self._shots
        stale = [k for k, g in shots.items() if not _is_complete(g) and not is_view(g)]
        for key in stale:
            # a link to an object that was never written cannot be deleted (HDF5 needs the
            # object's header for that): it stays, invisible like every incomplete shot
            with contextlib.suppress(KeyError, OSError, ValueError):
                del shots[key]
        if stale:
            self.flush()

    def close(self) -> None:
        """Flush and close the file (safe to call twice)."""
        if self._file is not None:
            if self.mode != "r" and self._slot_store is not None and (
                    self._wrote or self._slot_store.blocks):
                with contextlib.suppress(Exception):
                    self.wait_durable()
                self._describe_quietly()
            with contextlib.suppress(Exception):
                if self.mode != "r":
                    self.flush()
            with contextlib.suppress(Exception):
                self.wait_durable()
            self._shots_group = None
            self._slot_store = None
            self._file.close()
            self._file = None
        if self._syncer is not None:
            self._syncer.shutdown(wait=True)
            self._syncer = None

    def __enter__(self) -> RawRecord:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @property
    def _f(self) -> h5py.File:
        if self._file is None:
            raise StoreError(f"raw record {self.path} is closed")
        return self._file

    @property
    def _slots(self) -> SlotStore:
        if self._slot_store is None:
            raise StoreError(f"raw record {self.path} is closed")
        return self._slot_store

    @property
    def _shots(self) -> h5py.Group:
        group = self._shots_group
        if group is None:  # looked up once per open file, not per shot (reset by close)
            group = self._shots_group = self._f[SHOTS_GROUP]
        return group

    def flush(self, *, wait: bool = True) -> None:
        """Write everything to the operating system (``H5Fflush``) and, with durability
        ``"power-loss"``, ``fsync`` it to disk.

        With ``wait=False`` the ``fsync`` runs on a background thread (it holds no lock
        Python code needs, so the caller's work goes on meanwhile); :meth:`wait_durable`
        waits for it, and so does every later write, flush and :meth:`close`.
        """
        self.wait_durable()
        f = self._f
        try:
            f.flush()
        except (OSError, ValueError) as exc:
            raise StoreError(f"cannot flush raw record {self.path}: {exc}") from exc
        self._sync(wait=wait)

    def _sync(self, *, wait: bool) -> None:
        """``fsync`` (durability ``"power-loss"`` only; ``wait=False``: see :meth:`flush`)."""
        if self.durability != DURABILITY_POWER_LOSS:
            return
        fd = self._f.id.get_vfd_handle()
        if not (isinstance(fd, int) and fd >= 0):
            return
        if wait:
            self._fsync(fd)
            return
        if self._syncer is None:
            self._syncer = ThreadPoolExecutor(max_workers=1, thread_name_prefix="raw-fsync")
        self._pending_sync = self._syncer.submit(self._fsync, fd)

    def _fsync(self, fd: int) -> None:
        # fdatasync (POSIX): the data and the metadata needed to read it back (the file's
        # size), without the modification time: the same durability for the record, one
        # metadata write less per shot; fsync where the platform has no fdatasync
        sync = getattr(os, "fdatasync", os.fsync)
        try:
            sync(fd)
        except OSError as exc:
            raise StoreError(f"cannot sync raw record {self.path} to disk: {exc}") from exc

    def wait_durable(self) -> None:
        """Return once everything flushed so far is durable (a background ``fsync`` of
        ``append_shot(..., wait=False)`` finished). Raises StoreError when that sync
        failed."""
        pending, self._pending_sync = self._pending_sync, None
        if pending is not None:
            pending.result()

    # -- what a general HDF5 tool sees ----------------------------------------------------
    def describe(self, *, force: bool = False) -> bool:
        """Build or update the group of every slot shot under ``/shots`` (virtual datasets
        of its codes, its conditions as attributes) and the ``/shot_table`` of every shot
        (:mod:`benchrun.store.raw_views`). Done by :meth:`close` of a writable record that
        holds slots or had a shot written, and when a record with slots is opened for
        writing again; returns False when they were current.

        Raises
        ------
        StoreError
            Read-only record, or a write failure.
        """
        self._require_writable()
        self.wait_durable()
        changed = describe_record(self._f, self._slots, force=force)
        if changed:
            self._sync(wait=True)
        return changed

    def _describe_quietly(self) -> None:
        """:meth:`describe`, a failure logged (the shots themselves are stored)."""
        try:
            self.describe()
        except StoreError as exc:
            log.warning("raw record %s: the shot groups for HDF5 tools were not written "
                        "(%s); the shots are stored, opening the record for writing again "
                        "retries", self.path, exc)

    # -- run-level attributes ------------------------------------------------------------
    @property
    def run_attrs(self) -> dict[str, Any]:
        """Run-level attributes of the file root (``run_id``, ``software_version``, ...).

        Values set through :meth:`set_run_attrs` come back as given (JSON round trip).
        """
        out: dict[str, Any] = {}
        for name, value in self._f.attrs.items():
            if name.endswith("_json"):
                out[name.removesuffix("_json")] = json.loads(_attr_str(value))
            elif isinstance(value, bytes | str):
                out[name] = _attr_str(value)
            elif isinstance(value, np.generic):
                out[name] = value.item()
            else:
                out[name] = value
        return out

    def set_run_attrs(self, **attrs: Any) -> None:
        """Set run-level attributes; strings and numbers natively, other values as JSON."""
        self._require_writable()
        f = self._f
        for name, value in attrs.items():
            if isinstance(value, str | int | float | bool):
                f.attrs[name] = value
            else:
                f.attrs[f"{name}_json"] = canonical_json(value)
        self.flush()

    # -- shots ---------------------------------------------------------------------------
    def _require_writable(self) -> None:
        if self.mode == "r":
            raise StoreError(f"raw record {self.path} is open read-only")

    def keys(self) -> list[str]:
        """Keys of every complete shot, sorted."""
        slots, shots = self._slots, self._shots
        # a name of a slot shot is its view (raw_views): only the other names are opened
        in_groups = {k for k in shots if k not in slots and _is_complete(shots.get(k))}
        return sorted(in_groups.union(slots.keys()))

    def __contains__(self, key_or_ref: str) -> bool:
        key = _key_of(key_or_ref)
        return key in self._slots or _is_complete(self._shots.get(key))

    def __len__(self) -> int:
        return len(self.keys())

    def __iter__(self) -> Iterator[str]:
        return iter(self.keys())

    def next_key(self) -> str:
        """A fresh sequential key (``"000000"``, ``"000001"``, ...) after every stored one."""
        if self._next_number is None:
            numbers = [int(k) for k in (*self._shots, *self._slots.keys()) if k.isdigit()]
            self._next_number = (max(numbers) + 1) if numbers else 0
        return f"{self._next_number:06d}"

    def append_shot(
        self,
        key: str,
        t_start: float,
        dt: float,
        channels: Mapping[str, ChannelLike],
        probes: Mapping[str, ProbeLike],
        attrs: Mapping[str, Any] | None = None,
        *,
        replace: bool = False,
        wait: bool = True,
    ) -> str:
        """Store one shot and make it durable (see ``durability``) before returning.

        Parameters
        ----------
        key
            Shot key (letters, digits, ``_ - .``); see :meth:`next_key`.
        t_start, dt
            Time of the first sample (s, relative to the trigger) and sample interval (s).
        channels
            Channel name → object with ``codes`` (integer array, stored as captured),
            ``gain``, ``offset``, ``code_min``, ``code_max``.
        probes
            Channel name → object with ``scale`` and ``deskew_s``.
        attrs
            JSON-serialisable shot attributes: settings, serial, point, timestamp, instrument
            identities ... Floats round-trip exactly.
        replace
            Overwrite a complete shot stored under the same key (otherwise an error).
        wait
            True: return once the shot is durable. False: return once the shot is handed to
            the operating system (a ``kill -9`` cannot lose it) and let the ``fsync`` of
            durability ``"power-loss"`` finish on a background thread; call
            :meth:`wait_durable` before relying on the shot surviving a power loss (for
            example before recording it elsewhere).

        Returns
        -------
        str
            The reference to store in ``ShotResult.raw_ref`` (``"shots/<key>"``).

        Raises
        ------
        StoreError
            Bad key or data, key already used, read-only record, or a write failure.
        """
        if self.compression is None and self._slots.direct:
            codes = [np.asarray(ch.codes) for ch in channels.values()]
            lengths, dtype = {c.size for c in codes}, block_dtype([c.dtype for c in codes])
            if dtype is not None and len(lengths) == 1 and 0 not in lengths:
                return self._append_to_slot(key, t_start, dt, channels, probes, attrs,
                                            dtype, replace=replace, wait=wait)
        builder = self.begin_shot(key, replace=replace)
        for name, channel in channels.items():
            builder.add_channel(name, channel)
        return builder.finish(t_start, dt, probes, attrs, wait=wait)

    def _append_to_slot(self, key: str, t_start: float, dt: float,
                        channels: Mapping[str, ChannelLike], probes: Mapping[str, ProbeLike],
                        attrs: Mapping[str, Any] | None, dtype: np.dtype, *, replace: bool,
                        wait: bool) -> str:
        """:meth:`append_shot` into a slot (format 3, :mod:`benchrun.store.raw_slots`): two
        positional writes, no HDF5 call; durable as a shot group would be."""
        self._require_writable()
        self.wait_durable()  # the previous shot's background sync, if any
        key = _key_of(key)
        in_group = self._check_free(key, replace=replace)
        if not self._layout_marked:
            self._mark_layout()
        self._slots.write(key, t_start, dt, channels, probes, dict(attrs or {}), dtype)
        if in_group:  # replaced: the group version goes (after the slot is written)
            with contextlib.suppress(KeyError, OSError, ValueError):
                del self._shots[key]
            self.flush(wait=wait)
        else:
            self._sync(wait=wait)  # HDF5's own metadata did not change: nothing to flush
        self._shot_written(key)
        return shot_ref(key)

    def begin_shot(self, key: str, *, replace: bool = False) -> RawShotBuilder:
        """Start a shot written channel by channel (as a scope transfers them): returns a
        :class:`~benchrun.store.raw_shot.RawShotBuilder`; ``add_channel`` each channel, then
        ``finish`` links the shot exactly as :meth:`append_shot` does (which is this, all
        at once). Until ``finish`` the shot is invisible; one never finished leaves nothing
        visible.

        Raises
        ------
        StoreError
            Bad key, key already used (unless ``replace``), read-only record.
        """
        from benchrun.store.raw_shot import RawShotBuilder

        return RawShotBuilder(self, key, replace=replace)

    def _check_free(self, key: str, *, replace: bool) -> bool:
        """StoreError when a complete shot (slot or group) holds ``key`` and ``replace`` is
        False; True when a (complete or dangling) group link holds it."""
        shots = self._shots
        in_group = shots.id.links.exists(key.encode())  # without h5py's path walk
        if not replace and (key in self._slots or (in_group and _is_complete(shots.get(key)))):
            raise StoreError(f"shot {key} is already in raw record {self.path}")
        return in_group

    def _shot_written(self, key: str) -> None:
        self._wrote = True
        if key.isdigit() and self._next_number is not None:
            self._next_number = max(self._next_number, int(key) + 1)

    def _mark_layout(self) -> None:
        """Before the first shot written into a record of an older format: raise its root
        ``format_version`` to :data:`FORMAT_VERSION`, in place (one attribute value of the
        same type and size), so the file says which shot layouts it may hold."""
        attrs = self._f.attrs
        stored = attrs.get("format_version")
        if isinstance(stored, int | np.integer) and int(stored) < FORMAT_VERSION:
            attrs.modify("format_version", np.int64(FORMAT_VERSION))
        self._layout_marked = True

    def read_shot(self, key_or_ref: str, *, verify: bool = True) -> RawShot:
        """Read one complete shot back.

        Parameters
        ----------
        key_or_ref
            The shot key, or the reference ``"shots/<key>"`` kept in ``ShotResult.raw_ref``.
        verify
            Recompute the content SHA-256 and compare it with the one stored with the shot.

        Raises
        ------
        StoreError
            No such complete shot, unreadable data, or (``verify``) content that differs from
            what was written.
        """
        key = _key_of(key_or_ref)
        if key in self._slots:
            return self._slots.read(key, verify=verify)
        group = self._shots.get(key)
        if not _is_complete(group):
            raise StoreError(f"no shot {key!r} in raw record {self.path}")
        return read_shot_group(group, key, self.path, verify=verify)

    def damaged_keys(self) -> list[str]:
        """Keys of complete shots that cannot be read or whose content hash does not match."""
        bad = []
        for key in self.keys():
            try:
                self.read_shot(key, verify=True)
            except StoreError:
                bad.append(key)
        return bad
