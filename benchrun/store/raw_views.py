"""What a general HDF5 tool sees of a raw record: one group per shot and a table of shots.

The per-shot write of an uncompressed record goes into preallocated slots
(:mod:`benchrun.store.raw_slots`): fast, but a slot is a row of a shared block whose key,
scaling and timing are JSON bytes. Once shots are in (when a writable record is closed, at
the end of a run, and when a record is opened for writing again, as a resumed run does),
:func:`describe_record` presents every complete shot where people look for it::

    /shots/<key>/               one group per shot, named by its key; attributes:
                                  key, t_start_s, dt_s, points, content_sha256,
                                  every scalar shot attribute (serial, repeat, attempt,
                                  timestamp, temperature_K, bus_voltage_V ...; None left
                                  out), each scalar field of the test point as
                                  point_<field> (point_index, point_label ...), and all
                                  shot attributes as sorted JSON in attrs_json;
                                  slot_view = "/slots/<block>/codes[<slot>]", slot_seq
    /shots/<key>/<channel>      the channel's ADC codes, an HDF5 *virtual dataset* mapping
                                  onto the slot's row (no copy); attributes:
                                  units ("A" for a channel named *current*, else "V"),
                                  scale, offset (quantity = codes * scale + offset, to
                                  rounding: scale = gain * probe scale, offset = channel
                                  offset * probe scale), gain, channel_offset (channel
                                  volts = codes * gain + channel_offset), probe_scale,
                                  deskew_s, code_min, code_max
    /shot_table                 compound dataset, one row per complete shot (format 2
                                  shot groups included), sorted by key: key, serial,
                                  point (index), point_label, repeat, attempt, timestamp,
                                  temperature_K, bus_voltage_V, t_start_s, dt_s, points,
                                  group (the shot's group path), content_sha256 (missing
                                  numbers: -1 for integers, NaN for floats)

A shot group of format 2 (compressed records) is already a group under ``/shots`` and is
only listed in the table. Sample *i* of a channel was taken at ``t_start_s + i * dt_s``
(plus the probe's ``deskew_s`` correction, which :mod:`benchrun.analysis.pipeline` applies).

A view group has no ``complete`` mark: it is a description, not the shot. The slot stays
the shot's one place (its header and its digest are what benchrun reads and checks), the
views are rebuilt from the slots whenever they no longer match them: the root attribute
``described`` holds a SHA-256 over the slots' (key, block, slot, seq) and the names under
``/shots`` as last described, so a record whose views are current is not touched again.
Views are built unlinked and flushed before they are linked (as shot groups are); a crash
while describing leaves at most views missing, which the next opening for writing adds.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

import h5py
import numpy as np

from benchrun.errors import StoreError
from benchrun.store.h5low import _LCPL_ASCII, _write_new_attrs
from benchrun.store.raw_read import SHOTS_GROUP, _attr_str
from benchrun.store.raw_slots import SLOTS_GROUP, _parse_header

if TYPE_CHECKING:
    from benchrun.store.raw_slots import SlotStore, _Block

#: Root dataset listing every complete shot.
TABLE_NAME = "shot_table"
#: Root attribute: SHA-256 of what the views and the table were last built from.
DESCRIBED_ATTR = "described"
#: Attribute marking a view group (value: the slot it shows, ``/slots/<block>/codes[<slot>]``).
VIEW_ATTR = "slot_view"
#: Attribute of a view group: the ``seq`` of the slot it shows.
VIEW_SEQ_ATTR = "slot_seq"

_STR_FIELDS = {"key": 64, "serial": 32, "point_label": 64, "timestamp": 40, "group": 80,
               "content_sha256": 64}


def _table_dtype() -> np.dtype:
    return np.dtype([
        ("key", f"S{_STR_FIELDS['key']}"), ("serial", f"S{_STR_FIELDS['serial']}"),
        ("point", "<i8"), ("point_label", f"S{_STR_FIELDS['point_label']}"),
        ("repeat", "<i8"), ("attempt", "<i8"),
        ("timestamp", f"S{_STR_FIELDS['timestamp']}"), ("temperature_K", "<f8"),
        ("bus_voltage_V", "<f8"), ("t_start_s", "<f8"), ("dt_s", "<f8"), ("points", "<i8"),
        ("group", f"S{_STR_FIELDS['group']}"),
        ("content_sha256", f"S{_STR_FIELDS['content_sha256']}"),
    ])


def channel_units(name: str) -> str:
    """Units of a channel's measured quantity: ``"A"`` when its name says current (the
    pipeline's ``diode_current``), else ``"V"``."""
    return "A" if "current" in name.lower() else "V"


