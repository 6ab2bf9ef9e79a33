"""Independent validation of the recovery analysis on circuits and captures it was not built on.

Reference: ngspice (an independent circuit simulator) and its own ``meas`` statements, which
implement the definitions of DESIGN.md §3 on the simulator's own variable-step solution:
``min``/``min_at`` for Irrm and its instant, ``when ... rise=1 from=<instant of the minimum>``
for the crossings after the peak, ``integ`` for Qrr and Err, ``max`` for VRM over
``t0 … t2 + trr``. ``analyze_recovery`` sees only the waveforms (no hint where the event is):
the simulator's own non-uniform time points, or captures derived from them (uniform sampling
at 1–10 GS/s by linear interpolation, 8-bit quantisation with about 1 LSB rms noise, cut
records, reversed probe, CSV files as a simulator or a scope writes them).

Circuits (all differ from tests/test_analysis_ngspice.py): a double-pulse cell whose switch is
a behavioural current path ``i = g(t)·tanh(v/5 V)`` with g ramped at the wanted di/dt; load
inductance sized so the first 1 µs pulse builds IF; loop stray inductance Ls with a parallel
damping resistor (large for ringing cases); optional RC snubber across the switch (it damps the
turn-off ringing of the freewheel plateau but is shorted by the switch during the recovery).
Diodes: standard SPICE junction diodes with TT from 20 ns to 1 µs and varied IS/N/RS/CJO/VJ/M;
a Lauritzen–Ma soft/snappy behavioural diode (C. L. Lauritzen and C. Ma, IEEE Trans. Power
Electronics 6(2), 1991); a capacitive-only (SiC-Schottky-like) diode whose current rings around
zero several times after the peak. Gear integration with reltol = 1e-4 so snaps are resolved
(trapezoidal integration rings numerically on a sub-ns snap); every run is checked to reach
its stop time and stays well under 2 s.

Ringing (decision, by the definitions of DESIGN.md §3): Irrm is the deepest point of the
recovery; the trr crossings and the 2 % end point t2 are the *first* rising crossings after
that minimum, so a later ringing cycle never moves them; VRM is the peak within t0 … t2 + trr
(a larger overshoot in a later ringing cycle lies outside that window by definition).

Err is a difference of two nearly equal energies for a snappy junction diode (energy returned
while the junction is still forward biased, then dissipated after the snap), so its tolerance
is stated against the gross energy ∫|v·i| dt over the same interval (numpy trapezoid over the
simulator's points; common practice for a signed quantity near zero).
"""

from __future__ import annotations

import json
import math
import zlib

import numpy as np
import pytest
from spice import SpiceResult, have_ngspice, resample, run_ngspice

from benchrun.analysis import RecoveryOptions, analyze_recovery
from benchrun.cli import main
from benchrun.errors import NoEventError

pytestmark = [
    pytest.mark.ngspice,
    pytest.mark.skipif(not have_ngspice(), reason="ngspice binary not installed"),
]

FIRST_PULSE = 1e-6


def cell(diode: str, *, vbus: float, IF: float, didt: float, ls: float, rdamp: float,
         toff: float = 0.5e-6, csw: float = 1e-9, tfall: float = 20e-9,
         snubber: tuple[float, float] | None = None, gmax: float | None = None
         ) -> tuple[str, float]:
    """Double-pulse netlist around ``diode`` (anode ``a``, cathode ``kk``) and its turn-on."""
    ton = FIRST_PULSE + toff
    lload = vbus * FIRST_PULSE / IF
    gmax = gmax or 6.0 * IF
    ramp = gmax / didt
    extra = f"Rsn sw xs {snubber[0]}\nCsn xs 0 {snubber[1]}" if snubber else ""
    return f"""
Vbus bus 0 DC {vbus}
Lload bus sw {lload}
Ls bus kk {ls}
Rdamp bus kk {rdamp}
{extra}
Ck kk 0 10p
Vsense sw a 0
{diode}
Csw sw 0 {csw}
Ca a 0 1p
Vg g 0 PWL(0 0 20n 0 30n {3 * IF} {FIRST_PULSE} {3 * IF} {FIRST_PULSE + tfall} 0 {ton} 0 \
{ton + ramp} {gmax} 1 {gmax})
Rg g 0 1meg
Bsw sw 0 I = V(g)*tanh(V(sw)/5)
.options method=gear reltol=1e-4
""", ton


