"""Bin assignment (e.g. Qrr classes for matching diodes that will run in parallel).

A device falls in the first class, in the order of the limits file, whose bounds contain its
value (bounds inclusive, common practice). Bins are assigned to conforming devices only.

The decision rule applies to bin edges as it does to limits (ILAC-G8:09/2019 §4.2): with the
guard band ``w = r·U`` of the value, every value in ``[x − w, x + w]`` must fall in the same
class. When a class edge lies inside that interval the device is *unbinned*, with the edge
named in the reason; it is not put in a class its measured value does not prove. Under simple
acceptance (w = 0) the measured value alone decides.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from benchrun.config.limits import BinClass
from benchrun.units import format_si


@dataclass(frozen=True)
class BinAssignment:
    """The class a value was put in (``None`` when unbinned) and why."""

    name: str | None
    reason: str


def _first_class(value: float, classes: Sequence[BinClass]) -> str | None:
    for entry in classes:
        if entry.min is not None and value < entry.min:
            continue
        if entry.max is not None and value > entry.max:
            continue
        return entry.name
    return None


def assign_bin(value: float | None, classes: Sequence[BinClass]) -> str | None:
    """Name of the first class containing ``value``; ``None`` if none does or no value."""
    if value is None:
        return None
    return _first_class(value, classes)


def bin_with_guard(
    value: float | None,
    guard_band: float,
    classes: Sequence[BinClass],
    *,
    name: str = "value",
    unit: str = "",
) -> BinAssignment:
    """Assign a class only when the whole interval ``value ± guard_band`` lies in it.

    Parameters
    ----------
    value
        The device's value of the bin metric (``None``: not measured).
    guard_band
        ``w = r·U`` of the decision rule (0 for simple acceptance).
    classes
        The bin classes in file order.
    name, unit
        For the reason text.
    """
    def show(x: float) -> str:
        return format_si(x, unit) if unit else f"{x:.4g}"

    if value is None or not math.isfinite(value):
        return BinAssignment(None, f"{name} not measured")
    w = abs(guard_band)
    low, high = value - w, value + w
    here = _first_class(value, classes)
    if here is None:
        return BinAssignment(None, f"{name} {show(value)} is in no bin class")
    probes = [low, high]
    for entry in classes:
        for edge in (entry.min, entry.max):
            if edge is not None and low <= edge <= high:
                probes += [edge, math.nextafter(edge, -math.inf), math.nextafter(edge, math.inf)]
    crossed = sorted({edge for entry in classes for edge in (entry.min, entry.max)
                      if edge is not None and low <= edge <= high
                      and len({_first_class(x, classes) for x in
                               (math.nextafter(edge, -math.inf), edge,
                                math.nextafter(edge, math.inf))}) > 1})
    if all(_first_class(x, classes) == here for x in probes):
        text = f"{name} {show(value)} in class {here}"
        if w > 0:
            text += f" with its guard band ±{show(w)}"
        return BinAssignment(here, text)
    edges = ", ".join(show(e) for e in crossed) or "?"
    which = "edges" if len(crossed) > 1 else "edge"
    return BinAssignment(
        None,
        f"{name} {show(value)} ± w {show(w)} straddles the class {which} {edges} (the "
        "decision rule applied to the bin edges)",
    )
