"""Window conventions of Qrr, Err and trr: which one a result was measured with, which one
a limit assumes, and whether they agree.

On the same silicon shot the conventions differ by 6-20 %, more than the measurement
uncertainty, so a limit is only comparable with results of its own convention:

- Qrr / Err window (``integration_window``): ``"fraction"``, from t0 to the return through
  ``integration_end_fraction·Irrm`` (2 % by default, IEC 60747-9 practice); ``"trr_end"``, from
  t0 to the trr end; ``"triangle"``, ``Qrr = ½·Irrm·trr`` (Err to the trr end).
- trr end (``trr_method``): ``"extrapolate"``, the line through ``fit_high`` and ``fit_low``
  of Irrm (0.9 / 0.25 by default, or 0.75 / 0.5; JESD282-B alternative 2); ``"threshold"``,
  the return through ``trr_threshold_fraction·Irrm`` (alternative 3).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

#: The defaults of :class:`benchrun.analysis.recovery.RecoveryOptions`.
DEFAULTS = {
    "integration_window": "fraction",
    "integration_end_fraction": 0.02,
    "trr_method": "extrapolate",
    "fit_high": 0.9,
    "fit_low": 0.25,
    "trr_threshold_fraction": 0.25,
}


@dataclass(frozen=True)
class Convention:
    """The window convention of a result or a limit (fields as in ``RecoveryOptions``)."""

    integration_window: str = "fraction"
    integration_end_fraction: float = 0.02
    trr_method: str = "extrapolate"
    fit_high: float = 0.9
    fit_low: float = 0.25
    trr_threshold_fraction: float = 0.25

    @classmethod
    def of(cls, options: Mapping[str, Any] | Any | None) -> Convention:
        """From ``RecoveryOptions``, its keyword mapping (a run's ``analysis_options``) or
        None (the defaults)."""
        if options is None:
            return cls()
        get = options.get if isinstance(options, Mapping) else (
            lambda k, d=None: getattr(options, k, d))
        values = {k: get(k, v) for k, v in DEFAULTS.items()}
        return cls(**{k: (DEFAULTS[k] if v is None else v) for k, v in values.items()})

    def key(self) -> tuple:
        """What must agree: only the parameters the chosen methods use."""
        window = (self.integration_window,)
        if self.integration_window == "fraction":
            window += (round(self.integration_end_fraction, 9),)
        if self.trr_method == "extrapolate":
            trr = ("extrapolate", round(self.fit_high, 9), round(self.fit_low, 9))
        else:
            trr = ("threshold", round(self.trr_threshold_fraction, 9))
        uses_trr = self.integration_window != "fraction"
        return window + trr + (uses_trr,)

    def describe(self) -> str:
        """One line for messages and the report."""
        if self.integration_window == "fraction":
            window = f"Qrr/Err from t0 to the return through {self.integration_end_fraction:g}·Irrm"
        elif self.integration_window == "trr_end":
            window = "Qrr/Err from t0 to the trr end"
        else:
            window = "Qrr = ½·Irrm·trr (triangle), Err from t0 to the trr end"
        if self.trr_method == "extrapolate":
            trr = f"trr end: line through {self.fit_high:g}/{self.fit_low:g}·Irrm"
        else:
            trr = f"trr end: return through {self.trr_threshold_fraction:g}·Irrm"
        return f"{window}; {trr}"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def mismatch(results: Convention, limit: Convention) -> str | None:
    """Why a limit of convention ``limit`` cannot grade results of ``results`` (or None)."""
    if results.key() == limit.key():
        return None
    return (f"the limits assume {limit.describe()}, the results were measured with "
            f"{results.describe()}: analyse with the limits' convention or use limits written "
            "for the results' one")
