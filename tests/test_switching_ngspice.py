"""Switch turn-on energy against ngspice (an independent general-purpose circuit simulator).

A double-pulse netlist — low-side MOSFET (SPICE level 1 with external Cgs / Cgd / Cds, so the
drain voltage falls on a Miller plateau), a freewheeling diode with transit time TT (standard
SPICE diode: charge-storage recovery), load inductor, loop stray inductance with a damping
resistor — is run with ``ngspice -b``. ngspice itself finds the window (switch current rising
through 10 % of the load current, switch voltage falling through 2 % of its off-state value)
with ``meas ... when`` and integrates v·i over it with ``meas ... integ``. The exported
waveforms then go through ``analyze_recovery`` and ``analyze_switch_turn_on``.

The ideal-diode model is checked against the same netlist with a charge-free diode (TT = 0,
CJO = 1 pF): ngspice's Eon there is what the model estimates from the recovering case.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from benchrun.analysis.recovery import analyze_recovery
from benchrun.analysis.switching import analyze_switch_turn_on, switch_current_from_diode

NGSPICE = shutil.which("ngspice") or "/usr/bin/ngspice"
pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.skipif(not Path(NGSPICE).exists(), reason="ngspice not installed"),
]

VBUS = 400.0
L_LOAD = 100e-6
I_TARGET = 20.0
T1 = L_LOAD * I_TARGET / VBUS  # first pulse, t1 = L·I/Vbus (DESIGN.md §4)
T_OFF = 0.5e-6
T_SECOND_ON = 50e-9 + T1 + T_OFF  # gate edges start 50 ns into the run
T_STOP = T_SECOND_ON + 0.7e-6

NETLIST = """* double-pulse turn-on of a low-side MOSFET into a recovering diode
Vbus bus 0 DC {vbus}
Lstray bus p 30n
Rp bus p 20
Lload p sw {lload}
Vdi sw da DC 0
D1 da p DMOD
Cpar sw p 50p
Vsense sw d DC 0
Cds d 0 200p
Cgd g d {cgd}
Cgs g 0 2n
Rg gp g {rg}
M1 d g 0 0 NMOD L=1 W=1
Vg gp 0 PWL(0 0 50n 0 60n 15 {t1off} 15 {t1off10} 0 {t2on} 0 {t2on10} 15 {tstop} 15)
.model DMOD D(IS=1e-12 N=1.5 RS=5m TT={tt} CJO={cjo} VJ=0.7 M=0.4)
.model NMOD NMOS(LEVEL=1 VTO=4 KP=4 LAMBDA=0.001)
.options method=gear
.tran 0.1n {tstop} {tsave}
.control
run
meas tran ifl find i(vdi) at={tpre}
meas tran vpre find v(d) at={tpre}
let ith = 0.1*ifl
let vth = 0.02*vpre
meas tran tstart when i(vsense)=$&ith rise=1 td={tpre}
meas tran tend when v(d)=$&vth fall=1 td={tpre}
let psw = v(d)*i(vsense)
meas tran eon integ psw from=$&tstart to=$&tend
linearize
let vdiode = v(sw) - v(p)
wrdata {out} v(d) i(vsense) i(vdi) vdiode
quit
.endc
.end
"""


#: case → (TT, CJO, Cgd, Rg). "ideal*" diodes hold (almost) no charge: TT = 0, CJO = 1 pF.
CASES = {
    "silicon-TT40n": ("40n", "300p", "150p", "15"),
    "silicon-TT150n": ("150n", "300p", "150p", "15"),
    "capacitive": ("0", "1n", "150p", "15"),
    "ideal": ("0", "1p", "150p", "15"),
    "slow-switch-TT80n": ("80n", "300p", "80p", "25"),
    "slow-switch-ideal": ("0", "1p", "80p", "25"),
}
MEASURED = ("silicon-TT40n", "silicon-TT150n", "capacitive", "slow-switch-TT80n")
IDEAL_OF = {"silicon-TT40n": "ideal", "silicon-TT150n": "ideal", "capacitive": "ideal",
            "slow-switch-TT80n": "slow-switch-ideal"}


@pytest.fixture(scope="module")
def simulations(tmp_path_factory):
    """Each netlist case run once per module (ngspice runs are the slow part)."""
    cache: dict[str, dict] = {}

    def get(case: str) -> dict:
        if case not in cache:
            tt, cjo, cgd, rg = CASES[case]
            cache[case] = _run(tmp_path_factory.mktemp(case), tt, cjo, cgd=cgd, rg=rg)
        return cache[case]

    return get


def _run(tmp_path: Path, tt: str, cjo: str, cgd: str = "150p", rg: str = "15") -> dict:
    out = tmp_path / "waves.txt"
    text = NETLIST.format(
        vbus=VBUS, lload=L_LOAD, tt=tt, cjo=cjo, cgd=cgd, rg=rg,
        t1off=50e-9 + T1, t1off10=60e-9 + T1, t2on=T_SECOND_ON, t2on10=T_SECOND_ON + 10e-9,
        tstop=T_STOP, tsave=T_SECOND_ON - 0.3e-6, tpre=T_SECOND_ON - 5e-9, out=out,
    )
    cir = tmp_path / "dp.cir"
    cir.write_text(text)
    proc = subprocess.run([NGSPICE, "-b", str(cir)], capture_output=True, text=True,
                          timeout=60, check=False)
    meas = {}
    for name in ("ifl", "vpre", "tstart", "tend", "eon"):
        m = re.search(rf"^{name}\s*=\s*([-+0-9.eE]+)", proc.stdout, re.MULTILINE)
        assert m, f"ngspice did not report {name}:\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}"
        meas[name] = float(m.group(1))
    data = np.loadtxt(out)
    # wrdata writes (time, value) pairs per vector
    meas["t"], meas["v_sw"], meas["i_sw"], meas["i_d"], meas["v_d"] = (
        data[:, 0], data[:, 1], data[:, 3], data[:, 5], data[:, 7])
    return meas


@pytest.mark.parametrize("case", MEASURED)
def test_eon_matches_ngspice_meas(simulations, case):
    sim = simulations(case)
    t = sim["t"]
    rec = analyze_recovery(t, sim["v_d"], sim["i_d"])
    # the analysis finds the same operating point ngspice reports (load current at turn-on)
    assert rec.if_A == pytest.approx(sim["ifl"], rel=0.01)

    # 1) with the simulator's own switch current: window and integral as ngspice's meas
    # (tolerance: 0.5 % on the window instants, 1 % on the energy — the waveform export is
    # linearised onto a 0.1 ns grid while meas integrates on the solver's own time points)
    m = analyze_switch_turn_on(t, sim["v_sw"], sim["i_sw"], rec)
    width = sim["tend"] - sim["tstart"]
    assert m.t_eon_start_s == pytest.approx(sim["tstart"], abs=0.005 * width)
    assert m.t_eon_end_s == pytest.approx(sim["tend"], abs=0.005 * width)
    assert m.eon_J == pytest.approx(sim["eon"], rel=0.01)

    # 2) with the switch current rebuilt from the diode current, i_sw = IF − i_diode, as the
    # pipeline does when the switch current is not captured: within 3 % (the load current
    # grows by ∫(Vbus − v_sw)/L dt and the parallel capacitance current is not in i_diode)
    m2 = analyze_switch_turn_on(t, sim["v_sw"], switch_current_from_diode(sim["i_d"], rec.if_A),
                                rec)
    assert m2.eon_J == pytest.approx(sim["eon"], rel=0.03)
    assert m2.eon_recovery_J is not None and m2.eon_ideal_J is not None


def test_recovery_part_grows_with_stored_charge(simulations):
    # physics (charge-control diode: stored charge TT·IF): more stored charge → more switch
    # energy caused by the recovery, in the measured part and in the VR·Qrr estimate alike;
    # and with little stored charge the ideal-diode model explains most of ngspice's Eon
    parts = []
    for case in ("silicon-TT40n", "silicon-TT150n"):
        sim = simulations(case)
        rec = analyze_recovery(sim["t"], sim["v_d"], sim["i_d"])
        m = analyze_switch_turn_on(sim["t"], sim["v_sw"], sim["i_sw"], rec)
        parts.append((m.eon_recovery_J, m.eon_recovery_estimate_J, m.eon_ideal_J, sim["eon"]))
    (rec_low, est_low, ideal_low, eon_low), (rec_high, est_high, _, eon_high) = parts
    assert rec_high > 3 * rec_low > 0
    assert est_high > 3 * est_low > 0
    assert eon_high > eon_low
    assert ideal_low > 0.5 * eon_low


@pytest.mark.parametrize("case", MEASURED)
def test_ideal_diode_model_against_ngspice_charge_free_diode(simulations, case):
    # The ideal-diode model (measured current rise + linear fall at the measured dv/dt) is
    # checked against what it stands for: ngspice's own Eon (meas integ) of the same circuit
    # with a diode that holds no charge (TT = 0, CJO = 1 pF). The slow-switch case uses other
    # gate-drive values than the ones the 60 %/20 % fall band was checked on (held out).
    sim, ideal = simulations(case), simulations(IDEAL_OF[case])
    rec = analyze_recovery(sim["t"], sim["v_d"], sim["i_d"])
    m = analyze_switch_turn_on(sim["t"], sim["v_sw"], sim["i_sw"], rec)
    assert m.eon_ideal_J == pytest.approx(ideal["eon"], rel=0.05)
    true_part = sim["eon"] - ideal["eon"]
    # recovery part within 10 % of the ngspice difference, or 1 % of Eon when it is tiny
    assert m.eon_recovery_J == pytest.approx(true_part, rel=0.10, abs=0.01 * sim["eon"])
