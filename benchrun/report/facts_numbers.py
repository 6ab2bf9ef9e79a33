"""Numbers as the report prints them.

* A value with its expanded uncertainty follows JCGM 100:2008 (GUM) 7.2.6: U is given to two
  significant digits at most, and the value is rounded to the same decimal place.
* One unit prefix per table column (:func:`column_scale`): the prefix is chosen once from the
  largest magnitude in the column and written in the header, cells hold bare numbers.
* Never an exponent ("1.02e+03"): numbers are written in fixed-point after the prefix scaling.
* di/dt is shown in A/µs (the trade's unit), temperatures in °C, dimensionless values bare.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

#: Engineering prefixes, largest first (SI brochure, 9th edition, table 7).
_PREFIXES = ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"),
             (1e-6, "µ"), (1e-9, "n"), (1e-12, "p"), (1e-15, "f"))


def _finite(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) \
        and math.isfinite(value)


def column_scale(values: Iterable[float | None], unit: str) -> tuple[float, str]:
    """The divisor and the displayed unit for a column of SI values in ``unit``.

    The prefix follows the largest finite magnitude, so that no cell needs more than three
    digits before the decimal point; ``A/s`` is always shown in A/µs, ``K`` in °C (offset
    applied by :func:`scaled`), dimensionless values unscaled.
    """
    if unit == "A/s":
        return 1e6, "A/µs"
    if unit == "K":
        return 1.0, "°C"
    if unit in ("", "1"):
        return 1.0, ""
    finite = [abs(float(v)) for v in values if _finite(v) and v != 0]
    if not finite:
        return 1.0, unit
    largest = max(finite)
    for scale, prefix in _PREFIXES:
        if largest >= scale * 0.9995:
            return scale, prefix + unit
    return _PREFIXES[-1][0], _PREFIXES[-1][1] + unit


def scaled(value: float, scale: float, unit: str) -> float:
    """``value`` (SI) in the displayed unit of :func:`column_scale`."""
    if unit == "K":
        return value - 273.15
    return value / scale


def fixed(value: float, decimals: int) -> str:
    """Fixed-point text with ``decimals`` places (never an exponent; no ``-0``)."""
    decimals = max(decimals, 0)
    text = f"{round(value, decimals):.{decimals}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def significant(value: float, digits: int = 4) -> str:
    """``value`` to ``digits`` significant digits in fixed-point (never an exponent)."""
    if not _finite(value):
        return "—"
    if value == 0:
        return "0"
    decimals = digits - 1 - math.floor(math.log10(abs(value)))
    if decimals < 0:
        step = 10 ** (-decimals)
        return fixed(round(value / step) * step, 0)
    return fixed(value, decimals)


def gum_pair(value: float, uncertainty: float) -> tuple[str, str]:
    """Value and U as GUM 7.2.6 writes them: U to two significant digits, value to match."""
    if not _finite(uncertainty) or uncertainty <= 0:
        return significant(value, 4), ""
    decimals = 1 - math.floor(math.log10(abs(uncertainty)))
    if decimals < 0:
        step = 10 ** (-decimals)
        return fixed(round(value / step) * step, 0), fixed(round(uncertainty / step) * step, 0)
    return fixed(value, decimals), fixed(uncertainty, decimals)


def fmt(value: float | None, unit: str, digits: int = 4) -> str:
    """One SI value with its own prefix, e.g. ``123.4 ns``; di/dt in A/µs; ``—`` for none."""
    if not _finite(value):
        return "—"
    scale, shown = column_scale([value], unit)
    text = significant(scaled(float(value), scale, unit), digits)  # type: ignore[arg-type]
    return f"{text} {shown}".strip()


def value_with_u(value: float | None, expanded_u: float | None, unit: str,
                 scale: float | None = None) -> str:
    """``value ± U`` in the column's unit (GUM 7.2.6 rounding), without the unit itself.

    ``scale`` is the column divisor from :func:`column_scale`; by default the value's own.
    """
    if not _finite(value):
        return "—"
    if scale is None:
        scale, _ = column_scale([value], unit)
    shown_value = scaled(float(value), scale, unit)  # type: ignore[arg-type]
    if not _finite(expanded_u):
        return significant(shown_value, 4)
    number, u_text = gum_pair(shown_value, float(expanded_u) / scale)  # type: ignore[arg-type]
    return f"{number} ± {u_text}" if u_text else number


def value_with_u_unit(value: float | None, expanded_u: float | None, unit: str) -> str:
    """``value ± U unit`` with one prefix for both (GUM 7.2.6 rounding)."""
    if not _finite(value):
        return "—"
    scale, shown = column_scale([value], unit)
    return f"{value_with_u(value, expanded_u, unit, scale)} {shown}".strip()


def in_column(value: float | None, scale: float, unit: str, digits: int = 4) -> str:
    """A bare number in a column's unit (``—`` for none)."""
    if not _finite(value):
        return "—"
    return significant(scaled(float(value), scale, unit), digits)  # type: ignore[arg-type]


def percent(fraction: float | None, digits: int = 3) -> str:
    """A fraction as a percentage, e.g. ``0.015`` → ``1.5 %``."""
    if not _finite(fraction):
        return "—"
    return f"{significant(float(fraction) * 100, digits)} %"  # type: ignore[arg-type]
