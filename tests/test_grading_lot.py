"""Lot statistics (Cpk, outliers) and lot disposition against hand-computed cases."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from benchrun.grading.decision import CONFORMING, INDETERMINATE, INVALID, NONCONFORMING
from benchrun.grading.lot import (
    capability,
    disposition,
    find_outliers,
    modified_z_scores,
    summarize,
)


def test_cpk_two_sided_hand_case():
    # Montgomery, Introduction to Statistical Quality Control, ch. 8 (from memory):
    # USL = 62, LSL = 38, μ = 53, σ = 2 → Cpu = 9/6 = 1.5, Cpl = 15/6 = 2.5, Cpk = 1.5
    cpk, cpl, cpu = capability(53.0, 2.0, 38.0, 62.0)
    assert cpu == pytest.approx(1.5)
    assert cpl == pytest.approx(2.5)
    assert cpk == pytest.approx(1.5)


def test_cpk_one_sided_uses_the_available_limit():
    # only a maximum (e.g. Qrr ≤ 3 µC): Cpk = Cpu = (USL − μ)/(3σ) = (3 − 2.4)/(3·0.1) = 2.0
    cpk, cpl, cpu = capability(2.4e-6, 0.1e-6, None, 3.0e-6)
    assert cpk == pytest.approx(2.0)
    assert cpl is None and cpu == pytest.approx(2.0)
    # only a minimum (softness ≥ 0.35): Cpl = (0.5 − 0.35)/(3·0.05) = 1.0
    assert capability(0.5, 0.05, 0.35, None)[0] == pytest.approx(1.0)
    # a mean outside the limit gives a negative index
    assert capability(3.3e-6, 0.1e-6, None, 3.0e-6)[0] == pytest.approx(-1.0)
    assert capability(1.0, 0.0, 0.0, 2.0) == (None, None, None)


def test_summary_matches_numpy():
    values = [2.1e-6, 2.3e-6, 1.9e-6, 2.2e-6, 2.0e-6]
    result = summarize("qrr_C", "25C", values, None, 3.0e-6, min_n=5)
    assert result.n == 5
    assert result.mean == pytest.approx(float(np.mean(values)))
    assert result.std == pytest.approx(float(np.std(values, ddof=1)))
    assert (result.minimum, result.maximum) == (1.9e-6, 2.3e-6)
    expected = (3.0e-6 - np.mean(values)) / (3 * np.std(values, ddof=1))
    assert result.cpk == pytest.approx(float(expected))
    single = summarize("qrr_C", "25C", [2e-6], None, 3e-6, min_n=1)
    assert single.std is None and single.cpk is None


def test_capability_hidden_below_the_minimum_n_and_for_ungraded_metrics():
    values = [2.1e-6, 2.3e-6, 1.9e-6, 2.2e-6, 2.0e-6] * 4  # n = 20 < 25
    hidden = summarize("qrr_C", "25C", values, None, 3.0e-6)
    assert hidden.cpk is None and hidden.cpk_lower is None
    assert hidden.capability_note == "n = 20 < 25: capability not stated"
    shown = summarize("qrr_C", "25C", values + values[:5], None, 3.0e-6)
    assert shown.n == 25 and shown.cpk is not None and shown.cpk_lower < shown.cpk
    ungraded = summarize("if_A", "25C", [30.0] * 30 + [30.5])
    assert ungraded.cpk is None and "not graded" in ungraded.capability_note


@pytest.mark.parametrize(("n", "seed"), [(30, 1), (50, 2), (200, 3)])
def test_bissell_lower_bound_against_the_exact_noncentral_t_bound(n, seed):
    """Bissell's (1990) approximation against the exact one-sided bound of Cpu.

    For a one-sided index, 3·√n·Ĉpu = √n·(USL − x̄)/s follows a noncentral t distribution
    with n − 1 degrees of freedom and noncentrality 3·√n·Cpu (the textbook pivot; scipy's
    ``nct`` as the outside reference). The exact 95 % lower bound is the Cpu whose noncentral t
    puts 95 % of its mass below the observed statistic. Bissell's normal approximation agrees
    within a few percent at these n (Bissell, Applied Statistics 39(3), 1990, Table 1 shows
    errors of this order).
    """
    from scipy.optimize import brentq

    rng = np.random.default_rng(seed)
    values = list(rng.normal(2.0e-6, 0.2e-6, n))
    result = summarize("qrr_C", "25C", values, None, 3.0e-6)
    t_observed = 3 * np.sqrt(n) * result.cpu
    exact = brentq(lambda c: stats.nct.cdf(t_observed, n - 1, 3 * np.sqrt(n) * c) - 0.95,
                   -5.0, 20.0)
    assert result.cpk_lower == pytest.approx(exact, rel=0.03)
    assert result.cpk_lower < result.cpk


def test_modified_z_score_hand_case():
    # Iglewicz & Hoaglin (1993): M = 0.6745 (x − median)/MAD, outlier when |M| > 3.5.
    # x (µC) = 2.0 2.1 1.9 2.05 1.95 2.02 3.5: median 2.02, |x − median| sorted
    # 0 .02 .03 .07 .08 .12 1.48 → MAD = 0.07; M(3.5) = 0.6745·1.48/0.07 = 14.261
    values = [2.0, 2.1, 1.9, 2.05, 1.95, 2.02, 3.5]
    scores = modified_z_scores(values)
    assert scores[-1] == pytest.approx(14.2609, rel=1e-4)
    assert scores[2] == pytest.approx(0.6745 * -0.12 / 0.07)
    # scipy's MAD (scale = 1) as an outside reference for the denominator
    mad = stats.median_abs_deviation(values)
    assert scores[-1] == pytest.approx(0.6745 * (3.5 - np.median(values)) / mad)
    serials = [f"S{i}" for i in range(len(values))]
    outliers = find_outliers("qrr_C", "125C", serials, values)
    assert [o.serial for o in outliers] == ["S6"]


def test_no_outliers_when_mad_is_zero():
    assert modified_z_scores([1.0, 1.0, 1.0, 5.0]) is None
    assert find_outliers("qrr_C", "25C", ["a", "b", "c", "d"], [1.0, 1.0, 1.0, 5.0]) == []


def _verdicts(**counts: int) -> dict[str, str]:
    names = {"ok": CONFORMING, "bad": NONCONFORMING, "maybe": INDETERMINATE, "gone": INVALID}
    verdicts = {}
    for key, count in counts.items():
        for index in range(count):
            verdicts[f"{key}{index}"] = names[key]
    return verdicts


def test_disposition_acceptance_number():
    rule = {"sample_size": None, "indeterminate": "nonconforming", "invalid": "nonconforming"}
    decision, reasons = disposition(_verdicts(ok=9, bad=1), acceptance_number=0, **rule)
    assert decision == "reject"
    assert any("bad0" in r for r in reasons)
    assert disposition(_verdicts(ok=9, bad=1), acceptance_number=1, **rule)[0] == "accept"
    assert disposition(_verdicts(ok=10), acceptance_number=0, **rule)[0] == "accept"


def test_disposition_counts_indeterminate_and_invalid_as_the_rule_says():
    verdicts = _verdicts(ok=8, maybe=1, gone=1)
    strict = disposition(verdicts, acceptance_number=0, sample_size=None,
                         indeterminate="nonconforming", invalid="nonconforming")
    assert strict[0] == "reject"
    lenient = disposition(verdicts, acceptance_number=0, sample_size=None,
                          indeterminate="conforming", invalid="excluded")
    assert lenient[0] == "accept"
    # excluded invalid devices still count against the sample size n
    short = disposition(verdicts, acceptance_number=0, sample_size=10,
                        indeterminate="conforming", invalid="excluded")
    assert short[0] == "reject"
    assert any("fewer than the sample size n = 10" in r for r in short[1])
    assert disposition({}, acceptance_number=0, sample_size=None, indeterminate="conforming",
                       invalid="excluded")[0] == "reject"
