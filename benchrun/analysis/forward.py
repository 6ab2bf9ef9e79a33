"""Forward conduction from the recovery capture: VF at IF and the diode's forward recovery (pure).

Definitions (SI units; times by linear interpolation between samples)
--------------------------------------------------------------------
VF at IF (``vf_V``)
    Median diode voltage over the forward plateau before the commutation: the samples before
    the recovery's ``t0`` whose current is within ``plateau_band`` (5 %) of ``if_A`` — the same
    plateau the recovery analysis takes IF from.  Its resolution is stated: ``vf_lsb_V`` is the
    voltage channel's step; a high-voltage probe range makes it coarse (an 8-bit 1 kV range
    resolves about 4 V, more than VF), and then the flag ``vf_coarse`` is set (step above
    ``coarse_fraction`` = 10 % of the value) — measure VF with a clamped channel instead.
Forward recovery at the diode's turn-on (``vfp_V``, ``tfr_s``)
    A turn-on is the diode current rising through 10 % and then 90 % of its final value
    ``IF_on`` (median of the last ``settle_fraction`` of the record after the event) while the
    voltage goes from reverse to forward.  ``vfp_V`` is the peak forward voltage after the
    current passes 10 %; ``tfr_s`` runs from the current's 10 % crossing to the last instant
    the voltage is above ``1.1·VF_on`` (VF_on: the settled forward voltage).  The 10 % start and
    the 1.1·VF end follow the usual forward-recovery test definition (IEC 60747-2 practice,
    from memory).  A capture without a turn-on (the usual recovery window, which ends before
    the second turn-off) gives ``None`` for both and no flag.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["ForwardMetrics", "analyze_forward"]

FLAG_VF_COARSE = "vf_coarse"


@dataclass(frozen=True)
class ForwardMetrics:
    """VF at IF and forward-recovery figures of one capture (None where not measurable)."""

    vf_V: float | None
    vf_lsb_V: float | None
    vfp_V: float | None
    tfr_s: float | None
    flags: tuple[str, ...] = field(default=())


def _cross(t: np.ndarray, y: np.ndarray, k: int, level: float) -> float:
    """Instant between samples k−1 and k where y passes ``level`` (linear interpolation)."""
    y0, y1 = float(y[k - 1]), float(y[k])
    if y1 == y0:
        return float(t[k])
    return float(t[k - 1] + (level - y0) * (t[k] - t[k - 1]) / (y1 - y0))


def _turn_on(t: np.ndarray, v: np.ndarray, i: np.ndarray, settle_fraction: float
             ) -> tuple[float | None, float | None]:
    n = len(i)
    tail = max(int(n * settle_fraction), 3)
    i_on = float(np.median(i[-tail:]))
    v_on = float(np.median(v[-tail:]))
    if i_on <= 0 or v_on <= 0:
        return None, None
    below = np.flatnonzero(i < 0.1 * i_on)
    if below.size == 0:
        return None, None
    start = int(below[-1]) + 1  # first sample above 10 % after the last one below
    if start >= n or float(np.min(v[: start + 1])) >= 0:
        return None, None  # never blocked before: no turn-on from reverse in this record
    k90 = np.flatnonzero(i[start:] >= 0.9 * i_on)
    if k90.size == 0:
        return None, None
    t10 = _cross(t, i, start, 0.1 * i_on)
    vfp = float(np.max(v[start:]))
    above = np.flatnonzero(v[start:] > 1.1 * v_on) + start
    if above.size == 0:
        return vfp, 0.0
    last = int(above[-1])
    t_end = _cross(t, v, last + 1, 1.1 * v_on) if last + 1 < n else float(t[last])
    return vfp, max(t_end - t10, 0.0)


def analyze_forward(
    t: np.ndarray,
    v: np.ndarray,
    i: np.ndarray,
    *,
    if_A: float | None,
    t0_s: float | None,
    voltage_lsb_V: float | None = None,
    plateau_band: float = 0.05,
    coarse_fraction: float = 0.10,
    settle_fraction: float = 0.05,
) -> ForwardMetrics:
    """VF at IF before the commutation at ``t0_s`` and forward recovery where a turn-on is seen.

    Parameters
    ----------
    t, v, i
        Time [s], diode voltage (anode to cathode) [V] and forward current [A], same length.
    if_A, t0_s
        Forward current on the plateau and the commutation's zero crossing, from the recovery
        analysis (``None``: VF is not measured).
    voltage_lsb_V
        The voltage channel's quantisation step (``None``: unknown, no coarseness check).
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    i = np.asarray(i, dtype=float)
    if not (t.shape == v.shape == i.shape) or t.ndim != 1 or t.size < 3:
        raise ValueError("t, v and i must be 1-D arrays of the same length (>= 3)")
    flags: list[str] = []
    vf = None
    if if_A is not None and t0_s is not None and if_A > 0:
        on_plateau = (t < t0_s) & (np.abs(i - if_A) <= plateau_band * if_A)
        if np.count_nonzero(on_plateau) >= 3:
            vf = float(np.median(v[on_plateau]))
            if voltage_lsb_V is not None and voltage_lsb_V > coarse_fraction * abs(vf):
                flags.append(FLAG_VF_COARSE)
    vfp, tfr = _turn_on(t, v, i, settle_fraction)
    return ForwardMetrics(vf_V=vf, vf_lsb_V=voltage_lsb_V, vfp_V=vfp, tfr_s=tfr,
                          flags=tuple(flags))
