"""Writing one shot of the raw record channel by channel.

:meth:`RawRecord.begin_shot` returns a :class:`RawShotBuilder`: each channel is written with
:meth:`RawShotBuilder.add_channel` (a caller may hand them over as they arrive), and
:meth:`RawShotBuilder.finish` writes the shot's attributes and links it under ``/shots`` in
the crash-safe order of the module :mod:`benchrun.store.raw` ("Crash safety"): the group is
created unlinked, completed, flushed, and only then linked and flushed again. A shot never
finished stays unlinked: nothing of it is visible, after a crash or not.
:meth:`RawRecord.append_shot` is this, all at once; the layout written (format 2) is
documented in :mod:`benchrun.store.raw`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import h5py
import numpy as np

from benchrun.errors import StoreError
from benchrun.store import raw as _raw
from benchrun.store.canonical import canonical_json
from benchrun.store.raw_slots import check_timing, checked_codes, scaling_of

if TYPE_CHECKING:
    from benchrun.store.raw import ChannelLike, ProbeLike, RawRecord


class RawShotBuilder:
    """One shot being written (see the module docstring); use from one thread at a time.

    Raises
    ------
    StoreError
        (on creation) bad key, a complete shot already stored under it (unless
        ``replace``), read-only record.
    """

    def __init__(self, record: RawRecord, key: str, *, replace: bool = False) -> None:
        record._require_writable()
        record.wait_durable()  # the previous shot's background sync, if any
        self.record = record
        self.key = _raw._key_of(key)
        self.replace = replace
        record._check_free(self.key, replace=replace)
        self._channels: dict[str, ChannelLike] = {}
        self._finished = False
        try:
            if not record._layout_marked:
                record._mark_layout()
            # unlinked until complete and flushed
            self._group = h5py.h5g.create(record._f.id, None)
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise StoreError(f"cannot write shot {self.key} to {record.path}: {exc}") from exc

    def add_channel(self, name: str, channel: ChannelLike) -> None:
        """Write one channel's codes (scaling goes with the shot's attributes at finish)."""
        if self._finished:
            raise StoreError(f"shot {self.key} is already finished")
        if name in self._channels:
            raise StoreError(f"shot {self.key}: invalid or repeated channel name {name!r}")
        codes = checked_codes(self.key, name, channel)
        try:
            dcpl, space = self._layout_of(codes)
            htype = _raw._code_type(codes.dtype)  # integer codes: memory type = file type
            ds = h5py.h5d.create(self._group, name.encode(), htype, space, dcpl=dcpl)
            ds.write(h5py.h5s.ALL, h5py.h5s.ALL, codes, mtype=htype)
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise StoreError(f"cannot write shot {self.key} to {self.record.path}: "
                             f"{exc}") from exc
        self._channels[name] = channel

    def _layout_of(self, codes: np.ndarray) -> tuple[Any, Any]:
        """Dataset creation properties and data space of ``codes``, made once per record
        and shape (kept in ``record._codes_layout``)."""
        layouts, shape = self.record._codes_layout, (codes.size, codes.dtype.itemsize)
        if shape not in layouts:
            layouts[shape] = (_raw._codes_create_plist(self.record.compression, *shape),
                              h5py.h5s.create_simple(codes.shape))
        return layouts[shape]

    def finish(self, t_start: float, dt: float, probes: Mapping[str, ProbeLike],
               attrs: Mapping[str, Any] | None = None, *, wait: bool = True) -> str:
        """Write the shot's attributes, link it and make it durable; returns its reference
        (``"shots/<key>"``). ``wait`` as in :meth:`RawRecord.append_shot`."""
        record, key = self.record, self.key
        if self._finished:
            raise StoreError(f"shot {key} is already finished")
        attrs = dict(attrs or {})
        channels = self._channels
        if not channels:
            raise StoreError(f"shot {key}: no channels to store")
        check_timing(key, t_start, dt)
        attrs_json = canonical_json(attrs)
        digest = _raw.shot_digest(t_start, dt, channels, probes, attrs, attrs_json=attrs_json)
        probes_json = canonical_json(
            {n: {"scale": float(p.scale), "deskew_s": float(p.deskew_s)} for n, p in probes.items()}
        )
        channels_json = canonical_json({name: scaling_of(ch)
                                        for name, ch in channels.items()})
        try:
            # format 2: one attribute holds every channel's scaling
            _raw._write_new_attrs(self._group, {
                "t_start_s": float(t_start), "dt_s": float(dt), "channels_json": channels_json,
                "probes_json": probes_json, "attrs_json": attrs_json,
                "content_sha256": digest, "complete": True})  # the mark last
            if record._check_free(key, replace=self.replace):
                del record._shots[key]
            record._f.flush()  # the shot's objects reach the file before the link to them
            # last: the shot is now visible (what ``shots[key] = group`` does)
            h5py.h5o.link(self._group, record._shots.id, key.encode(), lcpl=_raw._LCPL_ASCII)
        except StoreError:
            raise
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise StoreError(f"cannot write shot {key} to {record.path}: {exc}") from exc
        self._finished = True
        record.flush(wait=wait)
        if key in record._slots:  # replaced: the slot version goes once the group is in
            record._slots.drop(key)
        record._shot_written(key)
        return f"{_raw.SHOTS_GROUP}/{key}"
