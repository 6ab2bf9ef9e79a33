"""Content hashes of the raw record: a shot's digest (stored with every shot and checked on
reading) and a file's SHA-256 (FIPS 180-4), for manifests and verification."""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from benchrun.errors import StoreError
from benchrun.store.canonical import canonical_json, with_attrs_json

if TYPE_CHECKING:
    from benchrun.store.raw import ChannelLike, ProbeLike


def shot_digest(
    t_start: float,
    dt: float,
    channels: Mapping[str, ChannelLike],
    probes: Mapping[str, ProbeLike],
    attrs: Mapping[str, Any],
    *,
    attrs_json: str | None = None,
) -> str:
    """SHA-256 (hex) over a shot's timing, scaling, probes, attributes and raw codes.

    The header is canonical JSON (sorted keys); then, per channel in name order, the dtype
    string and the little-endian code bytes. Stored with every shot so a changed byte in a
    waveform is found by :meth:`RawRecord.read_shot` even when the file still opens.
    ``attrs_json``: ``canonical_json(attrs)`` when the caller has it already (the same
    digest, one serialisation less).

    Returns
    -------
    str
        64 hex digits.
    """
    header = {
        "t_start": float(t_start),
        "dt": float(dt),
        "channels": {
            name: {
                "gain": float(ch.gain),
                "offset": float(ch.offset),
                "code_min": int(ch.code_min),
                "code_max": int(ch.code_max),
                "dtype": np.asarray(ch.codes).dtype.newbyteorder("<").str,
                "length": int(np.asarray(ch.codes).size),
            }
            for name, ch in channels.items()
        },
        "probes": {
            name: {"scale": float(p.scale), "deskew_s": float(p.deskew_s)}
            for name, p in probes.items()
        },
    }
    h = hashlib.sha256(with_attrs_json(
        canonical_json(header), canonical_json(dict(attrs)) if attrs_json is None else attrs_json
    ).encode())
    for name in sorted(channels):
        codes = np.asarray(channels[name].codes)
        h.update(name.encode() + b"\0")
        h.update(np.ascontiguousarray(codes, dtype=codes.dtype.newbyteorder("<")).tobytes())
    return h.hexdigest()


def file_sha256(path: str | os.PathLike[str], chunk_size: int = 1 << 20) -> str:
    """SHA-256 (hex) of a file's bytes (FIPS 180-4), read in chunks.

    Raises
    ------
    StoreError
        The file cannot be read.
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while block := fh.read(chunk_size):
                h.update(block)
    except OSError as exc:
        raise StoreError(f"cannot read {path} to hash it: {exc}") from exc
    return h.hexdigest()