def tt_diode(tt: str, params: str = "IS=1e-12 N=1.6 RS=5m CJO=200p VJ=0.7 M=0.4",
             bv: float = 2000) -> str:
    return f"D1 a kk DTT\n.model DTT D({params} TT={tt} BV={bv})"


def lm_diode(tau: float, tm: float, cj: str) -> str:
    # Lauritzen–Ma: qE = Is·τ·(exp(v/(n·VT)) − 1), i = (qE − qM)/TM, dqM/dt = i − qM/τ;
    # node m holds qM / 1 µC on a 1 µF capacitor.
    return f"""X1 a kk LMD
.subckt LMD an ca
.func lexp(x) = (x < 40) ? exp(x) : exp(40)*(1+x-40)
.param tau={tau} tm={tm} isat=1e-10 nvt=0.0517
Rs an j 5m
Cj j ca {cj}
Gmin j ca j ca 1e-9
Bd j ca I = (isat*tau*(lexp(V(j,ca)/nvt)-1) - V(m)*1e-6)/tm
Cm m 0 1u
Bm 0 m I = (isat*tau*(lexp(V(j,ca)/nvt)-1) - V(m)*1e-6)/tm - V(m)*1e-6/tau
Rm m 0 1e9
.ends"""


SIC_DIODE = """D1 a kk DSC
.model DSC D(IS=1e-12 N=1.3 RS=20m TT=0 CJO=1.2n VJ=1.5 M=0.5 FC=0.5 BV=2000)
Rpar a kk 10k"""

# name: (netlist keyword arguments, simulated time after the ideal current zero)
CIRCUITS = {
    # snappy: TT = 20 ns at 3 kA/µs (Irrm > IF)
    "tt20n_3kA_per_us": (dict(diode=tt_diode("20n"), vbus=600, IF=30, didt=3e9, ls=20e-9,
                              rdamp=10), 1e-6),
    # slow: TT = 1 µs at 50 A/µs
    "tt1u_50A_per_us": (dict(diode=tt_diode("1u"), vbus=400, IF=20, didt=50e6, ls=50e-9,
                             rdamp=20), 1.5e-6),
    # high current: 200 A, 800 V
    "tt100n_200A_800V": (dict(diode=tt_diode("100n"), vbus=800, IF=200, didt=1e9, ls=10e-9,
                              rdamp=5), 1e-6),
    # low voltage, low current: 2 A at 50 V, 5 nH
    "tt100n_2A_50V": (dict(diode=tt_diode("100n"), vbus=50, IF=2, didt=100e6, ls=5e-9,
                           rdamp=20), 1e-6),
    # 1000 V bus, 100 nH: ringing overshoot after the snap
    "tt50n_1000V_100nH": (dict(diode=tt_diode("50n", bv=2500), vbus=1000, IF=40, didt=500e6,
                               ls=100e-9, rdamp=30), 1e-6),
    # other junction parameters (IS, N, RS, CJO, VJ, M): a one-sample-wide voltage spike
    "tt300n_junction": (dict(diode=tt_diode("300n", "IS=1e-9 N=2.0 RS=50m CJO=50p VJ=0.5 "
                                                    "M=0.33"),
                             vbus=300, IF=10, didt=200e6, ls=30e-9, rdamp=15), 1e-6),
    # 2 A into a snap of about 40 A: the reverse peak and ringing dwarf the plateau
    "tt200n_2A_2kA_per_us": (dict(diode=tt_diode("200n", bv=3000), vbus=400, IF=2, didt=2e9,
                                  ls=60e-9, rdamp=300, snubber=(50, 0.3e-9), csw=0.3e-9,
                                  gmax=400), 1e-6),
    # soft recovery (long tail)
    "lm_soft": (dict(diode=lm_diode(300e-9, 150e-9, "150p"), vbus=600, IF=30, didt=100e6,
                     ls=50e-9, rdamp=20), 1.5e-6),
    # capacitive-only diode, 150 nH, light damping: the current rings around zero
    "sic_ringing": (dict(diode=SIC_DIODE, vbus=600, IF=20, didt=1e9, ls=150e-9, rdamp=1000,
                         tfall=50e-9, toff=1e-6, snubber=(20, 5e-9)), 0.6e-6),
}

