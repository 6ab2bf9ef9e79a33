"""Line-cycle average of the recovery loss from a power law fitted in IF.

References: Wallis integral ∫₀^π sin^b θ dθ = √π·Γ((b+1)/2)/Γ(b/2+1) (standard, e.g.
Abramowitz & Stegun 6.1 with the beta function); checked against scipy.integrate.quad (an
independent general-purpose integrator). Averaging P = fsw·(1/2π)∫₀^π E(Î sin θ) dθ: textbook
switching-loss averaging over a sinusoidal line cycle (from memory, as stated in the module).
Least-squares line and its parameter variances: elementary regression (s²/n, s²/Sxx).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from benchrun.loss import estimate_losses
from benchrun.loss.line_cycle import fit_power_law, line_cycle_losses, wallis
from benchrun.records import ShotResult, TestPoint


@pytest.mark.parametrize("b", [0.0, 1.0, 1.3, 2.0, 0.55])
def test_wallis_against_quadrature(b):
    ref, _ = quad(lambda t: math.sin(t) ** b, 0.0, math.pi)
    assert wallis(b) == pytest.approx(ref, rel=1e-9)
    # known values: W(0) = π, W(1) = 2, W(2) = π/2
    assert wallis(0.0) == pytest.approx(math.pi) and wallis(1.0) == pytest.approx(2.0)
    assert wallis(2.0) == pytest.approx(math.pi / 2)


def test_fit_recovers_an_exact_power_law():
    i = np.array([5.0, 10.0, 20.0, 40.0])
    fit = fit_power_law(i, 3e-6 * (i / 10.0) ** 1.4)
    assert fit.b == pytest.approx(1.4)
    assert fit.energy(10.0) == pytest.approx(3e-6)
    assert fit.cov is not None and fit.cov[1][1] == pytest.approx(0.0, abs=1e-20)
    assert fit_power_law([10.0, 20.0], [1e-6, 2e-6]).cov is None  # no residual dof


def _shot(i_f: float, energy: float, serial: str = "S1") -> ShotResult:
    return ShotResult(
        run_id="R", part="DX-4417", lot="LT-0117", serial=serial,
        point=TestPoint(index=0, temperature_K=398.15, bus_voltage_V=600.0,
                        forward_current_A=i_f),
        repeat=0, attempt=0, timestamp="2031-01-01T00:00:00Z",
        conditions={"if_A": i_f, "didt_A_per_s": 1e9, "vr_V": 600.0},
        metrics={"err_J": 0.25 * energy, "eon_recovery_J": 0.75 * energy}, valid=True,
    )


def test_line_cycle_average_against_direct_quadrature_and_uncertainty():
    rng = np.random.default_rng(3)
    currents = [6.0, 12.0, 24.0, 30.0]
    shots = [_shot(i, 40e-6 * (i / 12.0) ** 1.3 * (1 + 0.03 * rng.standard_normal()), f"S{k}")
             for k, i in enumerate(currents)]
    table = estimate_losses(shots, [20e3])
    (res,), reasons = line_cycle_losses(table, 28.0)
    assert reasons == ()
    fit = res.fit
    direct, _ = quad(lambda t: float(fit.energy(28.0 * math.sin(t))), 0.0, math.pi)
    # quad is accurate to ~1e-7 here (sin^b has an unbounded derivative at the ends)
    assert res.power_W[0] == pytest.approx(20e3 * direct / (2 * math.pi), rel=1e-6)
    # the fit is within a few % of the generating law, and the uncertainty covers it
    true = 20e3 * 40e-6 * (28.0 / 12.0) ** 1.3 * wallis(1.3) / (2 * math.pi)
    assert res.u_W is not None and abs(res.power_W[0] - true) < res.u_W[0]
    assert res.above_range_fraction == 0.0


def test_one_current_only_is_a_reason_and_above_range_is_reported():
    table = estimate_losses([_shot(20.0, 50e-6)], [20e3])
    results, reasons = line_cycle_losses(table, 30.0)
    assert results == () and "one forward current only" in reasons[0]
    two = estimate_losses([_shot(10.0, 20e-6), _shot(20.0, 50e-6)], [20e3])
    (res,), _ = line_cycle_losses(two, 40.0)
    assert res.u_W is None
    assert 0.3 < res.above_range_fraction < 1.0
