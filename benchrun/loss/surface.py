"""Recovery loss from a fitted energy surface E(IF, VR, T, di/dt), averaged over a line cycle.

Energy surface
    The energy per commutation of every valid shot — ``E = Err + Esw,rec`` as
    :mod:`benchrun.loss.estimate` defines it (for a part declared capacitive the switch share
    only) — averaged per device and test point, and fitted with the separable surface of
    :mod:`benchrun.characterize.fits`::

        E = E_ref·(IF/IF_ref)^b_IF·(VR/VR_ref)^b_VR·(D/D_ref)^b_D·exp(c·(T − T_ref))

    by least squares in ln E, with the parameter covariance.  Devices not graded conforming
    are left out when grades are known.

Line-cycle average (sinusoidal PWM, one half-bridge leg, load current ``i(θ) = Î·sin θ``)
    The diode under test recovers at every carrier period of the half-cycle in which the load
    current flows through it (0 < θ < π) and not in the other, each time commutating the
    instantaneous current.  Averaged over the line period, one diode loses::

        P = fsw·(1/2π)·∫₀^π E(Î·sin θ) dθ = (fsw/2)·⟨E⟩_half
          = fsw·E(Î)·W(b_IF)/(2π),   W(b) = ∫₀^π sin^b θ dθ = √π·Γ((b+1)/2)/Γ(b/2+1)

    where ``⟨E⟩_half`` is the mean of E over the conducting half-cycle and ``E(Î)`` the surface
    at the peak current (VR, T and di/dt held at the given values).  ``fsw·⟨E⟩_half`` is the
    loss *while* the diode conducts, and the loss of the leg's two diodes together.  Source:
    the averaging of switching energies over a sinusoidal line current used for PWM inverter
    loss estimates (e.g. N. Mohan, T. Undeland, W. Robbins, *Power Electronics*, ch. 8; for
    b = 1 it gives the familiar P = fsw·E(Î)/π — from memory).  The Wallis closed form is
    standard (Abramowitz & Stegun 6.2 with the beta function).

    The modulation index does not enter: in continuous sinusoidal PWM with 0 < m ≤ 1 every
    carrier period holds exactly one commutation of the leg (the duty cycle stays strictly
    between 0 and 1), so the number of recoveries per half-cycle and the currents commutated
    are set by fsw and i(θ), not by m; m moves the commutation instant inside each carrier
    period only, which changes the commutated current by a fraction ~f_line/fsw.  m (and the
    load phase angle) set the conduction split between switch and diode, not part of this
    estimate.  Over-modulation (m > 1) drops pulses and is refused.  The di/dt is the one the
    user gives, the same at every instant of the cycle (a gate set-up that holds di/dt; with a
    fixed gate resistor di/dt varies with the commutated current and this is an approximation).

Uncertainty (GUM, JCGM 100:2008, 5.1.2 law of propagation, first order)
    ln P is linear in the fitted parameters apart from ln W(b_IF); its sensitivity vector is
    ``g = (1, ln(Î/IF_ref) + W′/W, ln(VR/VR_ref), ln(D/D_ref), T − T_ref)`` (held axes left
    out) and ``u(P) = P·√(gᵀ·Σ·g)`` with Σ the fit covariance.  The expanded uncertainty uses
    k = Student-t 97.5 % quantile at ν = n − p degrees of freedom (GUM G.3, a 95 % interval
    for a Type A evaluation with ν degrees of freedom).  It is the uncertainty of the
    lot-mean surface at that condition; one device scatters about it by the fit's residual
    standard deviation, reported alongside.  The uncertainty of the given VR, T and di/dt is
    not included.

Region of validity
    The measured range of each axis.  A condition more than ``MAX_OUTSIDE_REL`` (relative;
    VR, di/dt and the peak current) or ``MAX_OUTSIDE_K`` (temperature) outside it is refused
    (``ConfigError``, one line); nearer, it is used and flagged.  Currents below the lowest
    measured IF are unavoidable near the zero crossings: the share of the line-cycle energy
    from currents below and above the measured IF range is reported, and a result with more
    than ``MAX_OUTSIDE_ENERGY_FRACTION`` of its energy outside is refused.
"""

from __future__ import annotations

import math
from collections.abc import Collection, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import integrate, stats

from benchrun.characterize.fits import AXIS_SYMBOL, SurfaceFit, fit_surface, surface_points
from benchrun.errors import ConfigError
from benchrun.loss.estimate import shot_energy
from benchrun.loss.line_cycle import _dwallis_db, wallis
from benchrun.records import ShotResult
from benchrun.units import format_si

__all__ = [
    "MAX_OUTSIDE_ENERGY_FRACTION",
    "MAX_OUTSIDE_K",
    "MAX_OUTSIDE_REL",
    "EnergySurfaces",
    "SurfaceLineCycle",
    "energy_surfaces",
    "surface_line_cycle",
]