def is_view(group: Any) -> bool:
    """Whether ``group`` (an h5py group or None) is a view group built here."""
    if group is None:
        return False
    try:
        return VIEW_ATTR in group.attrs
    except (OSError, KeyError, ValueError):
        return False


def _signature(slots: SlotStore, names: list[str]) -> str:
    h = hashlib.sha256()
    for key in sorted(slots.index):
        block, slot, seq = slots.index[key]
        h.update(f"{key}\0{block.name}\0{slot}\0{seq}\n".encode())
    h.update(b"\x01" + "\0".join(sorted(names)).encode())
    return h.hexdigest()


def is_described(f: h5py.File, slots: SlotStore) -> bool:
    """Whether the views and the table of ``f`` match its slots and shot groups."""
    shots = f.get(SHOTS_GROUP)
    if shots is None or TABLE_NAME not in f:
        return False
    stored = f.attrs.get(DESCRIBED_ATTR)
    return stored is not None and _attr_str(stored) == _signature(slots, list(shots))


def _slot_headers(slots: SlotStore) -> Iterator[tuple[str, _Block, int, int, dict[str, Any]]]:
    """(key, block, slot, seq, header) of the newest slot of every key, one read per block."""
    wanted: dict[str, list[tuple[str, int, int]]] = {}
    blocks = {}
    for key, (block, slot, seq) in slots.index.items():
        wanted.setdefault(block.name, []).append((key, slot, seq))
        blocks[block.name] = block
    for name, entries in wanted.items():
        block = blocks[name]
        raw = np.frombuffer(slots._read(block, "header", 0, block.used),
                            dtype=np.uint8).reshape(block.used, block.width)
        for key, slot, seq in entries:
            header = _parse_header(raw[slot].tobytes())
            if header is None or header.get("key") != key:
                raise StoreError(f"raw record {slots.path}: the header of shot {key} cannot be "
                                 "read")
            yield key, block, slot, seq, header


def _scalar(value: Any) -> bool:
    return isinstance(value, str | bool | int | float) and not isinstance(value, np.generic)


def shot_attributes(attrs: dict[str, Any]) -> dict[str, str | int | float | bool]:
    """The HDF5 attributes of a view group for the shot attributes ``attrs``: scalars as
    they are, the scalar fields of the test point (``point``) as ``point_<field>``; None
    and other values left out (all of them are in ``attrs_json``)."""
    out: dict[str, str | int | float | bool] = {}
    for name, value in attrs.items():
        if _scalar(value):
            out[name] = value
        elif name == "point" and isinstance(value, dict):
            for field, inner in value.items():
                if _scalar(inner):
                    out[f"{name}_{field}"] = inner
    return out


def _put_attrs(obj: Any, values: dict[str, Any]) -> None:
    """Attributes of an object just created (what ``obj.attrs[name] = value`` stores)."""
    _write_new_attrs(obj, values)


def _build_view(f: h5py.File, key: str, block: _Block, slot: int, seq: int,
                header: dict[str, Any]) -> h5py.Group:
    """An unlinked view group of one slot shot."""
    gid = h5py.h5g.create(f.id, None)
    points = int(header["points"])
    t_start, dt = float(header["t_start_s"]), float(header["dt_s"])
    # the virtual dataset through the low-level API (what h5py's VirtualLayout makes, without
    # its per-dataset copies of the source description): points codes of one row of a slot
    codes_path = f"/{SLOTS_GROUP}/{block.name}/codes".encode()
    vspace = h5py.h5s.create_simple((points,))
    htype = h5py.h5t.py_create(block.dtype)
    probes = header.get("probes", {})
    for row, channel in enumerate(header["channels"]):
        src = h5py.h5s.create_simple((block.n_slots, block.n_channels, block.length))
        src.select_hyperslab((slot, row, 0), (1, 1, points))
        dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
        dcpl.set_virtual(vspace, b".", codes_path, src)
        ds = h5py.h5d.create(gid, channel["name"].encode(), htype, vspace, dcpl=dcpl)
        probe = probes.get(channel["name"], {"scale": 1.0, "deskew_s": 0.0})
        gain, offset = float(channel["gain"]), float(channel["offset"])
        probe_scale = float(probe["scale"])
        _put_attrs(ds, {
            "units": channel_units(channel["name"]),
            "scale": gain * probe_scale, "offset": offset * probe_scale,
            "gain": gain, "channel_offset": offset, "probe_scale": probe_scale,
            "deskew_s": float(probe["deskew_s"]), "code_min": int(channel["code_min"]),
            "code_max": int(channel["code_max"]),
        })
        ds.close()
    attrs = header.get("attrs", {})
    _put_attrs(gid, {
        **shot_attributes(attrs), "key": key, "t_start_s": t_start, "dt_s": dt, "points": points,
        "content_sha256": str(header["content_sha256"]),
        "attrs_json": json.dumps(attrs, sort_keys=True, separators=(",", ":")),
        VIEW_ATTR: f"/{SLOTS_GROUP}/{block.name}/codes[{slot}]", VIEW_SEQ_ATTR: seq,
    })
    return h5py.Group(gid)


