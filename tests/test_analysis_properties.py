"""Invariance properties of the recovery analysis (hypothesis).

The waveforms come from the closed-form Lauritzen–Ma ramp solution (see
test_analysis_closed_form.py; Lauritzen & Ma, IEEE Trans. Power Electronics 6(2), 1991).
The properties follow from the definitions themselves (DESIGN.md §3): every metric is
defined by crossings, extrema and integrals, so shifting time shifts only the absolute
instants; scaling the current scales currents, charges and energies but no durations; and
the result does not depend on the sampling rate beyond the sampling resolution.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import analyze_recovery

DURATIONS = ("ta_s", "tb_s", "trr_s")
INSTANTS = ("t0_s", "t_irrm_s", "t_trr_s", "t2_s")

models = st.builds(
    LMRamp,
    IF=st.floats(5.0, 100.0),
    a=st.floats(50e6, 1000e6),
    tau=st.floats(40e-9, 300e-9),
    TM=st.floats(15e-9, 100e-9),
    VR=st.floats(100.0, 1000.0),
    Ls=st.floats(10e-9, 100e-9),
)


def record(model: LMRamp, dt: float):
    # the record runs past the recovery: blocking at ts, tail ~ 12·τe, then the VR window
    return double_pulse_record(model, dt, t_lead=2e-6, t_tail=model.ts + 12 * model.tau_e + 0.5e-6)


@settings(max_examples=25, deadline=None)
@given(model=models, shift=st.floats(-1e-3, 1e-3))
def test_time_shift_moves_instants_only(model, shift):
    t, v, i = record(model, 0.2e-9)
    base = analyze_recovery(t, v, i).to_dict()
    moved = analyze_recovery(t + shift, v, i).to_dict()
    for key in DURATIONS:
        assert moved[key] == pytest.approx(base[key], rel=1e-6, abs=1e-15), key
    for key in INSTANTS:
        assert moved[key] - shift == pytest.approx(base[key], abs=1e-13), key
    for key in ("if_A", "irrm_A", "qrr_C", "err_J", "vrm_V"):
        assert moved[key] == pytest.approx(base[key], rel=1e-6), key


@settings(max_examples=25, deadline=None)
@given(model=models, k_i=st.floats(0.01, 100.0), k_v=st.floats(0.01, 100.0))
def test_amplitude_scaling(model, k_i, k_v):
    t, v, i = record(model, 0.2e-9)
    base = analyze_recovery(t, v, i).to_dict()
    scaled = analyze_recovery(t, v * k_v, i * k_i).to_dict()
    for key in ("if_A", "irrm_A", "qrr_C", "didt_A_per_s"):
        assert scaled[key] == pytest.approx(base[key] * k_i, rel=1e-6), key
    for key in ("vrm_V", "vr_V"):
        assert scaled[key] == pytest.approx(base[key] * k_v, rel=1e-6), key
    assert scaled["err_J"] == pytest.approx(base["err_J"] * k_i * k_v, rel=1e-6)
    for key in (*DURATIONS, "softness", "rrsf"):
        assert scaled[key] == pytest.approx(base[key], rel=1e-6), key


@settings(max_examples=25, deadline=None)
@given(model=models, dt_fine=st.sampled_from([0.1e-9, 0.2e-9]), factor=st.sampled_from([2, 5]))
def test_sampling_rate_independence(model, dt_fine, factor):
    fine = analyze_recovery(*record(model, dt_fine)).to_dict()
    coarse = analyze_recovery(*record(model, dt_fine * factor)).to_dict()
    dt = dt_fine * factor
    # within the sampling resolution: a cusp peak moves by at most one sample's slope
    slope = max(model.a, model.irrm / model.tau_e)
    assert coarse["irrm_A"] == pytest.approx(fine["irrm_A"], abs=slope * dt)
    assert coarse["if_A"] == pytest.approx(fine["if_A"], rel=1e-9)
    for key in ("qrr_C", "didt_A_per_s"):
        assert coarse[key] == pytest.approx(fine[key], rel=0.01), key
    assert coarse["trr_s"] == pytest.approx(fine["trr_s"], rel=0.01, abs=2 * dt)
    # the model's voltage steps at the blocking instant, so the trapezoid over that one
    # sample interval differs by up to one sample of peak power
    step_energy = dt * fine["vrm_V"] * fine["irrm_A"]
    assert coarse["err_J"] == pytest.approx(fine["err_J"], rel=0.01, abs=step_energy)