ALTERNATIVE = (0.75, 0.5, 0.1)  # other extrapolation fractions and integration end


#: Flags that describe the recovery itself (abrupt, ringing, capacitive), not the capture.
DEVICE_FLAGS = {"snap", "ringing", "trr_beyond_integration"}


def measures(ton: float, stop: float) -> list[str]:
    """ngspice meas lines: the definitions of DESIGN.md §3, plus alternative fractions."""
    lines = [
        f"meas tran ifwd find i(vsense) at={ton}",
        f"meas tran t0 when i(vsense)=0 fall=1 from={ton}",
        f"meas tran imin min i(vsense) from=$&t0 to={stop}",
        f"meas tran tm min_at i(vsense) from=$&t0 to={stop}",
        "let lif = 0.5*ifwd",
        "let lrr = 0.5*imin",
        f"meas tran tfa when i(vsense)=$&lif fall=1 from={ton}",
        "meas tran tfb when i(vsense)=$&lrr fall=1 from=$&t0",
        "let pwr = v(a,kk)*i(vsense)",
        "let vneg = -v(a,kk)",
    ]
    for tag, (high, low, end) in (("", (0.9, 0.25, 0.02)), ("x", ALTERNATIVE)):
        lines += [
            f"let lh{tag} = {high}*imin",
            f"let ll{tag} = {low}*imin",
            f"let le{tag} = {end}*imin",
            f"meas tran th{tag} when i(vsense)=$&lh{tag} rise=1 from=$&tm",
            f"meas tran tl{tag} when i(vsense)=$&ll{tag} rise=1 from=$&tm",
            f"meas tran t2{tag} when i(vsense)=$&le{tag} rise=1 from=$&tm",
            f"meas tran qrr{tag} integ i(vsense) from=$&t0 to=$&t2{tag}",
            f"meas tran err{tag} integ pwr from=$&t0 to=$&t2{tag}",
            f"let tvend{tag} = t2{tag} + tl{tag} + (tl{tag} - th{tag})*{low}/{high - low} - t0",
            f"meas tran vrm{tag} max vneg from=$&t0 to={stop}",  # until settled (record end)
        ]
    return lines


def simulate(name: str) -> tuple[SpiceResult, float]:
    kwargs, after = CIRCUITS[name]
    netlist, ton = cell(**kwargs)
    stop = ton + kwargs["IF"] / kwargs["didt"] + after
    sim = run_ngspice(netlist, tran=f"tran 0.1n {stop}", vectors=["v(a,kk)", "i(vsense)"],
                      measures=measures(ton, stop), timeout_s=30)
    # a run that stopped early ("timestep too small") would still write its waveforms
    assert sim.time[-1] == pytest.approx(stop, abs=1e-12), sim.output[-500:]
    return sim, ton


@pytest.fixture(scope="module")
def sims() -> dict[str, tuple[SpiceResult, float]]:
    return {name: simulate(name) for name in CIRCUITS}


def reference(sim: SpiceResult, fractions=(0.9, 0.25, 0.02), tag: str = "") -> dict:
    """Metric references from ngspice's meas results (DESIGN.md §3)."""
    m = sim.measures
    high, low, _ = fractions
    t_trr = m[f"tl{tag}"] + (m[f"tl{tag}"] - m[f"th{tag}"]) * low / (high - low)
    t, v, i = waves(sim)
    inside = (t >= m["t0"]) & (t <= m[f"t2{tag}"])
    gross = np.trapezoid(np.abs(v * i)[inside], t[inside])  # numpy: outside reference
    t2 = m[f"t2{tag}"]
    slope_t2 = (np.interp(t2 + 1e-9, t, i) - np.interp(t2 - 1e-9, t, i)) / 2e-9
    return {
        "if_A": m["ifwd"], "t0_s": m["t0"], "irrm_A": -m["imin"], "ta_s": m["tm"] - m["t0"],
        "trr_s": t_trr - m["t0"], "qrr_C": -m[f"qrr{tag}"], "err_J": m[f"err{tag}"],
        "didt_A_per_s": (0.5 * m["ifwd"] - 0.5 * m["imin"]) / (m["tfb"] - m["tfa"]),
        "vrm_V": m[f"vrm{tag}"], "t2_s": t2, "gross_J": gross, "slope_t2": slope_t2,
    }