def _fixed(text: Any, field: str) -> bytes:
    raw = str(text if text is not None else "").encode()
    return raw[:_STR_FIELDS[field]]


def _num(value: Any, integer: bool) -> Any:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return -1 if integer else math.nan
    return int(value) if integer else float(value)


def _table_row(key: str, attrs: dict[str, Any], t_start: float, dt: float, points: int,
               digest: str) -> tuple:
    point = attrs.get("point") if isinstance(attrs.get("point"), dict) else {}
    return (_fixed(key, "key"), _fixed(attrs.get("serial"), "serial"),
            _num(point.get("index"), True), _fixed(point.get("label"), "point_label"),
            _num(attrs.get("repeat"), True), _num(attrs.get("attempt"), True),
            _fixed(attrs.get("timestamp"), "timestamp"),
            _num(attrs.get("temperature_K"), False), _num(attrs.get("bus_voltage_V"), False),
            float(t_start), float(dt), int(points), _fixed(f"/{SHOTS_GROUP}/{key}", "group"),
            _fixed(digest, "content_sha256"))


def _group_row(key: str, group: h5py.Group) -> tuple | None:
    """The table row of a complete format 1/2 shot group (None when unreadable)."""
    try:
        a = group.attrs
        attrs = json.loads(_attr_str(a["attrs_json"]))
        points = max((ds.shape[0] for ds in group.values() if isinstance(ds, h5py.Dataset)),
                     default=0)
        return _table_row(key, attrs, float(a["t_start_s"]), float(a["dt_s"]), points,
                          _attr_str(a.get("content_sha256", "")))
    except (OSError, KeyError, ValueError, TypeError):
        return None


def describe_record(f: h5py.File, slots: SlotStore, *, force: bool = False) -> bool:
    """Build or bring up to date the shot views and the shot table of an open, writable
    record (module docstring). Returns False when they were current already (nothing
    written; ``force`` rebuilds the table anyway).

    Raises
    ------
    StoreError
        A write failed or a slot header cannot be read.
    """
    if not force and is_described(f, slots):
        return False
    try:
        shots = f[SHOTS_GROUP]
        wanted = {key: (block, slot, seq) for key, (block, slot, seq) in slots.index.items()}
        groups_rows: list[tuple] = []
        for key in list(shots):
            group = shots.get(key)
            if group is None:
                continue
            if is_view(group):
                entry = wanted.get(key)
                current = entry is not None and \
                    _attr_str(group.attrs[VIEW_ATTR]) == \
                    f"/{SLOTS_GROUP}/{entry[0].name}/codes[{entry[1]}]" and \
                    int(group.attrs.get(VIEW_SEQ_ATTR, -1)) == entry[2]
                if not current:
                    del shots[key]
            elif key not in wanted and bool(group.attrs.get("complete", False)):
                row = _group_row(key, group)
                if row is not None:
                    groups_rows.append(row)
        rows = list(groups_rows)
        new: list[tuple[str, h5py.Group]] = []
        for key, block, slot, seq, header in _slot_headers(slots):
            rows.append(_table_row(key, header.get("attrs", {}), header["t_start_s"],
                                   header["dt_s"], header["points"],
                                   header["content_sha256"]))
            if key not in shots:
                new.append((key, _build_view(f, key, block, slot, seq, header)))
        if TABLE_NAME in f:
            del f[TABLE_NAME]
        table = np.array(sorted(rows), dtype=_table_dtype())
        f.flush()  # the views' objects reach the file before the links to them
        for key, group in new:
            h5py.h5o.link(group.id, shots.id, key.encode(), lcpl=_LCPL_ASCII)
        ds = f.create_dataset(TABLE_NAME, data=table)
        ds.attrs["description"] = (
            "One row per complete shot of this benchrun raw record, sorted by key; group is "
            "the shot's group (channels as datasets of ADC codes, quantity = codes * scale + "
            "offset in the dataset's units); -1 or NaN: not recorded.")
        f.attrs[DESCRIBED_ATTR] = _signature(slots, list(shots))
        f.flush()
    except (OSError, ValueError, TypeError, KeyError) as exc:
        raise StoreError(f"cannot describe the shots of raw record {slots.path}: {exc}") \
            from exc
    return True

