"""Reading shots back from the raw record (layout in :mod:`benchrun.store.raw`): the
:class:`RawShot` record and the reading of one shot group, both formats, with the content
hash checked."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from benchrun.errors import StoreError
from benchrun.store.digests import shot_digest

#: Group holding one subgroup per shot.
SHOTS_GROUP = "shots"


def scaling_types() -> tuple[type, type]:
    """``(ChannelData, ProbeCalibration)`` of :mod:`benchrun.analysis.pipeline`.

    Imported on first use, not at import time, so that opening a store does not load
    the signal-processing stack (scipy) that listing reports does not need.
    """
    from benchrun.analysis.pipeline import ChannelData, ProbeCalibration

    return ChannelData, ProbeCalibration


@dataclass(frozen=True)
class RawShot:
    """One shot read back from the raw record.

    Attributes
    ----------
    key
        Shot key (the name of its group below ``/shots``).
    t_start, dt
        Time of the first sample relative to the trigger and the sample interval, seconds.
    channels
        Channel name → :class:`benchrun.analysis.pipeline.ChannelData` with the codes
        exactly as stored.
    probes
        Channel name → :class:`benchrun.analysis.pipeline.ProbeCalibration`.
    attrs
        The shot attributes given to :meth:`RawRecord.append_shot` (settings, serial, point,
        timestamp, instrument identities ...), as JSON round-trips them.
    """

    key: str
    t_start: float
    dt: float
    channels: dict[str, Any]
    probes: dict[str, Any]
    attrs: dict[str, Any] = field(default_factory=dict)

    @property
    def raw_ref(self) -> str:
        """Reference to this shot as stored in ``ShotResult.raw_ref`` (``"shots/<key>"``)."""
        return f"{SHOTS_GROUP}/{self.key}"

    def digest(self) -> str:
        """SHA-256 of the shot's content, see :func:`shot_digest`."""
        return shot_digest(self.t_start, self.dt, self.channels, self.probes, self.attrs)


def _stored_channels(group: h5py.Group) -> dict[str, tuple[np.ndarray, Mapping[str, Any]]]:
    """Channel name → (codes, scaling with ``gain``, ``offset``, ``code_min``, ``code_max``)
    of a stored shot, in either layout (module docstring): format 2 keeps every channel's
    scaling in the group's ``channels_json``, format 1 in attributes of each dataset.

    Raises KeyError when the scaling and the datasets do not name the same channels.
    """
    scaling_json = group.attrs.get("channels_json")
    if scaling_json is None:  # format 1
        return {name: (ds[()], ds.attrs) for name, ds in group.items()}
    scaling = json.loads(_attr_str(scaling_json))
    if set(scaling) != set(group):
        raise KeyError(f"channels_json names {sorted(scaling)}, the shot holds datasets "
                       f"{sorted(group)}")
    return {name: (ds[()], scaling[name]) for name, ds in group.items()}


def _attr_str(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def read_shot_group(group: h5py.Group, key: str, path: Path, *, verify: bool = True) -> RawShot:
    """The shot stored in ``group`` (a complete shot group of the record at ``path``).

    Raises
    ------
    StoreError
        Unreadable data, or (``verify``) content that differs from what was written.
    """
    try:
        attrs = group.attrs
        return make_shot(key, path, float(attrs["t_start_s"]), float(attrs["dt_s"]),
                         _stored_channels(group),
                         json.loads(_attr_str(attrs["probes_json"])),
                         json.loads(_attr_str(attrs["attrs_json"])),
                         _attr_str(attrs["content_sha256"]), verify=verify)
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise StoreError(f"shot {key} in {path} cannot be read: {exc}") from exc


def make_shot(key: str, path: Path, t_start: float, dt: float,
              channels: Mapping[str, tuple[np.ndarray, Mapping[str, Any]]],
              probes: Mapping[str, Mapping[str, Any]], attrs: dict[str, Any],
              stored_digest: str, *, verify: bool = True) -> RawShot:
    """A :class:`RawShot` from what one layout stored: channel name → (codes, scaling with
    ``gain``, ``offset``, ``code_min``, ``code_max``), probe name → ``scale`` and
    ``deskew_s``; with ``verify``, checked against the digest stored with it.

    Raises
    ------
    KeyError, ValueError, TypeError
        A scaling or probe field is missing or not a number (the caller names the shot).
    StoreError
        (``verify``) The content differs from what was written.
    """
    ChannelData, ProbeCalibration = scaling_types()
    shot = RawShot(
        key=key,
        t_start=t_start,
        dt=dt,
        channels={
            name: ChannelData(codes=codes, gain=float(scaling["gain"]),
                              offset=float(scaling["offset"]),
                              code_min=int(scaling["code_min"]),
                              code_max=int(scaling["code_max"]))
            for name, (codes, scaling) in channels.items()
        },
        probes={name: ProbeCalibration(scale=float(p["scale"]), deskew_s=float(p["deskew_s"]))
                for name, p in probes.items()},
        attrs=attrs,
    )
    if verify and shot.digest() != stored_digest:
        raise StoreError(
            f"shot {key} in {path} does not match the SHA-256 recorded when it was "
            "written: the raw data were changed or damaged"
        )
    return shot
