"""Characterisation curves and fitted trends.

References: least-squares line and its standard errors (elementary regression: s²/n for the
centred intercept, s²/Sxx for the slope); exact power laws and lines must be recovered exactly.
Simulator check: a Schottky diode's recovered charge is its depletion charge Qc(VR) = ∫C dV,
independent of IF and of temperature in the simulator's model (capacitance temperature
independent, benchrun.simulator.diode_models), so its fitted IF exponent and temperature
coefficient must be ~0; the silicon part's Qrr rises with IF and T (Lauritzen-Ma, τ(T) rising).
Tolerances: 0.05 in the exponent and 0.03 %/K — the dense simulator waveforms carry no
quantisation, what remains is the solver's resolution of the tail and ringing (common practice).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest

from benchrun.analysis import analyze_recovery
from benchrun.characterize import curve_rows, fit_trends, write_curves_csv
from benchrun.records import ShotResult, TestPoint
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.physics import (
    Fixture,
    PulseTiming,
    SwitchModel,
    first_pulse_for_current,
    simulate_double_pulse,
)


def _shot(i_f, temp, metrics, serial="S1", valid=True, rg=10.0, didt=1e9, flags=()):
    return ShotResult(
        run_id="R", part="DX-4425", lot="LT-0140", serial=serial,
        point=TestPoint(index=0, temperature_K=temp, bus_voltage_V=600.0, forward_current_A=i_f,
                        gate_resistance_ohm=rg),
        repeat=0, attempt=0, timestamp="2031-01-01T00:00:00Z",
        conditions={"if_A": i_f, "didt_A_per_s": didt, "vr_V": 600.0, "temperature_K": temp},
        metrics=metrics, valid=valid, flags=tuple(flags))


def test_exact_power_law_and_temperature_line_are_recovered(tmp_path):
    shots = [_shot(i, t, {"qrr_C": 1e-6 * (i / 10) ** 0.7 * (1 + 0.004 * (t - 298.15))})
             for i in (3.0, 10.0, 30.0) for t in (233.15, 298.15, 398.15)]
    shots.append(_shot(45.0, 298.15, {"qrr_C": 1.0}, valid=False, flags=("snap",)))
    trends = fit_trends(shots, ["qrr_C"])
    power = [tr for tr in trends if tr.axis == "forward_current_A"]
    assert len(power) == 3 and all(tr.slope == pytest.approx(0.7) for tr in power)
    assert all(tr.u_slope == pytest.approx(0.0, abs=1e-9) for tr in power)
    lines = [tr for tr in trends if tr.axis == "temperature_K"]
    (at10,) = [tr for tr in lines if dict(tr.held)["forward_current_A"] == 10.0]
    assert at10.slope == pytest.approx(1e-6 * 0.004)
    # %/K at the mean temperature T_ref
    t_ref = np.mean([233.15, 298.15, 398.15])
    assert at10.percent_per_kelvin == pytest.approx(
        100 * 0.004 / (1 + 0.004 * (t_ref - 298.15)))
    path = write_curves_csv(shots, tmp_path / "curves.csv")
    with path.open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(shots) and "qrr_C" in rows[0] and "flags" in rows[0]
    assert rows[-1]["flags"] == "snap" and rows[-1]["valid"] == "False"
    assert curve_rows(shots)[0]["forward_current_A"] == 3.0


def _simulated(part, lot, serial, currents, temps):
    catalog = load_virtual_parts()
    fx = Fixture(stray_inductance_H=40e-9, bus_capacitance_F=100e-6)
    sw = SwitchModel(gate_resistance_ohm=10.0)
    shots = []
    for i_f in currents:
        timing = PulseTiming(first_pulse_for_current(fx, 600.0, i_f), 3e-6, 2e-6, post_s=1e-6)
        for temp in temps:
            wf = simulate_double_pulse(fx, sw, catalog.lot(lot).device(serial), timing, 600.0,
                                       temp)
            m = (wf.t > wf.t_second_on_s - 0.5e-6) & (wf.t < wf.t_second_on_s + 1.5e-6)
            t = np.arange(wf.t[m][0], wf.t[m][-1], 0.2e-9)
            res = analyze_recovery(t, np.interp(t, wf.t, wf.v_diode),
                                   np.interp(t, wf.t, wf.i_diode))
            shots.append(_shot(i_f, temp, {"qrr_C": res.qrr_C}, serial=serial))
    return shots


def test_fits_recover_the_simulators_known_dependence():
    sic = fit_trends(_simulated("DX-5203", "LT-0131", "SN0131-001", (5.0, 10.0, 20.0),
                                (248.15, 298.15, 398.15)), ["qrr_C"])
    for tr in sic:
        if tr.axis == "forward_current_A":
            assert tr.slope == pytest.approx(0.0, abs=0.05)
        if tr.axis == "temperature_K":
            assert abs(tr.percent_per_kelvin) < 0.03
    si = fit_trends(_simulated("DX-4417", "LT-0117", "SN0117-001", (5.0, 10.0, 20.0),
                               (298.15, 398.15)), ["qrr_C"])
    assert all(tr.slope > 0.3 for tr in si if tr.axis == "forward_current_A")
    assert all(tr.slope > 0 for tr in si if tr.axis == "temperature_K")


def test_signed_characterization_report(tmp_path):
    # the PDF is signed through the report package's entry point and the signature verifies
    # (pyHanko validation, as benchrun verify does); the JSON attachment holds the fits
    import asyncio

    from report_helpers import make_signer

    from benchrun.characterize.report import CAUTION, render_characterization
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify_signature import signature_checks

    files, signer = make_signer(tmp_path)
    shots = [_shot(i, t, {"qrr_C": 1e-6 * (i / 10) ** 0.7 * (1 + 0.004 * (t - 298.15)),
                          "irrm_A": 2.0 * i ** 0.5}, serial=f"S{k}")
             for k in range(2) for i in (3.0, 10.0, 30.0) for t in (233.15, 298.15, 398.15)]
    out, trends = render_characterization(shots, tmp_path / "characterization.pdf", signer,
                                          title="DX-4425 characterisation (invented part)",
                                          flagged=["SN0140-001 at -40 degC: snap"])
    pdf = out.read_bytes()
    integrity, trust, _ = asyncio.run(signature_checks(pdf, files.cert_path))
    assert integrity.ok and trust.ok
    data = read_attachment(pdf)
    assert data["kind"] == "characterization" and data["flagged"]
    assert any(t["metric"] == "qrr_C" and t["axis"] == "forward_current_A"
               and abs(t["slope"] - 0.7) < 1e-9 for t in data["trends"])
    assert len(trends) == len(data["trends"])
    assert "kill" in CAUTION


def _sweep_shots():
    # Qrr = 1 µC·(IF/10 A)^0.7·(di/dt/5e8)^0.3·exp(0.005·(T − 298.15 K)), two devices
    shots = []
    k = 0
    for i in (3.0, 10.0, 30.0):
        for d in (2.5e8, 1e9):
            for t in (233.15, 298.15, 398.15):
                for serial in ("S1", "S2"):
                    q = 1e-6 * (i / 10) ** 0.7 * (d / 5e8) ** 0.3 * np.exp(0.005 * (t - 298.15))
                    s = _shot(i, t, {"qrr_C": q, "irrm_A": 2.0 * i ** 0.5}, serial=serial,
                              didt=d, rg=10.0 if d < 5e8 else 3.0)
                    shots.append(ShotResult.from_dict(
                        {**s.to_dict(), "point": {**s.point.to_dict(), "index": k}}))
                k += 1
    return shots


def test_fits_csv_holds_every_trend_and_surface(tmp_path):
    from benchrun.characterize import metric_surfaces, write_sweep_fits_csv

    shots = _sweep_shots()
    path = write_sweep_fits_csv(shots, tmp_path / "fits.csv")
    with path.open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    trends = fit_trends(shots)
    surfaces, _ = metric_surfaces(shots, ["qrr_C", "irrm_A", "trr_s", "err_J", "softness"])
    assert len(rows) == len(trends) + len(surfaces)
    (qrr,) = [r for r in rows if r["kind"] == "surface" and r["metric"] == "qrr_C"]
    assert float(qrr["b_forward_current"]) == pytest.approx(0.7)
    assert float(qrr["b_didt"]) == pytest.approx(0.3)
    assert qrr["b_vr"] == ""  # VR held at 600 V: not fitted
    assert float(qrr["tc_percent_per_K"]) == pytest.approx(0.5)
    assert float(qrr["tc_abs_per_K"]) == pytest.approx(0.005 * float(qrr["ref_value"]))
    assert float(qrr["min_forward_current_A"]) == 3.0
    assert float(qrr["max_temperature_K"]) == 398.15
    line = [r for r in rows if r["kind"] == "trend" and r["axis"] == "temperature_K"
            and r["metric"] == "qrr_C"]
    assert line and all(r["tc_percent_per_K"] for r in line)


def test_report_shows_the_surfaces_with_temperature_coefficients(tmp_path):
    import shutil
    import subprocess

    from report_helpers import make_signer

    from benchrun.characterize.report import render_characterization
    from benchrun.report.sign import read_attachment

    if shutil.which("pdftotext") is None:
        pytest.skip("poppler-utils not installed")
    _files, signer = make_signer(tmp_path)
    out, _ = render_characterization(_sweep_shots(), tmp_path / "c.pdf", signer,
                                     title="DX-4425 characterisation (invented part)")
    data = read_attachment(out.read_bytes())
    (q,) = [s for s in data["surfaces"] if s["metric"] == "qrr_C"]
    assert q["percent_per_kelvin"] == pytest.approx(0.5)
    text = subprocess.run(["pdftotext", "-layout", str(out), "-"], capture_output=True,
                          text=True, timeout=30, check=True).stdout
    flat = " ".join(text.split())
    assert "Fitted surfaces and temperature coefficients" in flat
    assert "0.500 %/K" in flat or "0.500" in flat
    assert "0.700" in flat and "0.300" in flat
