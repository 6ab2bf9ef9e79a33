"""Recovery loss averaged over a sinusoidal line cycle, from a power law fitted in IF (pure).

Model (stated with every result):

* Energy per commutation against forward current at one part/lot, temperature and VR (and the
  di/dt of the fixture): ``E(IF) = E_ref·(IF/I_ref)^b``, fitted by least squares on
  ``ln E = ln E_ref + b·ln(IF/I_ref)`` over the device means of the measured IF points
  (power-law trend of recovery charge and energy in IF: common practice in datasheet curves;
  ``I_ref`` is the geometric mean of the measured IF, which decorrelates the two parameters).
* Sinusoidal line current ``i(θ) = Î·sin θ``: the diode under test carries and recovers
  current during one half-cycle (0 < θ < π) and not during the other; one commutation per
  switching period while it conducts.  The average power over a line period is

      P = fsw·(1/2π)·∫₀^π E(Î·sin θ) dθ = fsw·E_ref·(Î/I_ref)^b·W(b)/(2π),
      W(b) = ∫₀^π sin^b θ dθ = √π·Γ((b + 1)/2)/Γ(b/2 + 1)   (Wallis integral)

  i.e. ``fsw`` times the mean of E over the conducting half-cycle, halved for the half-cycle in
  which the diode does not recover (textbook averaging of switching losses in a sinusoidal PWM
  inverter, e.g. N. Mohan, T. Undeland, W. Robbins, *Power Electronics*, ch. 8 — from memory).
  In sinusoidal PWM every carrier period has one commutation whatever the modulation index, so
  the switching-loss average does not depend on the modulation index (it matters for the
  conduction loss, which is not part of this estimate).
* Uncertainty: the fit's parameter covariance (residual variance, n − 2 degrees of freedom)
  propagated to P to first order (GUM, JCGM 100:2008, law of propagation of uncertainty),
  expanded with coverage factor k.  With two IF points there is no residual and no
  uncertainty (``u_W`` is None, and the result says so).
* Outside the measured IF range the power law is extrapolated: the fraction of the line cycle's
  energy that comes from currents above the highest measured IF is reported
  (``above_range_fraction``); the result is only as good as that fraction is small.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from benchrun.loss.estimate import LossTable

__all__ = ["LineCycleLoss", "PowerLawFit", "fit_power_law", "line_cycle_losses", "wallis"]


def wallis(b: float) -> float:
    """∫₀^π sin^b θ dθ = √π·Γ((b + 1)/2)/Γ(b/2 + 1) for b > −1 (Wallis integral)."""
    if b <= -1.0:
        raise ValueError("the integral diverges for b <= -1")
    return math.sqrt(math.pi) * math.exp(math.lgamma((b + 1.0) / 2.0) - math.lgamma(b / 2.0 + 1.0))


def _dwallis_db(b: float) -> float:
    """dW/db = W(b)·(ψ((b + 1)/2) − ψ(b/2 + 1))/2, by a central difference of ln W."""
    h = 1e-5
    return wallis(b) * (math.log(wallis(b + h)) - math.log(wallis(b - h))) / (2.0 * h)


@dataclass(frozen=True)
class PowerLawFit:
    """``E = e_ref·(I/i_ref)^b``; ``cov`` is the covariance of (ln e_ref, b) or None (n = 2)."""

    e_ref_J: float
    i_ref_A: float
    b: float
    n_points: int
    cov: tuple[tuple[float, float], tuple[float, float]] | None
    i_min_A: float
    i_max_A: float

    def energy(self, current_A: np.ndarray | float) -> np.ndarray | float:
        return self.e_ref_J * (np.asarray(current_A, dtype=float) / self.i_ref_A) ** self.b


def fit_power_law(currents_A: Sequence[float], energies_J: Sequence[float]) -> PowerLawFit:
    """Least-squares fit of ln E against ln(I/I_ref) (at least two distinct positive I)."""
    x = np.asarray(currents_A, dtype=float)
    y = np.asarray(energies_J, dtype=float)
    if x.size != y.size or x.size < 2 or np.unique(x).size < 2:
        raise ValueError("a power-law fit needs energies at two or more distinct currents")
    if np.any(x <= 0) or np.any(y <= 0):
        raise ValueError("currents and energies must be positive for a power-law fit")
    i_ref = float(np.exp(np.mean(np.log(x))))
    u = np.log(x / i_ref)
    v = np.log(y)
    sxx = float(np.sum(u * u))
    b = float(np.sum(u * (v - v.mean())) / sxx)
    a = float(v.mean())  # ln E_ref (u has zero mean)
    cov = None
    dof = x.size - 2
    if dof > 0:
        resid = v - (a + b * u)
        s2 = float(np.sum(resid**2) / dof)
        cov = ((s2 / x.size, 0.0), (0.0, s2 / sxx))
    return PowerLawFit(math.exp(a), i_ref, b, int(x.size), cov, float(x.min()), float(x.max()))


@dataclass(frozen=True)
class LineCycleLoss:
    """Line-cycle average loss of one part/lot at one temperature and VR."""

    part: str
    lot: str
    temperature_K: float
    vr_nominal_V: float
    peak_current_A: float
    fit: PowerLawFit
    power_W: tuple[float, ...]
    u_W: tuple[float, ...] | None  # expanded uncertainty (coverage factor k), or None
    coverage_factor: float
    above_range_fraction: float
    err_counted: bool


def _above_range_fraction(fit: PowerLawFit, peak_A: float) -> float:
    """Share of ∫ E(Î·sin θ) dθ over 0..π from instants where Î·sin θ > the highest measured IF."""
    if peak_A <= fit.i_max_A:
        return 0.0
    theta = np.linspace(0.0, math.pi, 20001)
    e = np.asarray(fit.energy(peak_A * np.sin(theta)))
    above = peak_A * np.sin(theta) > fit.i_max_A
    total = float(np.trapezoid(e, theta))
    return float(np.trapezoid(np.where(above, e, 0.0), theta) / total) if total > 0 else 0.0


def line_cycle_losses(
    table: LossTable, peak_current_A: float, *, coverage_factor: float = 2.0
) -> tuple[tuple[LineCycleLoss, ...], tuple[str, ...]]:
    """Line-cycle averages at ``table.fsw_hz`` per part/lot, temperature and VR.

    Returns the results and, for groups that cannot be fitted (one IF only), the reason.
    """
    if not (math.isfinite(peak_current_A) and peak_current_A > 0):
        raise ValueError("the line current's peak must be positive")
    by_key: dict[tuple, list] = {}
    for g in table.groups:
        by_key.setdefault((g.part, g.lot, g.temperature_K, g.vr_nominal_V), []).append(g)
    results: list[LineCycleLoss] = []
    reasons: list[str] = []
    for (part, lot, temp, vr), groups in by_key.items():
        currents = [g.if_nominal_A for g in groups]
        if len(set(currents)) < 2:
            reasons.append(f"{part} {lot} at {temp:.2f} K, {vr:g} V: one forward current only "
                           "(no IF dependence to fit)")
            continue
        fit = fit_power_law(currents, [g.energy_mean_J for g in groups])
        w = wallis(fit.b)
        mean_e = fit.e_ref_J * (peak_current_A / fit.i_ref_A) ** fit.b * w / (2.0 * math.pi)
        powers = tuple(f * mean_e for f in table.fsw_hz)
        u_w = None
        if fit.cov is not None:
            # ∂ln(mean E)/∂ln E_ref = 1, ∂ln(mean E)/∂b = ln(Î/I_ref) + W'(b)/W(b)
            d_b = math.log(peak_current_A / fit.i_ref_A) + _dwallis_db(fit.b) / w
            var_ln = fit.cov[0][0] + d_b * d_b * fit.cov[1][1]
            u_w = tuple(coverage_factor * p * math.sqrt(var_ln) for p in powers)
        results.append(LineCycleLoss(
            part=part, lot=lot, temperature_K=temp, vr_nominal_V=vr,
            peak_current_A=float(peak_current_A), fit=fit, power_W=powers, u_W=u_w,
            coverage_factor=coverage_factor,
            above_range_fraction=_above_range_fraction(fit, peak_current_A),
            err_counted=all(g.err_counted for g in groups),
        ))
    return tuple(results), tuple(reasons)