def waves(sim: SpiceResult) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return sim.time, sim.vectors["v(a,kk)"], sim.vectors["i(vsense)"]


def uniform(sim: SpiceResult, dt: float):
    t, i = resample(sim.time, sim.vectors["i(vsense)"], dt)
    _, v = resample(sim.time, sim.vectors["v(a,kk)"], dt)
    return t, v, i


def check(got: dict, ref: dict, *, scale: float = 1.0, lsb_i: float = 0.0,
          lsb_v: float = 0.0, dt: float = 0.0, label: str = "") -> None:
    """The issue's tolerances (1 % IF/Irrm/VRM/di/dt, 3 % trr/Qrr/ta), times ``scale``, plus
    one LSB / one sample interval where a capture is quantised or sampled."""
    span = ref["t2_s"] - ref["t0_s"]
    irrm = ref["irrm_A"]
    tol = {
        "if_A": 0.01 * scale * ref["if_A"] + lsb_i,
        "irrm_A": 0.01 * scale * irrm + lsb_i,
        "vrm_V": 0.01 * scale * ref["vrm_V"] + lsb_v,
        # t_a and t_b each move by up to 2 LSB / slope on a noisy capture, i.e. di/dt by
        # 4 LSB over the current swing 0.5·IF + 0.5·Irrm
        "didt_A_per_s": 0.01 * scale * ref["didt_A_per_s"]
        + ref["didt_A_per_s"] * 4 * lsb_i / (0.5 * ref["if_A"] + 0.5 * irrm),
        "ta_s": 0.03 * scale * ref["ta_s"] + dt,
        "trr_s": 0.03 * scale * ref["trr_s"] + dt,
        "qrr_C": 0.03 * scale * ref["qrr_C"] + lsb_i * span,
        "err_J": 0.03 * scale * ref["gross_J"] + lsb_i * span * ref["vrm_V"],
        # noise of one LSB moves a crossing by LSB / slope (the 2 % point of a slow tail
        # lies on a shallow slope)
        "t2_s": 0.02 * scale * span + dt + lsb_i / ref["slope_t2"],
    }
    for key, allowed in tol.items():
        assert got[key] is not None, (label, key)
        assert abs(got[key] - ref[key]) <= allowed, (label, key, got[key], ref[key], allowed)


@pytest.mark.parametrize("name", list(CIRCUITS))
def test_simulator_points_match_ngspice_meas(sims, name):
    # The simulator's own variable-step points, unchanged: resampled inside the analysis,
    # Qrr/Err integrated exactly over the given points.
    sim, _ = sims[name]
    got = analyze_recovery(*waves(sim))
    check(got.to_dict(), reference(sim), label=name)
    # flags that describe the device, not a doubtful capture, may appear (README metrics)
    assert {f.split(":")[0] for f in got.flags} <= DEVICE_FLAGS


# Sampling rate sweep on the clean waveforms. At 1 GS/s a sub-nanosecond snap cannot be
# resolved, so the snappy circuits are sampled at 2.5 GS/s and above only.
RATES = {
    "tt1u_50A_per_us": (10e9, 5e9, 2.5e9, 1e9),
    "tt100n_200A_800V": (10e9, 2.5e9, 1e9),
    "lm_soft": (10e9, 5e9, 1e9),
    "sic_ringing": (10e9, 5e9, 2.5e9),
    "tt200n_2A_2kA_per_us": (10e9, 5e9),
    "tt20n_3kA_per_us": (10e9, 5e9),
    "tt50n_1000V_100nH": (10e9, 2.5e9),
}


@pytest.mark.parametrize("name", list(RATES))
def test_uniform_captures_at_several_rates(sims, name):
    sim, _ = sims[name]
    ref = reference(sim)
    for rate in RATES[name]:
        dt = 1.0 / rate
        got = analyze_recovery(*uniform(sim, dt)).to_dict()
        # the reverse peak can be a cusp between two samples: the sampled minimum then lies
        # up to one sample interval of the commutation slope above it (common practice)
        check(got, ref, dt=dt, lsb_i=ref["didt_A_per_s"] * dt, label=f"{name}@{rate:g}")


def quantise(x: np.ndarray, full_scale: float, rng: np.random.Generator):
    """8-bit capture over ±full_scale with 1 LSB rms noise added before quantisation."""
    lsb = 2.0 * full_scale / 256.0
    codes = np.clip(np.round((x + rng.normal(0.0, lsb, x.size)) / lsb), -128, 127)
    return codes * lsb, lsb


