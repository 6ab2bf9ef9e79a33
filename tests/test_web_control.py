"""Individuals-chart limits and the eight Nelson tests, against their published definitions
(L. S. Nelson, J. Quality Technology 16(4), 1984; ISO 7870-2:2023 §8, Table 3 and Annex B)."""

from __future__ import annotations

import pytest

from benchrun.web.control import D2_N2, Limits, individuals_limits, nelson_signals

LIM = Limits(centre=0.0, sigma=1.0, baseline=20)


def rules(values):
    return {s.rule for s in nelson_signals(values, LIM)}


def test_individuals_limits_from_moving_range():
    # NIST/SEMATECH e-Handbook §6.3.2.2: sigma = MRbar / d2, d2 = 1.128 for n = 2
    values = [10.0, 12.0, 11.0, 13.0, 12.0]
    lim = individuals_limits(values, baseline=5)
    assert lim.centre == pytest.approx(11.6)
    assert lim.sigma == pytest.approx(((2 + 1 + 2 + 1) / 4) / 1.128)
    assert D2_N2 == 1.128
    assert lim.upper == pytest.approx(11.6 + 3 * lim.sigma)
    # only the baseline sets the limits
    assert individuals_limits([*values, 100.0], baseline=5) == lim
    assert individuals_limits([1.0], baseline=5) is None


def test_quiet_process_breaks_no_rule():
    assert rules([0.5, -0.4, 1.2, -1.1, 0.3, -0.2, 1.5, -1.4, 0.2, -0.6, 1.1, 0.9, -1.3]) == set()


def test_rule_1_beyond_three_sigma():
    assert 1 in rules([0.0, 3.1]) and 1 in rules([0.0, -3.5])
    assert 1 not in rules([0.0, 2.9])


def test_rule_2_nine_on_one_side():
    assert 2 in rules([0.5] * 9)
    assert 2 not in rules([0.5] * 8 + [-0.5])


def test_rule_3_six_trending():
    assert 3 in rules([0.1, 0.2, 0.3, 0.4, 0.5, 0.6])
    assert 3 in rules([0.6, 0.5, 0.4, 0.3, 0.2, 0.1])
    assert 3 not in rules([0.1, 0.2, 0.3, 0.4, 0.5])


def test_rule_4_fourteen_alternating():
    alternating = [0.5 if k % 2 else -0.5 for k in range(14)]
    assert 4 in rules(alternating)
    assert 4 not in rules(alternating[:13])


def test_rule_5_two_of_three_beyond_two_sigma():
    assert 5 in rules([2.5, 0.0, 2.2])
    assert 5 not in rules([2.5, 0.0, -2.2])  # opposite sides


def test_rule_6_four_of_five_beyond_one_sigma():
    assert 6 in rules([1.5, 1.2, 0.0, 1.1, 1.3])
    assert 6 not in rules([1.5, 1.2, 0.0, 0.0, 1.3])


def test_rule_7_fifteen_within_one_sigma():
    hugging = [0.2 if k % 3 else -0.2 for k in range(15)]
    assert 7 in rules(hugging)
    assert 7 not in rules(hugging[:14])


def test_rule_8_eight_outside_one_sigma_either_side():
    assert 8 in rules([1.5, -1.5] * 4)
    assert 8 not in rules([1.5, -1.5] * 3 + [0.5, 1.5])


def _reference(values, lim):
    """The tests written out point by point from Nelson (1984), for comparison."""
    from itertools import pairwise

    z = [(v - lim.centre) / lim.sigma for v in values]
    out = set()

    def window(i, n):
        return z[i - n + 1:i + 1] if i >= n - 1 else None

    for i in range(len(z)):
        def w(n, i=i):
            return window(i, n)

        x = values[i - 5:i + 1] if i >= 5 else None
        if abs(z[i]) > 3:
            out.add((1, i))
        if w(9) and (all(v > 0 for v in w(9)) or all(v < 0 for v in w(9))):
            out.add((2, i))
        if x and (all(b > a for a, b in pairwise(x)) or all(b < a for a, b in pairwise(x))):
            out.add((3, i))
        if i >= 13:
            y = values[i - 13:i + 1]
            d = [b - a for a, b in pairwise(y)]
            if all(p * q < 0 for p, q in pairwise(d)):
                out.add((4, i))
        for n, k, level, rule in ((3, 2, 2, 5), (5, 4, 1, 6)):
            if w(n) and (sum(v > level for v in w(n)) >= k or sum(v < -level for v in w(n)) >= k):
                out.add((rule, i))
        if w(15) and all(abs(v) < 1 for v in w(15)):
            out.add((7, i))
        if w(8) and all(abs(v) > 1 for v in w(8)):
            out.add((8, i))
    return out


def test_matches_point_by_point_reference():
    import numpy as np

    rng = np.random.default_rng(11)
    for trial in range(40):
        n = int(rng.integers(1, 80))
        values = list(rng.normal(0.3 * (trial % 3), 1.0, n) + np.linspace(0, trial % 4, n))
        got = {(s.rule, s.index) for s in nelson_signals(values, LIM)}
        assert got == _reference(values, LIM), trial
