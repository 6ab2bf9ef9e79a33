"""Standard uncertainty of each recovery metric from the capture itself.

The inputs are what the capture shows: the noise σ of each channel (measured on the forward
plateau, :func:`benchrun.analysis.events.robust_sigma`, which includes the quantisation of a
noisy 8-bit record; on a noise-free record the code step δ gives σ = δ/√12, GUM F.2.2.1), the
slope at every crossing and the samples behind every estimate. Instrument accuracy (gain,
probe tolerance) is not in here: the grading budget adds it (:mod:`benchrun.grading.uncertainty`).

Instants (first-order propagation, JCGM 100:2008 §5.1.2, inputs uncorrelated):

- a crossing found by a least-squares line through ``m`` samples with slope ``s``:
  ``u(t) = σ/(|s|·√m)``; found by interpolation: ``σ_loc/|s|`` (σ_loc the locator's noise,
  σ over the square root of its width); a rising crossing after the peak also carries
  ``σ_loc/|s|`` (the locator's first passage picks the samples of the line);
  a crossing of a level ``−f·Irrm`` also moves with Irrm: ``∂t/∂Irrm = −f/s``;
- the reverse-current peak: from the cubic fit's covariance and its model error, a
  rectangular bound as wide as the distance from the fitted peak to the most extreme raw
  sample under the fit (a smooth fit rounds a sharp corner off; GUM 4.3.7), or the
  median/sample fallback (:func:`benchrun.analysis.events.extremum_fit`);
- the integration end t2 when its level lies inside the noise (``end_in_noise``): the
  local slope there is not resolved, so ``σ/√m`` (m the samples behind the instant, at least
  the locator width) over the slope of an exponential tail through the peak and t2,
  ``f·Irrm·ln(1/f)/(t2 − t_Irrm)``, and the hold rule's delay, rectangular over its length
  (``hold·Δt/√12``); Irrm moves the level by ``f·u(Irrm)`` over that slope;
- each instant also carries ``Δt/√12`` when it is read on the sample grid (clean data).

Metrics: ``ta = t_irrm − t0``, ``tb = t_trr − t_irrm``, ``trr = t_trr − t0``; ``S = tb/ta``
with ``∂S/∂t0 = tb/ta²``, ``∂S/∂t_irrm = −trr/ta²``, ``∂S/∂t_trr = 1/ta``; the extrapolated
``t_trr = a·t_lo − b·t_hi`` with ``a = fh/(fh − fl)``, ``b = fl/(fh − fl)``.
``Qrr = −∫i dt`` over N samples of white noise: ``σ·Δt·√N``; end instant ``|i(t2)|·u(t2)``;
offset residual ``u(i0)·(t2 − t0)``. ``Err = ∫v·i dt``: ``σ_i·Δt·√Σv²`` and ``σ_v·Δt·√Σi²``,
end instant ``|v·i|(t2)·u(t2)``, offset residuals ``u(i0)·|∫v dt|`` and ``u(v0)·Qrr``.
The triangle convention ``½·Irrm·trr`` propagates u(Irrm) and u(trr).
"""

from __future__ import annotations

import math
from collections.abc import Mapping


def rss(*terms: float) -> float:
    """Root sum of squares."""
    return math.sqrt(math.fsum(t * t for t in terms))


def crossing_u(sigma: float, slope: float, count: int, sigma_locator: float,
               dt: float) -> float:
    """Standard uncertainty of a crossing instant (see the module docstring)."""
    if slope == 0.0 or not math.isfinite(slope):
        return dt / math.sqrt(12.0)
    if count > 0:
        return sigma / (abs(slope) * math.sqrt(count))
    return rss(sigma_locator / abs(slope), dt / math.sqrt(12.0))


def softness_u(ta: float, tb: float, u_t0: float, u_tirrm: float, u_ttrr: float) -> float:
    """u(S) for ``S = tb/ta``."""
    trr = ta + tb
    return rss(tb / ta**2 * u_t0, trr / ta**2 * u_tirrm, u_ttrr / ta)


def finite_u(u: Mapping[str, float | None]) -> dict[str, float | None]:
    """Copy with non-finite values replaced by None."""
    return {k: (float(v) if v is not None and math.isfinite(v) else None) for k, v in u.items()}