@pytest.mark.parametrize("name", ["tt1u_50A_per_us", "lm_soft", "sic_ringing",
                                  "tt100n_200A_800V", "tt200n_2A_2kA_per_us"])
@pytest.mark.parametrize("rate", [5e9, 2.5e9])
def test_8bit_noisy_captures(sims, name, rate):
    sim, _ = sims[name]
    ref = reference(sim)
    # the same noise on every run: a stable seed per case (Python's hash() of a string is
    # salted per process, so it would give other noise, and another result, each run)
    rng = np.random.default_rng(zlib.crc32(f"{name}@{rate:g}".encode()))
    t, v, i = uniform(sim, 1.0 / rate)
    # ranges as an operator sets them: the current range holds IF and Irrm with 20 % margin,
    # the voltage range the peak reverse voltage with 20 % margin
    i_q, lsb_i = quantise(i, 1.2 * max(ref["if_A"], ref["irrm_A"]), rng)
    v_q, lsb_v = quantise(v, 1.2 * ref["vrm_V"], rng)
    got = analyze_recovery(t, v_q, i_q).to_dict()
    # one LSB (Irrm, VRM) or one LSB over the integration interval (Qrr, Err) on top, and
    # twice the timing tolerance: the 2 % end point sits within a few LSB of zero
    check(got, ref, scale=2.0, lsb_i=lsb_i, lsb_v=lsb_v, dt=2.0 / rate, label=name)


def test_capture_variants_find_the_same_event(sims):
    # One circuit, captured in the ways a bench captures it: whole double-pulse record; a
    # record starting mid-freewheel (plateau, then the recovery), with times relative to the
    # second turn-on (negative start); a record with a short pre-trigger of zero current
    # before the freewheel; a 2,000-point record; every third simulator point (non-uniform).
    sim, ton = sims["tt1u_50A_per_us"]
    ref = reference(sim)
    t, v, i = uniform(sim, 0.4e-9)
    variants = {
        "whole": (t, v, i),
        "mid_freewheel_negative_time": (t[t > ton - 0.3e-6] - ton, v[t > ton - 0.3e-6],
                                        i[t > ton - 0.3e-6]),
        "pre_trigger": (t[t > FIRST_PULSE - 0.1e-6], v[t > FIRST_PULSE - 0.1e-6],
                        i[t > FIRST_PULSE - 0.1e-6]),
        "2000_points": uniform(sim, (sim.time[-1] - sim.time[0]) / 2000),
        "sparse_simulator_points": (sim.time[::3], sim.vectors["v(a,kk)"][::3],
                                    sim.vectors["i(vsense)"][::3]),
    }
    for label, (tt, vv, ii) in variants.items():
        got = analyze_recovery(tt, vv, ii).to_dict()
        shift = -ton if label.startswith("mid_freewheel") else 0.0
        dt = float(np.max(np.diff(tt[(tt > ref["t0_s"] + shift - 1e-7)
                                     & (tt < ref["t2_s"] + shift)])))
        shifted = {**ref, "t0_s": ref["t0_s"] + shift, "t2_s": ref["t2_s"] + shift}
        check(got, shifted, dt=dt, lsb_i=ref["didt_A_per_s"] * dt, label=label)
        assert got["t0_s"] == pytest.approx(ref["t0_s"] + shift, abs=dt)


def test_ten_million_point_record(sims):
    # A 2 ms record at 5 GS/s: a long first pulse (zero diode current), the freewheel, the
    # simulated commutation, then the second pulse; the event sits at about 60 % of it.
    sim, ton = sims["lm_soft"]
    ref = reference(sim)
    dt = 0.2e-9
    t_sim, v_sim, i_sim = uniform(sim, dt)
    keep = t_sim > ton - 0.2e-6  # after the turn-off ringing of the first pulse
    t_sim, v_sim, i_sim = t_sim[keep], v_sim[keep], i_sim[keep]
    n = 10_000_000
    k_event = 6_000_000
    i = np.empty(n)
    v = np.empty(n)
    i[:k_event] = i_sim[0]
    v[:k_event] = v_sim[0]
    i[: k_event - 1_000_000] = 0.0  # first pulse: the diode blocks
    v[: k_event - 1_000_000] = -v_sim[-1]
    i[k_event : k_event + i_sim.size] = i_sim
    v[k_event : k_event + v_sim.size] = v_sim
    i[k_event + i_sim.size :] = i_sim[-1]
    v[k_event + v_sim.size :] = v_sim[-1]
    t_start = t_sim[0] - k_event * dt
    got = analyze_recovery(None, v, i, dt=dt, t_start=t_start).to_dict()
    check(got, ref, dt=dt, label="10M")