#: Farthest a requested VR, di/dt or peak current may lie beyond the measured range (relative)
#: before the estimate is refused; nearer it is flagged (our choice: about the spread of a
#: lot's recovery charge, so the extrapolation error stays below what the lot itself scatters).
MAX_OUTSIDE_REL = 0.10
#: The same for temperature, in kelvin (our choice: the usual tolerance of a test temperature).
MAX_OUTSIDE_K = 5.0
#: Largest share of the line-cycle energy allowed from currents outside the measured IF range.
MAX_OUTSIDE_ENERGY_FRACTION = 0.5
#: Confidence of the expanded uncertainty (two-sided).
CONFIDENCE = 0.95


@dataclass(frozen=True)
class EnergySurfaces:
    """Energy surfaces per part/lot, why others could not be fitted, and what was left out."""

    fits: tuple[SurfaceFit, ...]
    not_fitted: tuple[str, ...] = field(default=())
    rejected_excluded: bool = False
    capacitive_parts: tuple[str, ...] = field(default=())


def energy_surfaces(shots: Sequence[ShotResult], *, capacitive_parts: Collection[str] = (),
                    rejected: Collection[str] | None = None) -> EnergySurfaces:
    """Fit E(IF, VR, di/dt, T) per part/lot from the valid shots of not-rejected devices."""
    excluded = set(rejected or ())
    capacitive = set(capacitive_parts)
    by_part: dict[tuple[str, str], list[ShotResult]] = {}
    for s in shots:
        if s.serial not in excluded:
            by_part.setdefault((s.part, s.lot), []).append(s)
    fits: list[SurfaceFit] = []
    reasons: list[str] = []
    for (part, lot), members in by_part.items():
        counted = part not in capacitive

        def energy(s: ShotResult, counted: bool = counted) -> float | None:
            found = shot_energy(s.metrics)
            if found is None:
                return None
            err, switch, _basis = found
            return (err if counted else 0.0) + switch

        try:
            fits.append(fit_surface(surface_points(members, energy), quantity="energy_J",
                                    unit="J", part=part, lot=lot))
        except ValueError as exc:
            reasons.append(f"{part} {lot}: {exc}")
    return EnergySurfaces(tuple(fits), tuple(reasons), rejected is not None,
                          tuple(sorted(capacitive)))


@dataclass(frozen=True)
class SurfaceLineCycle:
    """Line-cycle average loss of one diode from an energy surface (module docstring).

    ``power_W[k]``, ``u_W[k]`` (expanded, ``coverage_factor``) belong to ``fsw_hz[k]``;
    ``u_W`` is None when the fit has no residual degrees of freedom.
    """

    fit: SurfaceFit
    peak_current_A: float
    vr_V: float
    temperature_K: float
    didt_A_per_s: float
    modulation: float | None
    fsw_hz: tuple[float, ...]
    energy_at_peak_J: float
    mean_energy_half_cycle_J: float
    power_W: tuple[float, ...]
    u_W: tuple[float, ...] | None
    coverage_factor: float | None
    relative_u: float | None
    below_range_fraction: float
    above_range_fraction: float
    flags: tuple[str, ...]

    @property
    def leg_power_W(self) -> tuple[float, ...]:  # noqa: N802 (SI unit suffix)
        """fsw·⟨E⟩_half: both diodes of the leg (or one diode while it conducts)."""
        return tuple(2.0 * p for p in self.power_W)


def _energy_fraction(b: float, lo: float, hi: float) -> float:
    """Share of ∫₀^π sin^b θ dθ from instants where lo < sin θ ≤ hi (0 ≤ lo ≤ hi ≤ 1)."""
    if hi <= lo:
        return 0.0
    t_lo, t_hi = math.asin(min(lo, 1.0)), math.asin(min(hi, 1.0))
    part, _ = integrate.quad(lambda t: math.sin(t) ** b, t_lo, t_hi, limit=200)
    return 2.0 * part / wallis(b)


def _check_axis(fit: SurfaceFit, axis: str, value: float, field_name: str) -> str | None:
    """None inside the measured range; a flag line when a little outside; ConfigError when
    far outside."""
    r = fit.range_of(axis)
    unit = {"temperature_K": "K", "vr_V": "V", "didt_A_per_s": "A/s",
            "forward_current_A": "A"}[axis]
    span = (format_si(r.minimum, unit, 4) if r.n_distinct < 2
            else f"{format_si(r.minimum, unit, 4)}–{format_si(r.maximum, unit, 4)}")
    outside = dict(fit.outside(**{axis: value}))
    if axis not in outside:
        return None
    excess = outside[axis]
    limit = MAX_OUTSIDE_K if axis == "temperature_K" else MAX_OUTSIDE_REL
    shown = f"{excess:.3g} K" if axis == "temperature_K" else f"{100 * excess:.0f} %"
    text = (f"{AXIS_SYMBOL[axis]} = {format_si(value, unit, 4)} lies {shown} outside the "
            f"measured {span} of {fit.part} {fit.lot}")
    if excess > limit:
        raise ConfigError(f"{text}; refused (more than "
                          + (f"{limit:g} K" if axis == "temperature_K" else f"{100 * limit:g} %")
                          + " outside would be extrapolation)", field=field_name)
    return text + " (extrapolated)"


