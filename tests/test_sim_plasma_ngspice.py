"""The snappy diode (plasma-extent law) against ngspice in a reduced recovery circuit.

Model: Lauritzen-Ma charge control (IEEE Trans. Power Electronics 6(2), 1991) with our
sweep-out and plasma-extent extensions (benchrun.simulator.diode_models): the depletion layer
runs out of plasma at Vex = Vpt·Q0/(Q0 + Q_h).  Circuit: the diode, conducting IF, is switched
onto a source of −VR through a loop inductance L, Cp across the diode
(:func:`simulate_inductive_recovery`).  ngspice (an independent circuit simulator, from
Debian) integrates another formulation of the same equations: it carries the plasma density
p = qM/(1 − f) (dp/dt = i/(1 − f) − p/τ), takes the sweep current −p·df/dt with df/dt from a
1 F capacitor driven by f, and uses its own junction-capacitance model.  Peak reverse
current, peak reverse voltage and its instant, and the current along the recovery must agree.
"""

from __future__ import annotations

import numpy as np
import pytest
from spice import charge_control_diode, have_ngspice, run_ngspice

from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.physics import simulate_inductive_recovery

pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.skipif(not have_ngspice(), reason="ngspice not installed"),
]

DIODE = load_virtual_parts().part("DX-4425").nominal_model()
LOOP_H = 200e-9
PARALLEL_F = 60e-12  # capacitance across the diode (layout, probe), as in the fixture


def netlist(temperature_K: float, i_f: float, vr: float) -> str:
    """The diode, conducting ``i_f``, switched onto −``vr`` through the loop inductance."""
    jp = DIODE.at_temperature(temperature_K)
    jp = jp.at_stored_charge(jp.tau_s * i_f)  # the plasma extent of this recovery (Vex)
    return (f"Vr src 0 DC {-vr}\nRs src m {jp.rs_ohm}\nL1 m a {LOOP_H} ic={i_f}\n"
            f"Cp a 0 {PARALLEL_F}\n" + charge_control_diode(jp, i_f))


@pytest.mark.parametrize(("i_f", "vr", "temperature_K"), [
    (3.0, 800.0, 233.15),    # worst case: 10 % of rated current, cold, high VR (snaps)
    (30.0, 600.0, 298.15),   # nominal: rated current (soft)
])
def test_recovery_in_an_inductive_loop_matches_ngspice(i_f, vr, temperature_K):
    t_end = i_f * LOOP_H / vr + 120e-9
    ref = run_ngspice(netlist(temperature_K, i_f, vr),
                      tran=f"tran 0.01n {t_end} 0 0.01n uic",
                      vectors=["i(l1)", "v(a)"],
                      measures=["meas tran irrm min i(l1)", "meas tran vmin min v(a)"],
                      timeout_s=50)
    ours = simulate_inductive_recovery(DIODE, temperature_K, i_f, vr, LOOP_H, t_end,
                                       parallel_capacitance_F=PARALLEL_F, dt_s=0.01e-9)
    irrm = -float(ours.i.min())
    assert irrm == pytest.approx(-ref.measures["irrm"], rel=0.02)
    k = int(np.argmin(ours.v_junction))
    assert float(ours.v_junction[k]) == pytest.approx(ref.measures["vmin"], rel=0.02)
    assert float(ours.t[k]) == pytest.approx(ref.at["vmin"], abs=0.3e-9)
    # the current along the recovery, on ngspice's time points up to the voltage peak
    mask = ref.time < ref.at["vmin"]
    ours_i = np.interp(ref.time[mask], ours.t, ours.i)
    assert np.max(np.abs(ours_i - ref.vectors["i(l1)"][mask])) < 0.02 * irrm
