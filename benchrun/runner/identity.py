"""The right device: part number and lot of every device, as the handler reports them, must be
those of the sequence before the device is ever energised.

A sequence's test points are checked against the ratings of *its* part (pre-flight), so a
device of another part — a SiC part rated 20 A among silicon parts tested at 30 A — would be
driven beyond its own ratings, and a device of another lot would be graded into the wrong lot.
:func:`check_devices` asks the handler for each device's part and lot before the first shot;
a device that does not match is skipped with its reason (recorded in ``run.json`` as
``skipped_devices``), or the run stops before anything is energised
(``RunOptions.wrong_device = "stop"``).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

from benchrun.config.sequence import SequenceConfig
from benchrun.errors import ConfigError, RunError

log = logging.getLogger("benchrun.runner")

#: What to do with a device whose part or lot is not the sequence's.
WRONG_DEVICE_ACTIONS = ("skip", "stop")


@dataclass(frozen=True)
class DeviceCheck:
    """Devices to test and devices skipped (serial → reason)."""

    accepted: list[str]
    skipped: dict[str, str] = field(default_factory=dict)
    #: whether the handler reported part and lot (False: not checked)
    checked: bool = True


def mismatch(sequence: SequenceConfig, identity: tuple[str, str] | None) -> str | None:
    """Why a device of ``identity`` (part, lot) must not be tested by ``sequence``; None when
    it may."""
    if identity is None:
        return "the handler does not report its part and lot"
    part, lot = identity
    if part != sequence.part:
        return (f"it is part {part} (lot {lot}), the sequence tests {sequence.part}: never "
                f"fired at another part's settings and ratings")
    if lot != sequence.lot:
        return (f"it is lot {lot}, the sequence tests lot {sequence.lot}: not graded into "
                "another lot")
    return None


def check_devices(sequence: SequenceConfig, handler: Any, serials: list[str], *,
                  action: str = "skip") -> DeviceCheck:
    """Check every device's part and lot with the handler before anything is energised.

    Parameters
    ----------
    handler
        The handler driver (``device_identity(serial)``), or None (one device placed by
        hand: nothing to ask).
    action
        ``"skip"`` a device that does not match (with its reason), or ``"stop"`` the run.

    Raises
    ------
    RunError
        ``action="stop"`` and a device does not match; no device matches; or the handler
        cannot report part and lot while the sequence asks for ``devices: all``.
    """
    if action not in WRONG_DEVICE_ACTIONS:
        raise ConfigError(f"wrong-device action must be one of {WRONG_DEVICE_ACTIONS}, not "
                          f"{action!r}")
    if handler is None:
        return DeviceCheck(list(serials), checked=False)
    if not handler.table.has("device_identity"):
        if sequence.devices == "all":
            raise RunError(f"the handler ({handler.table.family}) cannot report the part and "
                           "lot of its devices: with 'devices: all' a device of another part "
                           "could be fired; list the serials to test in the sequence")
        log.warning("the handler (%s) cannot report part and lot: the devices listed in the "
                    "sequence are taken to be %s lot %s", handler.table.family, sequence.part,
                    sequence.lot)
        return DeviceCheck(list(serials), checked=False)
    accepted: list[str] = []
    skipped: dict[str, str] = {}
    for serial in serials:
        reason = mismatch(sequence, handler.device_identity(serial))
        if reason is None:
            accepted.append(serial)
        else:
            skipped[serial] = reason
    if skipped and action == "stop":
        raise RunError("devices that are not " + f"{sequence.part} lot {sequence.lot}: "
                       + "; ".join(f"{s}: {r}" for s, r in skipped.items())
                       + " (nothing was energised)")
    for serial, reason in skipped.items():
        log.warning("device %s skipped: %s", serial, reason)
    if not accepted:
        raise RunError(f"no device of {sequence.part} lot {sequence.lot} in the handler "
                       f"({len(skipped)} of other parts or lots skipped)")
    return DeviceCheck(accepted, skipped)
