"""Decision rules against the definitions of ILAC-G8:09/2019 §4.2 and ISO 14253-1.

The worked cases are constructed from the document's definitions (TL tolerance limit,
AL acceptance limit, w guard band, U expanded uncertainty):
- §4.2.1 binary statement, simple acceptance: AL = TL; pass below AL, fail above.
- §4.2.2 binary statement with guard band: AL = TL − w; pass below AL, fail above.
- §4.2.3 non-binary statement with guard band: pass below TL − w, conditional pass in
  [TL − w, TL], conditional fail in [TL, TL + w], fail above TL + w.
ISO 14253-1 calls these conforming / indeterminate (both conditional cases) / non-conforming.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchrun.grading.decision import (
    CONFORMING,
    INDETERMINATE,
    INVALID,
    NONCONFORMING,
    DecisionRule,
    decide,
    worst,
)

SIMPLE = DecisionRule("simple")
GUARDED = DecisionRule("guarded", 1.0)
BINARY = DecisionRule("guarded-binary", 1.0)

# Upper tolerance limit TL = 10, U = 1, w = U (ILAC-G8:09/2019 Figure 5 is drawn for w = U).
TL, U = 10.0, 1.0


@pytest.mark.parametrize(
    ("value", "outcome", "statement"),
    [
        (8.5, CONFORMING, "pass"),                # below AL = TL − w = 9
        (9.0, CONFORMING, "pass"),                # at AL (accepted; common practice)
        (9.5, INDETERMINATE, "conditional pass"),  # in [TL − w, TL]
        (10.0, INDETERMINATE, "conditional pass"),  # at TL
        (10.5, INDETERMINATE, "conditional fail"),  # in [TL, TL + w]
        (11.5, NONCONFORMING, "fail"),             # above TL + w
    ],
)
def test_ilac_g8_non_binary_guard_band_upper_limit(value, outcome, statement):
    # ILAC-G8:09/2019 §4.2.3, non-binary statement with guard band w = U
    decision = decide(value, U, None, TL, GUARDED)
    assert decision.outcome == outcome
    assert decision.statement == statement
    assert decision.acceptance_upper == pytest.approx(9.0)
    assert decision.rejection_upper == pytest.approx(11.0)


@pytest.mark.parametrize(
    ("value", "outcome"),
    [(9.99, CONFORMING), (10.0, CONFORMING), (10.01, NONCONFORMING), (12.0, NONCONFORMING)],
)
def test_ilac_g8_simple_acceptance(value, outcome):
    # ILAC-G8:09/2019 §4.2.1: AL = TL, w = 0; U does not enter the decision
    decision = decide(value, 5.0, None, TL, SIMPLE)
    assert decision.outcome == outcome
    assert decision.guard_band == 0.0
    assert decision.acceptance_upper == TL


@pytest.mark.parametrize(
    ("value", "outcome"), [(8.9, CONFORMING), (9.5, NONCONFORMING), (10.5, NONCONFORMING)]
)
def test_ilac_g8_binary_guard_band(value, outcome):
    # ILAC-G8:09/2019 §4.2.2: pass below AL = TL − w, fail above it
    assert decide(value, U, None, TL, BINARY).outcome == outcome


def test_lower_limit_mirrors_upper():
    # a minimum (e.g. softness ≥ 0.35): the guard band moves the acceptance limit up
    lower = 0.35
    assert decide(0.50, 0.05, lower, None, GUARDED).outcome == CONFORMING
    assert decide(0.38, 0.05, lower, None, GUARDED).outcome == INDETERMINATE
    assert decide(0.32, 0.05, lower, None, GUARDED).statement == "conditional fail"
    assert decide(0.29, 0.05, lower, None, GUARDED).outcome == NONCONFORMING
    assert decide(0.38, 0.05, lower, None, GUARDED).acceptance_lower == pytest.approx(0.40)


def test_guard_factor_scales_the_band():
    # w = r·U (ILAC-G8:09/2019 §4.2.2); r = 0.5 halves it
    half = DecisionRule("guarded", 0.5)
    assert decide(9.4, U, None, TL, half).outcome == CONFORMING
    assert decide(9.4, U, None, TL, GUARDED).outcome == INDETERMINATE
    assert decide(9.4, U, None, TL, half).guard_band == pytest.approx(0.5)


def test_guard_band_wider_than_half_the_tolerance_leaves_no_acceptance_zone():
    # tolerance interval [0, 1], U = 0.6: TL − w < TL_low + w, nothing can be proven conforming
    decision = decide(0.5, 0.6, 0.0, 1.0, GUARDED)
    assert decision.outcome == INDETERMINATE
    assert "no acceptance zone" in decision.reason
    assert decide(0.5, 0.6, 0.0, 1.0, BINARY).outcome == NONCONFORMING


def test_reason_names_value_and_limit_in_engineering_units():
    decision = decide(7.538e-6, 0.59e-6, None, 6.5e-6, GUARDED, name="Qrr at 125C", unit="C")
    assert decision.outcome == NONCONFORMING
    assert "7.538 µC" in decision.reason and "6.5 µC" in decision.reason


def test_worst_outcome_order():
    assert worst([CONFORMING, INDETERMINATE]) == INDETERMINATE
    assert worst([INDETERMINATE, INVALID]) == INVALID
    assert worst([INVALID, NONCONFORMING, CONFORMING]) == NONCONFORMING
    assert worst([]) == CONFORMING


def test_rule_statement_cites_the_document():
    assert "ILAC-G8:09/2019 §4.2.3" in GUARDED.describe()
    assert "§4.2.1" in SIMPLE.describe()
    with pytest.raises(ValueError):
        DecisionRule("lenient")


finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)
positive = st.floats(min_value=1e-6, max_value=1e2, allow_nan=False, allow_infinity=False)
factor = st.floats(min_value=0.0, max_value=1.0, allow_nan=False)


@settings(max_examples=60, deadline=None)
@given(center=finite, slack=positive, u=positive, margin=positive, r=factor,
       position=st.floats(min_value=-1.0, max_value=1.0), data=st.data())
def test_inside_by_more_than_u_is_conforming(center, slack, u, margin, r, position, data):
    # ISO 14253-1 / ILAC-G8: a value inside the tolerance zone reduced by U is conforming
    # under every rule with w ≤ U
    half = u + margin + slack
    lower, upper = center - half, center + half
    rule = data.draw(st.sampled_from([SIMPLE, DecisionRule("guarded", r),
                                      DecisionRule("guarded-binary", r)]))
    value = center + position * slack
    assert decide(value, u, lower, upper, rule).outcome == CONFORMING


@settings(max_examples=60, deadline=None)
@given(center=finite, half=positive, u=positive, margin=positive, r=factor,
       above=st.booleans(), data=st.data())
def test_outside_by_more_than_u_is_nonconforming(center, half, u, margin, r, above, data):
    lower, upper = center - half, center + half
    rule = data.draw(st.sampled_from([SIMPLE, DecisionRule("guarded", r),
                                      DecisionRule("guarded-binary", r)]))
    value = upper + u + margin if above else lower - u - margin
    assert decide(value, u, lower, upper, rule).outcome == NONCONFORMING


@settings(max_examples=80, deadline=None)
@given(value=finite, center=finite, half=positive, u=positive,
       r=st.floats(min_value=0.0, max_value=3.0), one_sided=st.sampled_from(["lo", "hi", ""]))
def test_guarded_never_accepts_what_simple_rejects(value, center, half, u, r, one_sided):
    # the guarded acceptance zone lies inside the tolerance zone (ILAC-G8:09/2019 §4.2.2)
    lower = None if one_sided == "hi" else center - half
    upper = None if one_sided == "lo" else center + half
    simple = decide(value, u, lower, upper, SIMPLE).outcome
    for rule in (DecisionRule("guarded", r), DecisionRule("guarded-binary", r)):
        if decide(value, u, lower, upper, rule).outcome == CONFORMING:
            assert simple == CONFORMING
