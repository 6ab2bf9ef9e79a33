"""The integration end t2 when its level (2 % of Irrm) lies inside the capture's noise.

A noise excursion of the locator must not end the integration early: the return has to hold
(rule in benchrun.analysis.measure, README flag table). Reference: the closed-form
Lauritzen–Ma recovery (Lauritzen & Ma, IEEE Trans. Power Electronics 6(2), 1991;
tests/test_analysis_closed_form.py), whose t2 is ts + τe·ln 50.
"""

from __future__ import annotations

import numpy as np
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import analyze_recovery
from benchrun.analysis import events as ev
from benchrun.analysis.measure import END_NOISE_MULTIPLE


def test_held_crossing_skips_short_excursions():
    s = np.array([-1.0, 0.5, -1.0, 0.5, 0.6, 0.7, -1.0, 0.5, 0.5, 0.5, 0.5, 0.5])
    assert ev.first_held_at_or_above(s, 0.0, 0, s.size, 1) == 1
    assert ev.first_held_at_or_above(s, 0.0, 0, s.size, 3) == 3
    assert ev.first_held_at_or_above(s, 0.0, 0, s.size, 4) == 7
    # at the end of the range fewer samples suffice
    assert ev.first_held_at_or_above(s, 0.0, 0, 9, 4) == 7
    assert ev.first_held_at_or_above(-np.abs(s), 0.1, 0, s.size, 2) is None


def _capture(noise_lsb: float, seed: int):
    model = LMRamp()
    t, v, i = double_pulse_record(model, 0.4e-9)
    rng = np.random.default_rng(seed)
    lsb = 2.4 * model.IF / 256
    i = np.round((i + rng.normal(0.0, noise_lsb * lsb, i.size)) / lsb) * lsb
    return model, analyze_recovery(t, v, i), lsb


def test_flag_rule_and_t2_not_early():
    # 2 LSB rms noise: 0.02·Irrm (0.34 A) < 3σ (1.1 A): flagged, and the end is not early
    early = []
    for seed in range(20):
        model, got, lsb = _capture(2.0, seed)
        names = [f.split(":")[0] for f in got.flags]
        assert "end_in_noise" in names
        assert 0.02 * got.irrm_A < END_NOISE_MULTIPLE * 2.0 * lsb
        t2_ref = model.ts + model.tau_e * np.log(50.0)
        early.append(got.t2_s < t2_ref - 3.0 * got.u["t2_s"])
    assert sum(early) <= 1


def test_no_flag_when_the_end_level_stands_out():
    model = LMRamp()
    t, v, i = double_pulse_record(model, 0.4e-9)
    got = analyze_recovery(t, v, i + np.random.default_rng(1).normal(0.0, 0.02, i.size))
    assert not any(f.startswith("end_in_noise") for f in got.flags)