def test_reversed_current_probe_is_reported(sims):
    for name in ("tt1u_50A_per_us", "tt200n_2A_2kA_per_us", "sic_ringing"):
        sim, ton = sims[name]
        t, v, i = uniform(sim, 0.2e-9)
        for tt, vv, ii in ((t, v, -i), (t[t > ton - 0.3e-6], v[t > ton - 0.3e-6],
                                        -i[t > ton - 0.3e-6])):
            with pytest.raises(NoEventError, match="reversed"):
                analyze_recovery(tt, vv, ii)


def test_alternative_fractions_match_ngspice_with_the_same_fractions(sims):
    # 0.75/0.5 extrapolation line and a 10 % integration end, against ngspice meas with the
    # same fractions; and the threshold trr (JEDEC "current reaches a set value") at 0.5.
    high, low, end = ALTERNATIVE
    for name in ("lm_soft", "tt1u_50A_per_us", "sic_ringing"):
        sim, _ = sims[name]
        ref = reference(sim, ALTERNATIVE, tag="x")
        opts = RecoveryOptions(fit_high=high, fit_low=low, integration_end_fraction=end)
        got = analyze_recovery(*waves(sim), opts).to_dict()
        check(got, ref, label=name)
        threshold = analyze_recovery(
            *waves(sim), RecoveryOptions(trr_method="threshold", trr_threshold_fraction=low))
        expected = sim.measures["tlx"] - sim.measures["t0"]
        assert threshold.trr_s == pytest.approx(expected, rel=0.005), name


def test_ringing_does_not_move_the_end_points(sims):
    # SiC ringing: the current crosses zero several times after the peak. By definition the
    # trr crossings and t2 are the first rising crossings after the minimum (ngspice
    # `when ... rise=1 from=<instant of the minimum>`), inside the first ringing cycle.
    sim, _ = sims["sic_ringing"]
    t, v, i = waves(sim)
    m = sim.measures
    after = t > m["tm"]
    zero_rises = np.flatnonzero((i[after][1:] >= 0) & (i[after][:-1] < 0))
    assert zero_rises.size >= 4  # the circuit does ring around zero
    got = analyze_recovery(t, v, i)
    first_zero_rise = t[after][zero_rises[0]]
    assert m["tm"] < got.t2_s < first_zero_rise
    assert got.t2_s == pytest.approx(m["t2"], abs=0.2e-9)
    assert got.t_trr_s < first_zero_rise + 0.5 * (got.t_trr_s - got.t_irrm_s)


def test_definitions_of_didt_err_and_vrm(sims):
    # di/dt = (0.5·IF + 0.5·Irrm)/(t_b − t_a) (DESIGN.md §3), with ngspice's t_a, t_b;
    # Err = ∫v·i over t0…t2 is positive for a soft recovery (v and i both negative after the
    # junction blocks); VRM includes the stray-inductance overshoot Ls·di/dt above Vbus.
    sim, _ = sims["lm_soft"]
    m = sim.measures
    got = analyze_recovery(*waves(sim))
    expected = (0.5 * got.if_A + 0.5 * got.irrm_A) / (m["tfb"] - m["tfa"])
    assert got.didt_A_per_s == pytest.approx(expected, rel=0.005)
    assert got.err_J > 0
    assert got.err_J == pytest.approx(m["err"], rel=0.01)
    assert got.vrm_V > 600.0 * 1.01  # above the 600 V bus: overshoot included
    assert got.vr_V == pytest.approx(600.0, rel=0.01)


def write_csv(path, header: str, t, v, i, *, sep=",", decimal=".", preamble="") -> None:
    rows = [sep.join(f"{x:.10g}" for x in row) for row in zip(t, v, i, strict=True)]
    if decimal == ",":
        rows = [r.replace(".", ",") for r in rows]
    path.write_text(preamble + header + "\n" + "\n".join(rows) + "\n")


