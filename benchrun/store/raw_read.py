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
    ChannelData, ProbeCalibration = scaling_types()
    try:
        channels: dict[str, Any] = {}
        for name, (codes, scaling) in _stored_channels(group).items():
            channels[name] = ChannelData(
                codes=codes,
                gain=float(scaling["gain"]),
                offset=float(scaling["offset"]),
                code_min=int(scaling["code_min"]),
                code_max=int(scaling["code_max"]),
            )
        probes = {
            name: ProbeCalibration(scale=float(p["scale"]), deskew_s=float(p["deskew_s"]))
            for name, p in json.loads(_attr_str(group.attrs["probes_json"])).items()
        }
        shot = RawShot(
            key=key,
            t_start=float(group.attrs["t_start_s"]),
            dt=float(group.attrs["dt_s"]),
            channels=channels,
            probes=probes,
            attrs=json.loads(_attr_str(group.attrs["attrs_json"])),
        )
        stored_digest = _attr_str(group.attrs["content_sha256"])
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise StoreError(f"shot {key} in {path} cannot be read: {exc}") from exc
    if verify and shot.digest() != stored_digest:
        raise StoreError(
            f"shot {key} in {path} does not match the SHA-256 recorded when it was "
            "written: the raw data were changed or damaged"
        )
    return shot
