"""The punch-through sweep-out diode against ngspice (an independent circuit simulator).

The diode (Lauritzen-Ma charge control, IEEE Trans. Power Electronics 6(2), 1991, with our
sweep-out extension, see benchrun.simulator.diode_models) is driven by an ideal falling
current ramp from steady forward conduction, through blocking and the sweep-out of its stored
charge up to punch-through.  ngspice integrates another formulation of the same equations:
it carries p = qM/(1 − f) instead of qM (dp/dt = i/(1 − f) − p/τ, sweep current
i_x = −p·df/dt with df/dt taken from a 1 F capacitor driven by f), and uses its own junction
capacitance model; our :func:`simulate_current_ramp` integrates qM with Cx = qM·|f′|/(1 − f).
Voltage, stored charge and the instant the voltage reaches −600 V must agree.
"""

from __future__ import annotations

import numpy as np
import pytest
from spice import charge_control_diode, have_ngspice, run_ngspice

from benchrun.simulator.physics import LauritzenMaDiode, simulate_current_ramp

pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.skipif(not have_ngspice(), reason="ngspice not installed"),
]

SNAPPY = LauritzenMaDiode(
    tau_s=100e-9, tm_s=30e-9, is_A=1e-10, n=2.0, cj0_F=400e-12, vj_V=0.7, m=0.45,
    tm_temp_exponent=1.5, punch_through_V=700.0,
)


def ramp_netlist(diode: LauritzenMaDiode, temperature_K: float, i_f: float, didt: float,
                 t_end: float) -> str:
    """The diode driven by an ideal current source falling from ``i_f`` at ``didt``."""
    return (f"Iin 0 a PWL(0 {i_f} {t_end} {i_f - didt * t_end})\n"
            + charge_control_diode(diode.at_temperature(temperature_K), i_f))


@pytest.mark.parametrize(("i_f", "didt", "temperature_K"),
                         [(10.0, 1e9, 298.15), (25.0, 2e9, 248.15), (5.0, 0.5e9, 373.15)])
def test_sweep_out_under_a_current_ramp_matches_ngspice(i_f, didt, temperature_K):
    jp = SNAPPY.at_temperature(temperature_K)
    t_end = 1.6 * i_f / didt + 60e-9
    ref = run_ngspice(ramp_netlist(SNAPPY, temperature_K, i_f, didt, t_end),
                      tran=f"tran 0.01n {t_end} 0 0.01n uic",
                      vectors=["v(a)", "v(xq)", "v(xf)"],
                      measures=["meas tran t600 when v(a)=-600 fall=1"], timeout_s=60)
    ours = simulate_current_ramp(SNAPPY, temperature_K, i_f, didt, t_end, dt_s=0.01e-9)
    t600 = ours.t[int(np.argmax(ours.v_junction < -600.0))]
    assert t600 == pytest.approx(ref.measures["t600"], abs=0.1e-9)
    q_ref = jp.tau_s * ref.vectors["v(xq)"] * (1.0 - ref.vectors["v(xf)"])
    q0 = jp.tau_s * i_f
    for frac in (0.5, 0.8, 0.95):  # before punch-through: along the ramp to t600
        tt = frac * ref.measures["t600"]
        assert np.interp(tt, ours.t, ours.v_junction) == pytest.approx(
            np.interp(tt, ref.time, ref.vectors["v(a)"]), rel=0.01, abs=0.01)
        assert np.interp(tt, ours.t, ours.q_stored_C) == pytest.approx(
            np.interp(tt, ref.time, q_ref), abs=0.005 * q0)
