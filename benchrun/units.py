"""Quantities as engineers write them ("600 V", "2.5 us", "25 degC") to SI floats, and back.

Inside benchrun every number is a plain float in SI base units (V, A, s, H, F, C, J, W, ohm,
A/s, K). Units are parsed at the edges (configuration files, command line) with pint and
scaled only for display with :func:`format_si`.

Temperatures are kelvin inside; ``"25 degC"`` parses to 298.15.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache
from typing import Any

from benchrun.errors import UnitError

#: SI unit (as pint understands it) of every dimension the tool knows by name.
DIMENSIONS: dict[str, str] = {
    "voltage": "V",
    "current": "A",
    "time": "s",
    "frequency": "Hz",
    "inductance": "H",
    "capacitance": "F",
    "charge": "C",
    "energy": "J",
    "power": "W",
    "resistance": "ohm",
    "current_slope": "A/s",
    "voltage_slope": "V/s",
    "temperature": "K",
    "temperature_difference": "delta_degC",
    "thermal_resistance": "K/W",
    "conductance": "S",
    "dimensionless": "",
}

_SPLIT = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")

# Spellings pint does not know or reads differently from engineers.
_ALIASES = {
    "us": "µs",
    "uA": "µA",
    "uC": "µC",
    "uF": "µF",
    "uH": "µH",
    "uV": "µV",
    "uJ": "µJ",
    "uW": "µW",
    "°C": "degC",
    "℃": "degC",
    "C/s": "C/s",
    "A/us": "A/µs",
    "V/us": "V/µs",
    "Ohm": "ohm",
    "Ω": "ohm",
    "kΩ": "kohm",
    "mΩ": "mohm",
}


@lru_cache(maxsize=1)
def _registry() -> Any:
    import pint

    ureg = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
    return ureg


def _normalise_unit(text: str) -> str:
    text = text.strip()
    if text in _ALIASES:
        return _ALIASES[text]
    # "A/us" style compound units: replace a leading 'u' prefix on each factor
    return re.sub(r"(?<![A-Za-z])u(?=[sACFHVJW])", "µ", text).replace("°C", "degC")


def parse_quantity(value: Any, dimension: str, *, field: str | None = None) -> float:
    """Parse a quantity into an SI float of the given dimension.

    Parameters
    ----------
    value
        ``"600 V"``, ``"2.5 us"``, ``"100 nH"``, ``"25 degC"``, ``"200 A/us"``; a bare number
        is taken as already in SI units.
    dimension
        A key of :data:`DIMENSIONS` ("voltage", "charge", ...).
    field
        Name of the field, used in the error message.

    Returns
    -------
    float
        The value in SI base units (kelvin for temperatures).

    Raises
    ------
    UnitError
        The text does not parse or its dimension is not ``dimension``.
    """
    if dimension not in DIMENSIONS:
        raise UnitError(f"unknown dimension {dimension!r}", field=field)
    if isinstance(value, bool):
        raise UnitError(f"expected a {dimension}, got {value!r}", field=field)
    if isinstance(value, int | float):
        if not math.isfinite(float(value)):
            raise UnitError(f"expected a finite {dimension}, got {value!r}", field=field)
        return float(value)
    if not isinstance(value, str):
        raise UnitError(f"expected a {dimension} such as '1.5 {DIMENSIONS[dimension]}', "
                        f"got {value!r}", field=field)
    match = _SPLIT.match(value)
    if not match:
        raise UnitError(f"cannot read {value!r} as a {dimension}", field=field)
    number = float(match.group(1))
    unit_text = _normalise_unit(match.group(2))
    if dimension == "temperature_difference" and unit_text == "degC":
        unit_text = "delta_degC"  # "3 degC" as a tolerance is a difference of 3 K
    target = DIMENSIONS[dimension]
    if not unit_text:
        if dimension == "dimensionless":
            return number
        raise UnitError(
            f"{value!r} has no unit; write it as e.g. '{number:g} {target}'", field=field
        )
    ureg = _registry()
    try:
        unit = ureg.Unit(unit_text)
    except Exception as exc:  # pint raises several types for unknown units
        raise UnitError(f"unknown unit {match.group(2)!r} in {value!r}", field=field) from exc
    quantity = ureg.Quantity(number, unit)
    try:
        converted = quantity.to(target) if target else quantity.to("dimensionless")
    except Exception as exc:
        raise UnitError(
            f"{value!r} is not a {dimension} (expected units convertible to {target or '1'})",
            field=field,
        ) from exc
    # round away binary noise from prefix scaling (2.4999999999999998e-06 → 2.5e-06)
    result = float(f"{float(converted.magnitude):.14g}")
    if not math.isfinite(result):
        raise UnitError(f"{value!r} is not finite", field=field)
    return result


_PREFIXES = [
    (1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""),
    (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"), (1e-12, "p"), (1e-15, "f"),
]


def format_si(value: float | None, unit: str, digits: int = 4) -> str:
    """Format an SI value with an engineering prefix, e.g. ``(1.23e-7, "s")`` → ``"123 ns"``.

    Parameters
    ----------
    value
        The value in SI units; ``None`` or NaN gives ``"—"``.
    unit
        The unit symbol to append ("A", "C", "s", "A/s" ...).
    digits
        Significant digits.
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    if unit == "K":
        return f"{value - 273.15:.{max(digits - 2, 1)}f} °C"
    if value == 0:
        return f"0 {unit}".strip()
    magnitude = abs(value)
    scale, prefix = next(
        ((s, p) for s, p in _PREFIXES if magnitude >= s * 0.9995), _PREFIXES[-1]
    )
    scaled = value / scale
    text = f"{scaled:.{digits}g}"
    return f"{text} {prefix}{unit}".strip()


def kelvin_to_celsius(value: float) -> float:
    """Kelvin → degrees Celsius, for display."""
    return value - 273.15
