"""Switch turn-on energy and its recovery part against ngspice (an independent circuit simulator).

Each circuit is a double-pulse fixture — bus, loop stray inductance with a damping resistor,
load inductor, fixture capacitance across the diode, a low-side switch whose drain voltage falls
on a Miller plateau — run with ``ngspice -b`` twice: once with the real diode and once with a
charge-free diode (same static law, TT = 0, CJO ≈ 0). ngspice itself finds each run's window
(switch current rising through 10 % of the load current, switch voltage falling through 2 % of
its off-state value, ``meas ... when``) and integrates v·i over it (``meas ... integ``). The
reference recovery part is Eon(real) − Eon(charge-free). Our analysis sees only what a bench
captures of the real run: the diode voltage and current and the switch voltage.

Switches: SPICE level-1 MOSFET with external Cgs/Cgd/Cds (square-law channel); a behavioural
switch with a linear channel (B-source) and the same three capacitances; ngspice's VDMOS model
(non-linear Cgd). Diodes: SPICE junction diode with transit time TT (charge storage), the
Lauritzen–Ma charge-control diode as a B-source subcircuit (IEEE Trans. Power Electronics 6(2),
1991), and a capacitive-only (Schottky-like) diode.

``TUNING`` are circuits the model was developed on; ``HELD_OUT`` were written after the model
was fixed and never used to change it. Targets: within 15 % of the ngspice recovery part for
stored-charge diodes, 25 % for capacitive ones.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest
from spice import have_ngspice, resample, run_ngspice

from benchrun.analysis.recovery import analyze_recovery
from benchrun.analysis.switching import analyze_switch_turn_on, switch_current_from_diode

pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.slow,
    pytest.mark.skipif(not have_ngspice(), reason="ngspice not installed"),
]

L_LOAD = 100e-6
T_FIRST_ON = 20e-9
T_OFF = 0.5e-6
EDGE = 2e-9
VGG = 15.0
VTH = 4.0

SWITCHES = {
    # square-law MOSFET, slow Miller fall
    "mos-slow": ("mos1", dict(kp=4, cgs=2e-9, cgd=150e-12, cds=200e-12)),
    # square-law MOSFET, fast fall
    "mos-fast": ("mos1", dict(kp=8, cgs=5e-9, cgd=40e-12, cds=150e-12)),
    # linear channel, large Cgs (like benchrun's simulated bench)
    "lin-a": ("lin", dict(gm=12, cgs=10e-9, cgd=50e-12, cds=200e-12)),
    "lin-b": ("lin", dict(gm=25, cgs=4e-9, cgd=80e-12, cds=300e-12)),
    # ngspice VDMOS: Cgd from CGDMAX at low to CGDMIN at high drain voltage
    "vdmos": ("vdmos", dict(kp=10, cgs=3e-9, cgdmax=1.5e-9, cgdmin=30e-12, cjo=400e-12)),
}


@dataclass(frozen=True)
class Circuit:
    name: str
    vbus: float
    current: float
    stray: float
    rg: float
    switch: str
    diode: tuple  # ("tt", TT, CJO) | ("lm", tau, TM, CJO) | ("cap", CJO, VJ, M)

    @property
    def capacitive(self) -> bool:
        return self.diode[0] == "cap"


def _si(tt):
    return ("tt", tt, 300e-12)


def _lm(tau, tm):
    return ("lm", tau, tm, 400e-12)


def _cap(cjo, vj=1.5, m=0.5):
    return ("cap", cjo, vj, m)


TUNING = [
    Circuit("tune-mos-slow-si", 400, 20, 30e-9, 15, "mos-slow", _si(40e-9)),
    Circuit("tune-lin-a-lm", 600, 20, 40e-9, 10, "lin-a", _lm(140e-9, 50e-9)),
    Circuit("tune-lin-a-cap", 600, 20, 40e-9, 10, "lin-a", _cap(1.45e-9)),
    Circuit("tune-mos-fast-cap", 600, 30, 20e-9, 5, "mos-fast", _cap(1e-9)),
    Circuit("tune-lin-a-snap", 800, 20, 100e-9, 20, "lin-a", _si(60e-9)),
]
HELD_OUT = [
    Circuit("held-lin-a-si", 500, 18, 45e-9, 18, "lin-a", _si(50e-9)),
    Circuit("held-vdmos-lm", 600, 28, 25e-9, 7, "vdmos", _lm(80e-9, 35e-9)),
    Circuit("held-mos-slow-si", 380, 42, 20e-9, 9, "mos-slow", _si(35e-9)),
    Circuit("held-lin-b-lm", 720, 16, 65e-9, 9, "lin-b", _lm(120e-9, 45e-9)),
    Circuit("held-lin-a-cap", 600, 20, 40e-9, 10, "lin-a", _cap(1.2e-9, 1.4, 0.48)),
    Circuit("held-mos-fast-cap", 420, 22, 55e-9, 14, "mos-fast", _cap(0.9e-9)),
    Circuit("held-vdmos-cap", 680, 33, 30e-9, 7, "vdmos", _cap(1.8e-9, 1.6, 0.52)),
    Circuit("held-lin-b-cap", 330, 14, 12e-9, 11, "lin-b", _cap(1.1e-9)),
]


def _switch_lines(key: str) -> str:
    kind, p = SWITCHES[key]
    if kind == "mos1":
        return (f"Cgs g 0 {p['cgs']}\nCgd g d {p['cgd']}\nCds d 0 {p['cds']}\n"
                "M1 d g 0 0 NMOD L=1 W=1\n"
                f".model NMOD NMOS(LEVEL=1 VTO={VTH} KP={p['kp']} LAMBDA=0.001)")
    if kind == "vdmos":
        return ("M1 d g 0 NVD\n"
                f".model NVD VDMOS(VTO={VTH} KP={p['kp']} RD=20m CGDMAX={p['cgdmax']} "
                f"CGDMIN={p['cgdmin']} A=1 CGS={p['cgs']} CJO={p['cjo']} RB=1 IS=1e-12)")
    gm = p["gm"]
    ov = f"max(v(g)-{VTH},0)"
    return (f"Cgs g 0 {p['cgs']}\nCgd g d {p['cgd']}\nCds d 0 {p['cds']}\n"
            f"Bch d 0 I={gm}*{ov}*tanh(v(d)/(max({gm}*{ov},1e-6)*0.05+1e-6))+1e-9*v(d)")


def _diode_lines(diode: tuple, charge_free: bool) -> str:
    kind = diode[0]
    if charge_free:
        # same static law class, no stored charge, (almost) no capacitance
        n, is_ = (1.05, 1e-14) if kind == "cap" else (1.5, 1e-12)
        return (f"D1 da p DFREE\n.model DFREE D(IS={is_} N={n} RS=5m TT=0 CJO=1e-15)")
    if kind == "tt":
        _, tt, cjo = diode
        return (f"D1 da p DMOD\n"
                f".model DMOD D(IS=1e-12 N=1.5 RS=5m TT={tt} CJO={cjo} VJ=0.7 M=0.4)")
    if kind == "cap":
        _, cjo, vj, m = diode
        return (f"D1 da p DMOD\n"
                f".model DMOD D(IS=1e-14 N=1.05 RS=5m TT=0 CJO={cjo} VJ={vj} M={m})")
    # Lauritzen–Ma: i = (qE − qM)/TM, dqM/dt = i − qM/τ, qE = Is·τ·(exp(v/nVT) − 1);
    # the node voltage of a capacitor τ holds qM/τ
    _, tau, tm, cjo = diode
    nvt = 2.0 * 0.025852
    ijun = f"({1e-10 * tau:.6e}*(exp(v(jj,p)/{nvt:.6e})-1)-{tau:.6e}*v(xq))/{tm:.6e}"
    return (f"Rsd da jj 0.02\nBj jj p I={ijun}\nDc jj p DCAP\n"
            f".model DCAP D(IS=1e-30 CJO={cjo} VJ=0.7 M=0.45)\n"
            f"Cq xq 0 {tau:.6e}\nBq 0 xq I={ijun}-v(xq)")


def _simulate(c: Circuit, charge_free: bool):
    t1 = L_LOAD * c.current / c.vbus  # first pulse t1 = L·I/Vbus (DESIGN.md §4)
    t2 = T_FIRST_ON + t1 + T_OFF
    t_stop = t2 + 0.6e-6
    pwl = (f"PWL(0 0 {T_FIRST_ON} 0 {T_FIRST_ON + EDGE} {VGG} {T_FIRST_ON + t1} {VGG} "
           f"{T_FIRST_ON + t1 + EDGE} 0 {t2} 0 {t2 + EDGE} {VGG})")
    circuit = f"""Vbus bus 0 DC {c.vbus}
