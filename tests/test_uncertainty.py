"""GUM budgets (JCGM 100:2008) against hand-computed values and numerical derivatives."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from benchrun.grading.uncertainty import (
    Contributor,
    InstrumentInputs,
    combine,
    make_budget,
    metric_budget,
    metric_contributors,
    rectangular,
    resolution,
    triangular,
    type_a,
)

INPUTS = InstrumentInputs(scope_vertical_accuracy=0.015, current_sensor_tolerance=0.01,
                          voltage_probe_tolerance=0.02, deskew=0.5e-9,
                          integration_end_fraction=0.02)
ACQ = {"sample_interval_s": 1e-9, "current_range_A": 80.0, "voltage_range_V": 1000.0,
       "adc_bits": 8}


def test_type_b_conversions():
    # JCGM 100:2008 §4.3.7: rectangular ±a → a/√3; §4.3.9: triangular → a/√6;
    # F.2.2.1: resolution δx → δx/√12 ≈ 0.29·δx
    assert rectangular(1.0) == pytest.approx(0.5773502692)
    assert rectangular(-0.3) == pytest.approx(0.1732050808)
    assert triangular(1.0) == pytest.approx(0.4082482905)
    assert resolution(1.0) == pytest.approx(0.2886751346)
    assert resolution(1.0) == pytest.approx(0.29, abs=0.005)


def test_type_a_standard_deviation_of_the_mean():
    # JCGM 100:2008 §4.2.2-4.2.3, hand computed: x = 1, 2, 3, 4 → mean 2.5,
    # s² = (2.25 + 0.25 + 0.25 + 2.25)/3 = 5/3, s = 1.290994, s/√4 = 0.645497
    s, u = type_a([1.0, 2.0, 3.0, 4.0])
    assert s == pytest.approx(1.2909944487)
    assert u == pytest.approx(0.6454972244)
    # numpy as an outside reference (ddof = 1)
    assert s == pytest.approx(float(np.std([1.0, 2.0, 3.0, 4.0], ddof=1)))
    assert type_a([1.0]) is None


def test_combination_hand_computed_with_a_rectangular_term():
    # u_c = sqrt(Σ (c_i u_i)²), JCGM 100:2008 eq. (10), uncorrelated inputs.
    # Rectangular ±0.3 (c = 1): 0.3/√3 = 0.1732051 → (0.1732051)² = 0.03
    # Normal u = 0.1 with c = 2: 0.2 → 0.04
    # u_c = √0.07 = 0.2645751, U = 2·u_c = 0.5291503 (JCGM 100:2008 §6.2.1, k = 2)
    items = [
        Contributor("rect", "B", rectangular(0.3), "1", 1.0),
        Contributor("normal", "B", 0.1, "1", -2.0),  # the sign of c_i does not matter
    ]
    assert combine(items) == pytest.approx(math.sqrt(0.07))
    budget = make_budget("x", 1.0, items, coverage_factor=2.0)
    assert budget.combined == pytest.approx(0.2645751311)
    assert budget.expanded == pytest.approx(0.5291502622)


def test_qrr_budget_hand_computed():
    # Qrr = 2.0 µC (mean of 1.98 and 2.02 µC), Irrm = 18 A on an 80 A full-scale range.
    # scope: a = 1.5 % · 80 A / 18 A = 0.0666667 (relative), u = a/√3 = 0.0384900,
    #        c = Qrr = 2 µC → 76.980 nC
    # shunt: 1 %/√3 = 0.0057735, c = 2 µC → 11.547 nC
    # t2:    1 ns/√12 = 0.288675 ns, c = 0.02·18 A = 0.36 A → 0.10392 nC
    # Type A: s = 28.284 nC, s/√2 = 20.000 nC
    # u_c = sqrt(76.980² + 11.547² + 0.10392² + 20²) nC = 80.3696 nC
    # Welch-Satterthwaite (JCGM 100:2008 G.4.1): ν_eff = 80.3696⁴ / (20⁴ / 1) = 260.76;
    # k = t quantile at 95.45 % for 260.76 dof (G.3.4; scipy.stats.t) = 2.0096
    values = {"qrr_C": 2.0e-6, "irrm_A": 18.0}
    budget = metric_budget("qrr_C", values, ACQ, INPUTS, repeat_samples=[1.98e-6, 2.02e-6])
    contributions = sorted(c.contribution for c in budget.contributors)
    assert contributions == pytest.approx([1.0392305e-10, 1.1547005e-08, 2.0e-08, 7.6980036e-08])
    assert budget.combined == pytest.approx(8.036958e-08, rel=1e-6)
    assert budget.effective_dof == pytest.approx(80.3696**4 / 20**4, rel=1e-4)
    k = stats.t.ppf(0.5 * (1 + math.erf(2 / math.sqrt(2))), 80.3696**4 / 20**4)
    assert budget.coverage_factor == pytest.approx(k, rel=1e-4)
    assert budget.expanded == pytest.approx(k * 8.036958e-08, rel=1e-4)


def test_few_repeats_widen_the_coverage_factor():
    # three repeats dominating the budget: ν_eff ≈ 2, k = t(95.45 %, 2) = 4.53 (GUM Table G.2)
    budget = metric_budget("ta_s", {"ta_s": 1e-7}, {}, INPUTS,
                           repeat_samples=[1.0e-7, 1.1e-7, 0.9e-7])
    assert budget.effective_dof == pytest.approx(2.0)
    assert budget.coverage_factor == pytest.approx(4.53, abs=0.01)


def test_identical_quantised_repeats_keep_the_capture_uncertainty():
    # five identical readings: s = 0, but each shot is known only to its capture u
    budget = metric_budget("qrr_C", {"qrr_C": 2e-6}, {}, INPUTS,
                           repeat_samples=[2e-6] * 5, capture_u=[30e-9] * 5)
    (capture,) = [c for c in budget.contributors if c.name.startswith("capture")]
    assert capture.contribution == pytest.approx(30e-9 / math.sqrt(5))
    assert budget.combined >= 30e-9 / math.sqrt(5)
    # scatter: the Type A term with n - 1 dof beside the capture term; ν_eff by G.2b
    spread = metric_budget("qrr_C", {"qrr_C": 2e-6}, {}, INPUTS,
                           repeat_samples=[1.8e-6, 2.0e-6, 2.2e-6], capture_u=[30e-9] * 3)
    (term,) = [c for c in spread.contributors if c.name.startswith("repeatability")]
    assert term.dof == 2 and term.contribution == pytest.approx(0.2e-6 / math.sqrt(3))
    u_a = 0.2e-6 / math.sqrt(3)
    assert spread.effective_dof == pytest.approx(spread.combined**4 / (u_a**4 / 2), rel=1e-9)


def test_single_shot_has_no_type_a_term_and_says_so():
    budget = metric_budget("qrr_C", {"qrr_C": 2e-6, "irrm_A": 18.0}, ACQ, INPUTS,
                           repeat_samples=[2e-6])
    assert not any("repeatability" in c.name for c in budget.contributors)
    assert any("single shot" in note for note in budget.notes)


def test_missing_acquisition_facts_are_noted_not_hidden():
    budget = metric_budget("irrm_A", {"irrm_A": 18.0}, {}, INPUTS)
    assert any("current_range_A" in note for note in budget.notes)
    assert any("sensor" in c.name for c in budget.contributors)


def _instants(metric: str, values: dict) -> dict[str, float]:
    items, _ = metric_contributors(metric, values, ACQ, INPUTS)
    return {c.name: c.sensitivity for c in items if c.input_unit == "s"}


def test_softness_sensitivities_match_numerical_derivatives():
    # S = (t_trr − t_irrm)/(t_irrm − t0); central differences as the outside check
    t0, t_irrm, t_trr = 0.0, 100e-9, 160e-9
    values = {"softness": 0.6, "ta_s": t_irrm - t0, "tb_s": t_trr - t_irrm}

    def s(a, b, c):
        return (c - b) / (b - a)

    h = 1e-13
    numeric = {
        "timing resolution of t0": (s(t0 + h, t_irrm, t_trr) - s(t0 - h, t_irrm, t_trr)) / (2 * h),
        "timing resolution of the current minimum":
            (s(t0, t_irrm + h, t_trr) - s(t0, t_irrm - h, t_trr)) / (2 * h),
        "timing resolution of the trr end point":
            (s(t0, t_irrm, t_trr + h) - s(t0, t_irrm, t_trr - h)) / (2 * h),
    }
    analytic = _instants("softness", values)
    assert analytic.keys() == numeric.keys()
    for name, value in numeric.items():
        assert analytic[name] == pytest.approx(value, rel=1e-5)


def _triangle_recovery(if_a=30.0, irrm=18.0, didt=5e8, tb=80e-9, vr=600.0, dt=1e-11):
    """Idealised recovery: i falls at di/dt through 0 to −Irrm, then rises linearly to 0 in tb;
    v = 0 until the current minimum, −VR after it (step). Sign convention of DESIGN.md §3."""
    ta = irrm / didt
    t = np.arange(-if_a / didt, ta + tb + 200e-9, dt)
    i = np.where(t < ta, -didt * t, -irrm + (t - ta) * irrm / tb)
    i = np.minimum(i, if_a)
    i = np.where(t > ta + tb, 0.0, i)
    v = np.where(t < ta, 0.0, -vr)
    return t, v, i, ta, tb


def test_err_deskew_sensitivity_matches_a_numerical_derivative():
    # ∂Err/∂τ for a skew τ of the current against the voltage, by numerical integration of the
    # idealised waveform shifted ±τ (numpy), versus the budget's first-order VR·Irrm
    t, v, i, _, _ = _triangle_recovery()
    tau = 0.5e-9

    def err(shift):
        i_shifted = np.interp(t + shift, t, i)
        window = t >= 0
        return float(np.trapezoid((v * i_shifted)[window], t[window]))

    numeric = abs(err(tau) - err(-tau)) / (2 * tau)
    items, _ = metric_contributors("err_J", {"err_J": err(0.0), "irrm_A": 18.0, "vr_V": 600.0,
                                             "vrm_V": 600.0}, ACQ, INPUTS)
    deskew = next(c for c in items if "deskew" in c.name)
    assert deskew.sensitivity == pytest.approx(numeric, rel=0.02)
    assert deskew.standard_uncertainty == pytest.approx(0.5e-9 / math.sqrt(3))


def test_qrr_end_point_sensitivity_matches_a_numerical_derivative():
    # Qrr(t2) = −∫_{t0}^{t2} i dt; ∂Qrr/∂t2 = |i(t2)| = f·Irrm at the 2 % end point
    t, _, i, ta, tb = _triangle_recovery()
    t2 = ta + tb * (1 - 0.02)  # where the linear tail is at −0.02·Irrm

    def qrr(end):
        window = (t >= 0) & (t <= end)
        return -float(np.trapezoid(i[window], t[window]))

    h = 1e-9
    numeric = (qrr(t2 + h) - qrr(t2 - h)) / (2 * h)
    analytic = _instants("qrr_C", {"qrr_C": qrr(t2), "irrm_A": 18.0})
    assert analytic["timing resolution of the integration end t2"] == pytest.approx(numeric,
                                                                                    rel=0.02)


def test_didt_instant_sensitivity_matches_a_numerical_derivative():
    # di/dt = ΔI/(t_b − t_a), ΔI = 0.5·IF + 0.5·Irrm
    if_a, irrm, didt = 30.0, 18.0, 5e8
    delta_i = 0.5 * if_a + 0.5 * irrm
    span = delta_i / didt
    h = 1e-13
    numeric = (delta_i / (span - h) - delta_i / (span + h)) / (2 * h)  # ∂/∂t_a
    analytic = _instants("didt_A_per_s", {"didt_A_per_s": didt, "if_A": if_a, "irrm_A": irrm})
    assert analytic["timing resolution of the +0.5·IF crossing"] == pytest.approx(numeric,
                                                                                  rel=1e-5)


def test_times_are_insensitive_to_gain_errors():
    # a gain error scales i but not its zero crossings or the fractions of Irrm: only instants
    items, _ = metric_contributors("trr_s", {"trr_s": 1.8e-7}, ACQ, INPUTS)
    assert {c.input_unit for c in items} == {"s"}
    assert [c.sensitivity for c in items] == [-1.0, 1.0]


def test_pooled_repeatability_hand_computed():
    # groups (1, 3) and (2, 2, 5): Σ(x − x̄)² = 2 + 6 = 8 over ν = 1 + 2 = 3 (ISO 5725-2 pooling)
    from benchrun.grading.uncertainty import pooled_std

    s_p, nu = pooled_std([[1.0, 3.0], [2.0, 2.0, 5.0], [7.0]])
    assert nu == 3 and s_p == pytest.approx(math.sqrt(8 / 3))
    assert pooled_std([[1.0], [2.0]]) is None
    budget = metric_budget("ta_s", {"ta_s": 1e-7}, {}, INPUTS,
                           repeat_samples=[1.0e-7, 1.1e-7], pooled=(0.05e-7, 30.0))
    (term,) = [c for c in budget.contributors if c.name.startswith("repeatability")]
    assert term.dof == 30 and term.contribution == pytest.approx(0.05e-7 / math.sqrt(2))
