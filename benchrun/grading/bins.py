"""Bin assignment (e.g. Qrr classes for matching diodes that will run in parallel).

A device falls in the first class, in the order of the limits file, whose bounds contain its
mean value (bounds inclusive, common practice). Bins are assigned to conforming devices only;
bin edges are applied to the measured value without a guard band (stated on the report).
"""

from __future__ import annotations

from collections.abc import Sequence

from benchrun.config.limits import BinClass


def assign_bin(value: float | None, classes: Sequence[BinClass]) -> str | None:
    """Name of the first class containing ``value``; ``None`` if none does or no value."""
    if value is None:
        return None
    for entry in classes:
        if entry.min is not None and value < entry.min:
            continue
        if entry.max is not None and value > entry.max:
            continue
        return entry.name
    return None