Lstray bus p {c.stray}
Rp bus p 20
Lload p sw {L_LOAD}
Vdi sw da DC 0
{_diode_lines(c.diode, charge_free)}
Cpar sw p 50p
Vsense sw d DC 0
{_switch_lines(c.switch)}
Rg gp g {c.rg}
Vg gp 0 {pwl}
.options method=gear reltol=1e-4 abstol=1e-8 vntol=1e-5
"""
    t_pre = t2 - 5e-9
    measures = [
        f"meas tran ifl find i(vdi) at={t_pre}",
        f"meas tran vpre find v(d) at={t_pre}",
        "let ith = 0.1*ifl",
        "let vth = 0.02*vpre",
        f"meas tran tstart when i(vsense)=$&ith rise=1 td={t_pre}",
        f"meas tran tend when v(d)=$&vth fall=1 td={t_pre}",
        "let psw = v(d)*i(vsense)",
        "meas tran eon integ psw from=$&tstart to=$&tend",
    ]
    return run_ngspice(circuit, tran=f"tran 0.05n {t_stop} {t2 - 0.3e-6} 0.1n",
                       vectors=["v(d)", "i(vsense)", "i(vdi)", "v(sw,p)"],
                       measures=measures, timeout_s=30.0)


@pytest.fixture(scope="module")
def runs():
    """Each (circuit, diode) pair simulated once per module."""
    cache: dict = {}

    def get(c: Circuit, charge_free: bool = False):
        key = (c.name, charge_free)
        if key not in cache:
            cache[key] = _simulate(c, charge_free)
        return cache[key]

    return get


def _captured(result, dt=0.1e-9):
    """The bench's view of a run on a uniform grid: switch voltage, diode current and voltage."""
    t, v_sw = resample(result.time, result.vectors["v(d)"], dt)
    _, i_d = resample(result.time, result.vectors["i(vdi)"], dt)
    _, v_d = resample(result.time, result.vectors["v(sw,p)"], dt)
    _, i_sw = resample(result.time, result.vectors["i(vsense)"], dt)
    return t, v_sw, i_d, v_d, i_sw


