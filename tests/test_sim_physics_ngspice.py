"""The simulated double-pulse circuit against ngspice (an independent circuit simulator).

The same circuit — bus, loop stray inductance with its damping resistor, load inductor,
three-capacitor switch with a tanh channel law, and the diode as a Lauritzen-Ma behavioural
subcircuit (B-sources plus a capacitor holding qM/τ, IEEE Trans. Power Electronics 6(2), 1991)
whose depletion capacitance is ngspice's own junction-diode capacitance model — is written
as a netlist, simulated by ngspice from its operating point through the whole double pulse, and
measured with ngspice ``meas`` statements.  The load current at the second turn-on, the
falling zero crossing, Irrm and the reverse charge must agree within a few percent.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from spice import have_ngspice, run_ngspice

from benchrun.simulator.physics import (
    Fixture,
    LauritzenMaDiode,
    PulseTiming,
    SchottkyDiode,
    SwitchModel,
    first_pulse_for_current,
    simulate_double_pulse,
)

pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.skipif(not have_ngspice(), reason="ngspice not installed"),
]

SILICON = LauritzenMaDiode(
    tau_s=140e-9, tm_s=50e-9, is_A=1e-10, n=2.0, cj0_F=400e-12, vj_V=0.7, m=0.45,
    series_resistance_ohm=0.02,
)
SIC = SchottkyDiode(cj0_F=1.45e-9, vj_V=1.5, m=0.5)
# short load inductor so the whole double pulse lasts a few µs; stiff bus (ideal source)
FIXTURE = Fixture(load_inductance_H=20e-6, bus_capacitance_F=1.0)
EDGE_S = 0.5e-9  # gate-drive edge in ngspice (the Python model steps the drive; Rg·Ciss ≫ edge)


def netlist(fx: Fixture, sw: SwitchModel, diode, temperature_K: float, timing: PulseTiming,
            bus_V: float) -> str:
    jp = diode.at_temperature(temperature_K)
    t1, t2 = timing.first_pulse_s, timing.second_on_s
    on, off = sw.gate_on_V, sw.gate_off_V
    pwl = (f"PWL(0 {off} {EDGE_S} {on} {t1} {on} {t1 + EDGE_S} {off} {t2} {off} "
           f"{t2 + EDGE_S} {on})")
    if jp.is_charge_control:
        ijun = (f"({jp.is_A * jp.tau_s:.9e}*(exp(v(jj,p)/{jp.nvt_V:.9e})-1)"
                f"-{jp.tau_s:.9e}*v(xq))/{jp.tm_s:.9e}")
        charge = f"Cq xq 0 {jp.tau_s:.9e}\nBq 0 xq I={ijun}-v(xq)"
    else:
        ijun = f"{jp.is_A:.9e}*(exp(v(jj,p)/{jp.nvt_V:.9e})-1)"
        charge = ""
    w, gm = sw.overdrive_smoothing_V, sw.transconductance_S
    imax = f"max({gm}*{w}*ln(1+exp((v(g)-{sw.threshold_V})/{w})),1e-12)"
    return f"""
Vbus bus 0 {bus_V}
Ls bus p {fx.stray_inductance_H}
Rp bus p {fx.stray_damping_resistance_ohm}
Rl p x {fx.load_resistance_ohm}
Ll x m {fx.load_inductance_H}
Rs m j {jp.rs_ohm:.9e}
Cpar j p {fx.diode_parallel_capacitance_F}
Vsense j jj 0
Bj jj p I={ijun}
Dc jj p dcap
.model dcap D(IS=1e-30 CJO={jp.cj0_F:.9e} VJ={jp.vj_V} M={jp.m} FC={jp.fc})
{charge}
Vdrv drv 0 {pwl}
Rg drv g {sw.gate_resistance_ohm}
Cgs g 0 {sw.cgs_F}
Cgd g m {sw.cgd_F}
Cds m 0 {sw.cds_F}
Bch m 0 I={imax}*tanh(v(m)/({imax}*{sw.on_resistance_ohm}))+1e-9*v(m)
.options reltol=1e-5 abstol=1e-9 vntol=1e-6 chgtol=1e-16
"""


def compare(diode, temperature_K: float, sw: SwitchModel, current_A: float, window_s: float):
    timing = PulseTiming(first_pulse_for_current(FIXTURE, 600.0, current_A), 2e-6, 1.5e-6)
    t2 = timing.second_on_s
    t_stop = t2 + 0.8e-6
    spice = run_ngspice(
        netlist(FIXTURE, sw, diode, temperature_K, timing, 600.0),
        tran=f"tran 0.1n {t_stop} 0 0.1n",
        vectors=["i(vsense)"],
        measures=[
            f"meas tran ifwd find i(vsense) at={t2}",
            f"meas tran t0 when i(vsense)=0 fall=1 from={t2}",
            f"meas tran imin min i(vsense) from={t2} to={t_stop}",
            f"let tq = t0 + {window_s}",
            "meas tran qneg integ i(vsense) from=$&t0 to=$&tq",
        ],
        timeout_s=60,
    )
    wf = simulate_double_pulse(FIXTURE, sw, diode, timing, 600.0, temperature_K)
    m = (wf.t >= t2) & (wf.t <= t_stop)
    t, i = wf.t[m], wf.i_diode[m]
    k = int(np.argmax(i < 0))
    t0 = t[k - 1] - i[k - 1] * (t[k] - t[k - 1]) / (i[k] - i[k - 1])
    grid = np.linspace(t0, t0 + window_s, 40001)
    ig = np.interp(grid, wf.t, wf.i_diode)
    q = float(np.sum(0.5 * (ig[1:] + ig[:-1]) * np.diff(grid)))
    ours = {"ifwd": wf.current_at_second_turn_on_A, "t0": t0, "imin": float(i.min()), "qneg": q}
    return ours, spice.measures


@pytest.mark.parametrize(
    ("temperature_K", "rg", "current_A"), [(298.15, 22.0, 30.0), (398.15, 15.0, 20.0)]
)
def test_silicon_recovery_matches_ngspice(temperature_K, rg, current_A):
    ours, ref = compare(
        SILICON, temperature_K, SwitchModel(gate_resistance_ohm=rg), current_A, 4e-7
    )
    assert ours["ifwd"] == pytest.approx(ref["ifwd"], rel=0.01)
    assert ours["t0"] == pytest.approx(ref["t0"], abs=1e-9)
    assert ours["imin"] == pytest.approx(ref["imin"], rel=0.02)  # Irrm
    assert ours["qneg"] == pytest.approx(ref["qneg"], rel=0.02)  # Qrr


def test_schottky_capacitive_recovery_matches_ngspice():
    sw = dataclasses.replace(SwitchModel(), gate_resistance_ohm=10.0)
    ours, ref = compare(SIC, 298.15, sw, 20.0, 2e-7)
    assert ours["ifwd"] == pytest.approx(ref["ifwd"], rel=0.01)
    assert ours["imin"] == pytest.approx(ref["imin"], rel=0.05)
    assert ours["qneg"] == pytest.approx(ref["qneg"], rel=0.05)
