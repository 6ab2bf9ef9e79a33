"""Numbers as the report prints them: SI prefixes, value with expanded uncertainty."""

from __future__ import annotations

_PREFIX = {"T": 1e12, "G": 1e9, "M": 1e6, "k": 1e3, "": 1.0, "m": 1e-3, "µ": 1e-6,
           "n": 1e-9, "p": 1e-12, "f": 1e-15}


def fmt(value: float | None, unit: str, digits: int = 4) -> str:
    """Display a SI value: engineering prefix, di/dt in A/µs, dimensionless plain."""
    import math

    from benchrun.units import format_si

    if value is None or not math.isfinite(value):
        return "—"
    if unit == "A/s":
        return f"{value / 1e6:.{digits}g} A/µs"
    if unit == "":
        return f"{value:.{digits}g}"
    return format_si(value, unit, digits)


def value_with_u(value: float, expanded_u: float | None, unit: str, digits: int = 3) -> str:
    """``value ± U`` with one shared prefix, e.g. ``102 ns ± 0.82 ns``."""
    import math

    text = fmt(value, unit, digits)
    if expanded_u is None or not math.isfinite(expanded_u):
        return text
    if unit == "":
        return f"{text} ± {expanded_u:.2g}"
    if unit == "A/s":
        return f"{value / 1e6:.{digits}g} ± {expanded_u / 1e6:.2g} A/µs"
    number, _, shown = text.partition(" ")
    prefix = shown[: len(shown) - len(unit)] if shown.endswith(unit) else ""
    scale = _PREFIX.get(prefix, 1.0)
    return f"{number} ± {expanded_u / scale:.2g} {shown}"