def test_cli_reads_simulator_and_scope_csv_files(sims, tmp_path, capsys):
    # A simulator's variable-step export with a spice-style header (the comma inside
    # V(anode,cathode) is not a separator); a scope-style file with metadata lines before
    # the header; a semicolon file with decimal commas; a header in µs and mA.
    sim, _ = sims["tt100n_200A_800V"]
    ref = reference(sim)
    t, v, i = waves(sim)
    files = {
        "spice.csv": dict(header="Time (s), V(anode,cathode), I(D1)"),
        "scope.csv": dict(header="TIME,CH1,CH2",
                          preamble="Model,Invented 8-bit scope\nRecord Length,28000\n"
                                   "Sample Interval,variable\n\n"),
        "semicolon.csv": dict(header="t;v_ak;i_f", sep=";", decimal=","),
    }
    for name, kwargs in files.items():
        write_csv(tmp_path / name, t=t, v=v, i=i, **kwargs)
    write_csv(tmp_path / "scaled.csv", "Time (us),Voltage (V),Current (mA)",
              t * 1e6, v, i * 1e3)
    for name in [*files, "scaled.csv"]:
        assert main(["analyze", str(tmp_path / name), "--json"]) == 0, name
        got = json.loads(capsys.readouterr().out)
        check(got, ref, label=name)
    argv = ["analyze", str(tmp_path / "spice.csv"), "--json", "--time", "time (s)",
            "--voltage", "V(anode,cathode)", "--current", "I(D1)"]
    assert main(argv) == 0
    assert json.loads(capsys.readouterr().out)["irrm_A"] == pytest.approx(ref["irrm_A"],
                                                                         rel=0.01)


def test_cli_reversed_probe_one_clear_line(sims, tmp_path, capsys):
    sim, _ = sims["lm_soft"]
    t, v, i = waves(sim)
    write_csv(tmp_path / "reversed.csv", "time,v_ak,i_f", t, v, -i)
    assert main(["analyze", str(tmp_path / "reversed.csv")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "reversed" in err and "probe" in err


def test_snap_spike_in_vrm_is_kept(sims):
    # tt300n_junction: the reverse voltage peaks for about a nanosecond at the snap. The
    # sampled peak (max of the samples, common practice) is what a scope shows.
    sim, _ = sims["tt300n_junction"]
    for rate in (10e9, 5e9, 2.5e9):
        t, v, i = uniform(sim, 1.0 / rate)
        lo, hi = np.searchsorted(t, [sim.measures["t0"], sim.measures["t2"] + 50e-9])
        sampled_peak = float(-v[lo:hi].min())
        got = analyze_recovery(t, v, i)
        # the voltage is zeroed before the first pulse (benchrun.analysis.baseline)
        offset = got.corrections["voltage_offset_V"]
        assert got.vrm_V == pytest.approx(sampled_peak + offset, rel=1e-6), rate
        assert math.isclose(got.vrm_V, sim.measures["vrm"], rel_tol=0.02)


def test_ringing_freewheel_plateau_is_not_noise():
    # No snubber: the switch turn-off leaves the freewheel plateau ringing (±several A at
    # about 13 MHz) up to the commutation. Ringing is signal, not noise: the event must
    # still be found and measured (IF itself is ill-defined on such a plateau and is not
    # compared; ngspice meas references as above).
    netlist, ton = cell(SIC_DIODE, vbus=600, IF=20, didt=1e9, ls=150e-9, rdamp=1000,
                        tfall=150e-9, toff=1e-6)
    stop = ton + 20 / 1e9 + 0.6e-6
    sim = run_ngspice(netlist, tran=f"tran 0.1n {stop}", vectors=["v(a,kk)", "i(vsense)"],
                      measures=measures(ton, stop), timeout_s=30)
    assert sim.time[-1] == pytest.approx(stop, abs=1e-12)
    ref = reference(sim)
    got = analyze_recovery(*waves(sim)).to_dict()
    for key in ("irrm_A", "vrm_V"):
        assert got[key] == pytest.approx(ref[key], rel=0.01), key
    for key in ("ta_s", "trr_s", "qrr_C"):
        assert got[key] == pytest.approx(ref[key], rel=0.03), key
    assert got["t0_s"] == pytest.approx(ref["t0_s"], abs=0.2e-9)
