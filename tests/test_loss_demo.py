"""Demo story: the SiC part's recovery loss is far below the silicon part's at equal conditions.

Chain: physics simulator (benchrun.simulator.physics, invented virtual parts DX-4417 and
DX-5203) → 8-bit digitised capture → analysis pipeline (recovery + switch turn-on) →
ShotResult → loss estimate → comparison.

Physics behind the expectation: a fast-recovery silicon diode stores minority charge
(Q ≈ τ·IF, Lauritzen & Ma, IEEE Trans. Power Electronics 6(2), 1991) that the switch must
remove while it still holds the bus voltage; a Schottky diode only has depletion charge
Qc = ∫C(V)dV, a small fraction of it, and temperature-independent (DESIGN.md §4).
"""

from __future__ import annotations

import numpy as np
import pytest

from benchrun.analysis import ChannelData, ProbeCalibration, analyze_channels
from benchrun.loss import compare, estimate_losses
from benchrun.records import ShotResult, TestPoint
from benchrun.simulator.acquisition import AcquisitionSettings, digitize
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.physics import (
    Fixture,
    PulseTiming,
    SwitchModel,
    first_pulse_for_current,
    simulate_double_pulse,
)

VBUS, IF = 600.0, 20.0  # within both parts' ratings (DX-5203 is a 20 A part)
TEMPS = (298.15, 398.15)
DEVICES = {("DX-4417", "LT-0117"): ("SN0117-001", "SN0117-002"),
           ("DX-5203", "LT-0131"): ("SN0131-001", "SN0131-002")}
DT = 0.5e-9


def _shots(with_switch: bool) -> dict[str, list[ShotResult]]:
    catalog = load_virtual_parts()
    fixture = Fixture(stray_inductance_H=40e-9, bus_capacitance_F=100e-6)  # bench-sim.yaml
    switch = SwitchModel(gate_resistance_ohm=10.0)
    timing = PulseTiming(first_pulse_for_current(fixture, VBUS, IF), 3e-6, 2e-6, post_s=2e-6)
    ranges = {"diode_voltage": (1000.0, -300.0), "diode_current": (120.0, 0.0)}
    if with_switch:
        ranges["switch_voltage"] = (1000.0, 300.0)
    out: dict[str, list[ShotResult]] = {}
    for (part, lot), serials in DEVICES.items():
        shots = out.setdefault(part, [])
        for index, temp in enumerate(TEMPS):
            point = TestPoint(index=index, temperature_K=temp, bus_voltage_V=VBUS,
                              forward_current_A=IF)
            for serial in serials:
                waves = simulate_double_pulse(fixture, switch, catalog.lot(lot).device(serial),
                                              timing, VBUS, temp)
                t0 = waves.t_second_on_s - 0.5e-6
                acq = AcquisitionSettings(sample_interval_s=DT, record_length=4000,
                                          t_start_s=t0, channel_ranges=ranges,
                                          seed=len(shots))
                channels = {name: ChannelData(c.codes, c.gain, c.offset, c.code_min,
                                              c.code_max)
                            for name, c in digitize(waves, acq).items()}
                result = analyze_channels(t0, DT, channels,
                                          {name: ProbeCalibration(1.0) for name in channels})
                metrics = result.metrics()
                shots.append(ShotResult(
                    run_id=f"R-{part}", part=part, lot=lot, serial=serial, point=point,
                    repeat=0, attempt=0, timestamp="2031-01-01T00:00:00Z",
                    conditions={"if_A": metrics["if_A"], "didt_A_per_s":
                                metrics["didt_A_per_s"], "vr_V": metrics["vr_V"],
                                "temperature_K": temp},
                    metrics=metrics, flags=result.flags,
                ))
    return out


@pytest.fixture(scope="module")
def measured():
    return _shots(with_switch=True)


def test_sic_recovery_loss_far_below_silicon(measured):
    si = estimate_losses(measured["DX-4417"], [20e3, 50e3])
    sic = estimate_losses(measured["DX-5203"], [20e3, 50e3])
    assert {g.basis for g in si.groups} == {"measured"} == {g.basis for g in sic.groups}
    c = compare(sic, si)
    assert len(c.rows) == len(TEMPS) and c.unmatched == ()
    for row in c.rows:
        # "far below": less than a fifth of the silicon part's loss at every temperature
        assert row.energy_a_J < 0.2 * row.energy_b_J
        assert all(p > 80.0 for p in row.saving_pct)
        assert row.saving_W[1] == pytest.approx(2.5 * row.saving_W[0])  # P = fsw·E
    # the silicon loss grows with temperature (stored charge τ(T)), the SiC loss does not
    si_e = [g.energy_mean_J for g in si.groups]
    sic_e = [g.energy_mean_J for g in sic.groups]
    assert si_e[1] > 1.3 * si_e[0]
    # 10 % (common practice): the integration end of these capacitive events lies inside the
    # 8-bit capture's noise (end_in_noise); the end crossing must hold, so noise no longer
    # ends the integration early (one cold shot read 8 uJ against 16-18 uJ before)
    assert sic_e[1] == pytest.approx(sic_e[0], rel=0.10)


def test_silicon_switch_energy_exceeds_diode_err(measured):
    # the switch holds most of the bus voltage while it carries the recovery current, the
    # diode very little during ta: for silicon the switch's share dominates (issue statement,
    # checked here on the simulated physics)
    for shot in measured["DX-4417"]:
        assert shot.metrics["eon_recovery_J"] > shot.metrics["err_J"]
        assert shot.metrics["eon_recovery_J"] == pytest.approx(
            shot.metrics["eon_recovery_estimate_J"], rel=0.35)


def test_estimate_path_without_switch_channel_tells_the_same_story():
    shots = _shots(with_switch=False)
    si = estimate_losses(shots["DX-4417"], [20e3])
    sic = estimate_losses(shots["DX-5203"], [20e3])
    assert {g.basis for g in si.groups} == {"estimate"}
    for row in compare(sic, si).rows:
        assert row.energy_a_J < 0.2 * row.energy_b_J
    assert all(s.metrics["eon_J"] is None for s in shots["DX-4417"])
    assert np.all([s.metrics["eon_recovery_estimate_J"] > 0 for s in shots["DX-5203"]])