def surface_line_cycle(
    fit: SurfaceFit,
    *,
    peak_current_A: float,
    vr_V: float,
    temperature_K: float,
    didt_A_per_s: float,
    fsw_hz: Sequence[float],
    modulation: float | None = None,
    confidence: float = CONFIDENCE,
) -> SurfaceLineCycle:
    """Average loss of one diode over a sinusoidal line cycle from ``fit`` (module docstring).

    Raises ``ConfigError`` for a condition far outside the fitted ranges or a modulation index
    outside 0 < m ≤ 1, ``ValueError`` for non-positive inputs.
    """
    for name, value in (("peak current", peak_current_A), ("VR", vr_V),
                        ("temperature", temperature_K), ("di/dt", didt_A_per_s)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name} must be positive, got {value!r}")
    freqs = tuple(float(f) for f in fsw_hz)
    if not freqs or any(not (math.isfinite(f) and f > 0) for f in freqs):
        raise ValueError("give one or more positive switching frequencies")
    if modulation is not None and not (0.0 < modulation <= 1.0):
        raise ConfigError(f"modulation index {modulation:g} is outside 0 < m <= 1 (linear "
                          "sinusoidal PWM; over-modulation drops pulses and is not modelled)",
                          field="--modulation")
    flags = [f for f in (
        _check_axis(fit, "vr_V", vr_V, "--vr"),
        _check_axis(fit, "temperature_K", temperature_K, "--temperature"),
        _check_axis(fit, "didt_A_per_s", didt_A_per_s, "--didt"),
    ) if f]
    i_range = fit.range_of("forward_current_A")
    b = fit.coefficient("forward_current_A") or 0.0
    if b <= -1.0:
        raise ConfigError(f"{fit.part} {fit.lot}: the fitted IF exponent {b:.2f} <= -1 makes "
                          "the line-cycle average diverge", field="--line-peak")
    if peak_current_A > i_range.maximum * (1.0 + MAX_OUTSIDE_REL):
        raise ConfigError(
            f"line peak {format_si(peak_current_A, 'A', 4)} is more than "
            f"{100 * MAX_OUTSIDE_REL:g} % above the highest measured IF "
            f"{format_si(i_range.maximum, 'A', 4)} of {fit.part} {fit.lot}; refused",
            field="--line-peak")
    below = _energy_fraction(b, 0.0, min(i_range.minimum / peak_current_A, 1.0))
    above = _energy_fraction(b, min(i_range.maximum / peak_current_A, 1.0), 1.0)
    if below + above > MAX_OUTSIDE_ENERGY_FRACTION:
        raise ConfigError(
            f"{100 * (below + above):.0f} % of the line-cycle energy at Î = "
            f"{format_si(peak_current_A, 'A', 4)} comes from currents outside the measured "
            f"IF {format_si(i_range.minimum, 'A', 4)}–{format_si(i_range.maximum, 'A', 4)} of "
            f"{fit.part} {fit.lot}; refused", field="--line-peak")
    if above > 0:
        flags.append(f"{100 * above:.1f} % of the energy from currents above the highest "
                     "measured IF (extrapolated)")
    if below > 0:
        flags.append(f"{100 * below:.1f} % of the energy from currents below the lowest "
                     "measured IF (extrapolated)")
    conditions = {"forward_current_A": peak_current_A, "vr_V": vr_V,
                  "temperature_K": temperature_K, "didt_A_per_s": didt_A_per_s}
    e_peak = float(fit.value(**conditions))
    w = wallis(b)
    mean_half = e_peak * w / math.pi
    powers = tuple(f * mean_half / 2.0 for f in freqs)
    u_w = k = rel = None
    if fit.covariance is not None and fit.dof > 0:
        g = fit.regressors(conditions).astype(float)
        if "forward_current_A" in fit.terms:
            g[1 + fit.terms.index("forward_current_A")] += _dwallis_db(b) / w
        rel = math.sqrt(max(float(g @ np.asarray(fit.covariance) @ g), 0.0))
        k = float(stats.t.ppf(0.5 + confidence / 2.0, fit.dof))
        u_w = tuple(k * rel * p for p in powers)
    return SurfaceLineCycle(
        fit=fit, peak_current_A=float(peak_current_A), vr_V=float(vr_V),
        temperature_K=float(temperature_K), didt_A_per_s=float(didt_A_per_s),
        modulation=modulation, fsw_hz=freqs, energy_at_peak_J=e_peak,
        mean_energy_half_cycle_J=mean_half, power_W=powers, u_W=u_w, coverage_factor=k,
        relative_u=rel, below_range_fraction=below, above_range_fraction=above,
        flags=tuple(flags))