def _ours(result):
    t, v_sw, i_d, v_d, _ = _captured(result)
    rec = analyze_recovery(t, v_d, i_d)
    return rec, analyze_switch_turn_on(t, v_sw, switch_current_from_diode(i_d, rec.if_A), rec)


@pytest.mark.parametrize("circuit", TUNING[:3], ids=lambda c: c.name)
def test_eon_window_and_integral_match_ngspice_meas(runs, circuit):
    # with the simulator's own switch current: window and integral as ngspice's meas
    # (0.5 % of the window on the instants, 1 % on the energy: the export is linearised onto
    # a 0.1 ns grid while meas integrates on the solver's own time points)
    sim = runs(circuit)
    t, v_sw, i_d, v_d, i_sw = _captured(sim)
    rec = analyze_recovery(t, v_d, i_d)
    assert rec.if_A == pytest.approx(sim.measures["ifl"], rel=0.01)
    m = analyze_switch_turn_on(t, v_sw, i_sw, rec)
    width = sim.measures["tend"] - sim.measures["tstart"]
    assert m.t_eon_start_s == pytest.approx(sim.measures["tstart"], abs=0.005 * width)
    assert m.t_eon_end_s == pytest.approx(sim.measures["tend"], abs=0.005 * width)
    assert m.eon_J == pytest.approx(sim.measures["eon"], rel=0.01)
    # with i_sw = IF − i_diode, as the pipeline builds it: within 3 % (the load current grows
    # by ∫(Vbus − v_sw)/L dt and the fixture-capacitance current is not in i_diode)
    _, m2 = _ours(sim)
    assert m2.eon_J == pytest.approx(sim.measures["eon"], rel=0.03)


