"""Quantities that must be written with their unit: limits, tolerances, bin edges, accuracies.

:func:`benchrun.units.parse_quantity` reads a bare number as already in SI base units. That is
convenient for settings with an obvious unit, and dangerous for a limit: ``max: 150`` for trr
would be 150 s and ``max: 3.2`` for Qrr 3.2 C, turning a rejected lot into an accepted one.
The types here refuse a value without a unit text (``150`` or ``"150"``): a limit, a bin edge
or an absolute uncertainty input names a unit of the metric's dimension (``"150 ns"``), a
relative tolerance or accuracy is written with ``%`` (``"5 %"``), a temperature tolerance with
its unit (``"3 K"``). Dimensionless quantities (softness, rrsf) are the only exception, handled
by the caller.
"""

from __future__ import annotations

import math
import re
from typing import Annotated, Any

from pydantic import BeforeValidator

from benchrun.errors import UnitError
from benchrun.units import DIMENSIONS, parse_quantity

_NUMBER_ONLY = re.compile(r"^\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?\s*$")

#: Example unit shown in the message for each dimension.
_EXAMPLE_UNIT = {
    "time": "ns",
    "charge": "uC",
    "energy": "mJ",
    "current": "A",
    "voltage": "V",
    "current_slope": "A/us",
    "voltage_slope": "V/ns",
    "power": "W",
    "temperature": "degC",
    "temperature_difference": "K",
    "dimensionless": "%",
}


def has_no_unit(value: Any) -> bool:
    """Whether ``value`` is a bare number (a YAML number or a string of digits only)."""
    if isinstance(value, bool):
        return False
    if isinstance(value, int | float):
        return True
    return isinstance(value, str) and bool(_NUMBER_ONLY.match(value))


def unit_missing_message(value: Any, dimension: str) -> str:
    """``"150 has no unit; write it with a unit of time, e.g. '150 ns'"``."""
    unit = _EXAMPLE_UNIT.get(dimension, DIMENSIONS.get(dimension, ""))
    try:
        number = f"{float(value):g}"
    except (TypeError, ValueError):
        number = str(value)
    shown = repr(value.strip()) if isinstance(value, str) else number
    if dimension == "dimensionless":
        try:
            percent = f"{100 * float(value):g}"
        except (TypeError, ValueError):
            percent = number
        return (f"{shown} has no unit; write a relative value with %, e.g. '{percent} %' "
                f"for a fraction {number}")
    return f"{shown} has no unit; write it with a unit of {dimension}, e.g. '{number} {unit}'"


def parse_explicit(value: Any, dimension: str) -> float:
    """Parse a quantity that must carry a unit text (``ValueError`` with the reason).

    For ``dimension="dimensionless"`` the unit is ``%`` (or ``ppm``); a bare fraction is
    refused too, since ``5`` and ``0.05`` cannot both mean five percent.
    """
    if has_no_unit(value):
        raise ValueError(unit_missing_message(value, dimension))
    try:
        result = parse_quantity(value, dimension)
    except UnitError as exc:
        raise ValueError(exc.message) from None
    if not math.isfinite(result):
        raise ValueError(f"{value!r} is not finite")
    return result


def _explicit(dimension: str, *, low: float | None = None, high: float | None = None,
              low_inclusive: bool = True, what: str = ""):
    def check(value: Any) -> float:
        result = parse_explicit(value, dimension)
        too_low = low is not None and (result < low if low_inclusive else result <= low)
        too_high = high is not None and result >= high
        if too_low or too_high:
            raise ValueError(what.format(value=value))
        return result

    return check


#: A relative value in [0, 1) written with its unit: ``"1.5 %"``.
ExplicitFraction = Annotated[float, BeforeValidator(_explicit(
    "dimensionless", low=0.0, high=1.0,
    what="a relative value must lie between 0 and 100 %, got {value!r}"))]
#: A relative tolerance in (0, 1) written with its unit: ``"5 %"``.
ExplicitTolerance = Annotated[float, BeforeValidator(_explicit(
    "dimensionless", low=0.0, high=1.0, low_inclusive=False,
    what="a relative tolerance must lie between 0 and 100 %, got {value!r}"))]
#: A positive temperature difference with its unit: ``"3 K"`` (``"3 degC"`` is a difference).
ExplicitTemperatureBand = Annotated[float, BeforeValidator(_explicit(
    "temperature_difference", low=0.0, low_inclusive=False,
    what="a temperature tolerance must be positive, got {value!r}"))]
#: A non-negative time with its unit: ``"0.5 ns"``.
ExplicitTimeBound = Annotated[float, BeforeValidator(_explicit(
    "time", low=0.0, what="a time bound must not be negative, got {value!r}"))]


def explicit(dimension: str) -> Any:
    """Annotated float of ``dimension`` that must be written with its unit."""
    return Annotated[float, BeforeValidator(_explicit(dimension))]