def _check_recovery_part(runs, circuit):
    real, free = runs(circuit), runs(circuit, charge_free=True)
    reference = real.measures["eon"] - free.measures["eon"]
    _, m = _ours(real)
    tolerance = 0.25 if circuit.capacitive else 0.15
    assert m.eon_recovery_J == pytest.approx(reference, rel=tolerance), (
        f"{circuit.name}: ours {m.eon_recovery_J * 1e6:.1f} µJ, "
        f"ngspice {reference * 1e6:.1f} µJ")
    # the ideal-diode turn-on is the rest of Eon: positive and below the measured Eon
    assert 0 < m.eon_ideal_J < m.eon_J
    return reference, m


@pytest.mark.parametrize("circuit", TUNING, ids=lambda c: c.name)
def test_recovery_part_on_tuning_circuits(runs, circuit):
    _check_recovery_part(runs, circuit)


@pytest.mark.parametrize("circuit", HELD_OUT, ids=lambda c: c.name)
def test_recovery_part_on_held_out_circuits(runs, circuit):
    _check_recovery_part(runs, circuit)


def test_capacitive_part_near_charge_balance(runs):
    # physics of a capacitive diode: the switch passes the charge Qc while it holds
    # Vbus − v_r, i.e. ∫ (Vbus − v)·C(v) dv = Vbus·Qc − Ec (bus charge minus the energy left in
    # the diode capacitance), plus the delay of the fall, which only adds. With
    # C(v) = CJO/(1 + v/VJ)^M: Qc = CJO·VJ·((1 + V/VJ)^(1−M) − 1)/(1 − M) (integral worked by
    # hand). ngspice's part and ours must both lie above Vbus·Qc − Ec.
    circuit = TUNING[2]
    _, cjo, vj, m_exp = circuit.diode
    vbus = circuit.vbus

    def cap(v):
        return cjo / (1 + v / vj) ** m_exp

    grid = np.linspace(0.0, vbus, 20001)
    qc = cjo * vj * ((1 + vbus / vj) ** (1 - m_exp) - 1) / (1 - m_exp)
    ec = float(np.trapezoid(grid * cap(grid), grid))
    assert float(np.trapezoid(cap(grid), grid)) == pytest.approx(qc, rel=1e-4)
    real, free = runs(circuit), runs(circuit, charge_free=True)
    _, m = _ours(real)
    assert real.measures["eon"] - free.measures["eon"] > vbus * qc - ec
    assert m.eon_recovery_J > vbus * qc - ec


def test_recovery_part_grows_with_stored_charge(runs):
    # charge-control physics (stored charge TT·IF): more stored charge → more switch energy
    # caused by the recovery
    low = Circuit("grow-low", 400, 20, 30e-9, 15, "mos-slow", _si(40e-9))
    high = Circuit("grow-high", 400, 20, 30e-9, 15, "mos-slow", _si(150e-9))
    parts = [_ours(runs(c))[1].eon_recovery_J for c in (low, high)]
    assert parts[1] > 3 * parts[0] > 0
