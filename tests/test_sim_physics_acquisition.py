"""Checks of the simulated scope acquisition: bandwidth, skew, ADC range, clipping, noise."""

from __future__ import annotations

import numpy as np
import pytest

from benchrun.simulator.acquisition import (
    AcquisitionSettings,
    digitize,
    lowpass_first_order,
    standard_normal_fast,
)
from benchrun.simulator.physics import CircuitWaveforms


def step_waveforms(t_edge=10e-9, level=100.0, t_stop=1e-6):
    """A synthetic record: every channel steps from 0 to ``level`` at ``t_edge`` (1 ps edge).

    Sampled every 5 ps (the filtered waveform is exact at the sample points and linear between,
    like the simulator's own fine grid around switching events).
    """
    t = np.linspace(-1e-6, t_stop, round((t_stop + 1e-6) / 5e-12) + 1)
    y = np.clip((t - t_edge) / 1e-12, 0.0, 1.0) * level
    return CircuitWaveforms(
        t=t, v_diode=y, i_diode=y, v_switch=y, i_switch=y, gate=y, i_load=y,
        bus_voltage_V=600.0, temperature_K=298.15, current_at_first_turn_off_A=0.0,
        current_at_second_turn_on_A=0.0, bus_voltage_at_second_turn_on_V=600.0,
        peak_reverse_current_A=0.0, t_first_off_s=0.0, t_second_on_s=0.0, t_second_off_s=0.0,
    )


def crossing(t, y, level):
    k = int(np.argmax(y >= level))
    return t[k - 1] + (level - y[k - 1]) * (t[k] - t[k - 1]) / (y[k] - y[k - 1])


def fine_settings(**kw):
    base = dict(
        sample_interval_s=10e-12, record_length=20000, t_start_s=-20e-9,
        channel_ranges={"diode_voltage": (250.0, 50.0)}, adc_bits=16, noise_lsb=0.0,
    )
    base.update(kw)
    return AcquisitionSettings(**base)


@pytest.mark.parametrize("bw", [50e6, 200e6])
def test_rise_time_follows_bandwidth(bw):
    # single-pole low-pass: 10-90 % rise time = ln(9)/(2π·BW) ≈ 0.35/BW (standard result for a
    # first-order system; the "BW·tr ≈ 0.35" rule)
    acq = fine_settings(bandwidth_hz={"diode_voltage": bw})
    ch = digitize(step_waveforms(), acq)["diode_voltage"]
    t, y = acq.time_axis(), ch.values()
    tr = crossing(t, y, 90.0) - crossing(t, y, 10.0)
    assert tr == pytest.approx(np.log(9.0) / (2 * np.pi * bw), rel=0.01)


def test_lowpass_matches_analytic_ramp_response():
    # T·dy/dt = x − y with x a unit ramp from 0: y = t − T·(1 − e^(−t/T)) (standard solution);
    # non-uniform steps exercise the run splitting
    T = 3e-9
    t = np.concatenate([np.linspace(0, 5e-9, 11), np.linspace(5.5e-9, 40e-9, 30)])
    y = lowpass_first_order(t, t.copy(), T)
    assert np.allclose(y, t - T * (1 - np.exp(-t / T)), atol=1e-15, rtol=1e-9)


def test_skew_shifts_the_channel():
    acq = fine_settings(skew_s={"diode_voltage": 3e-9})
    ch = digitize(step_waveforms(), acq)["diode_voltage"]
    t50 = crossing(acq.time_axis(), ch.values(), 50.0)
    assert t50 == pytest.approx(13e-9, abs=15e-12)


def test_probe_gain_error_and_offset_are_applied():
    # the probe delivers (1 + g)·x + o (definition of a scale error and an additive offset)
    acq = fine_settings(gain_error={"diode_voltage": 0.02}, offset_error={"diode_voltage": 1.5})
    ch = digitize(step_waveforms(level=100.0), acq)["diode_voltage"]
    y = ch.values()
    assert y[0] == pytest.approx(1.5, abs=0.01)  # before the step: the offset alone
    assert y[-1] == pytest.approx(1.02 * 100.0 + 1.5, abs=0.01)
    # the 50 % point of the shown step moves with the gain error, not in time
    t50 = crossing(acq.time_axis(), y, 0.5 * (y[0] + y[-1]))
    assert t50 == pytest.approx(10e-9, abs=15e-12)


def test_codes_gain_offset_and_clipping():
    acq = AcquisitionSettings(
        sample_interval_s=1e-9, record_length=200, t_start_s=-50e-9,
        channel_ranges={"diode_voltage": (64.0, 0.0)}, noise_lsb=0.0,
    )
    ch = digitize(step_waveforms(level=100.0), acq)["diode_voltage"]
    assert ch.codes.dtype == np.int16
    assert (ch.code_min, ch.code_max) == (-128, 127)
    assert ch.gain == pytest.approx(64.0 / 255.0)
    # before the step: 0 V sits at code 0 (offset = screen centre); after: clipped at the limit
    assert np.all(ch.codes[:50] == 0)
    assert np.all(ch.codes[70:] == ch.code_max)
    # 8-bit quantisation error within half an LSB on an in-range value
    acq2 = AcquisitionSettings(
        sample_interval_s=1e-9, record_length=200, t_start_s=-50e-9,
        channel_ranges={"diode_voltage": (255.0, 50.0)}, noise_lsb=0.0,
    )
    ch2 = digitize(step_waveforms(level=100.0), acq2)["diode_voltage"]
    assert abs(ch2.values()[-1] - 100.0) <= 0.5 * ch2.gain + 1e-12


def test_noise_is_one_lsb_rms_gaussian():
    flat = step_waveforms(t_edge=1.0, t_stop=2e-6)  # stays at 0 over the record
    acq = AcquisitionSettings(
        sample_interval_s=1e-9, record_length=200000, t_start_s=0.0,
        channel_ranges={"diode_current": (100.0, 0.0)}, adc_bits=12, noise_lsb=1.0, seed=3,
    )
    codes = digitize(flat, acq)["diode_current"].codes.astype(float)
    # rounding adds 1/12 LSB² to the 1 LSB² of noise (uniform quantisation error, standard)
    assert codes.std() == pytest.approx(np.sqrt(1.0 + 1.0 / 12.0), rel=0.02)
    assert abs(codes.mean()) < 0.02
    # the deviates themselves: normal moments (scipy-free check of mean, variance, kurtosis)
    z = standard_normal_fast(np.random.default_rng(5), 400000).astype(float)
    assert abs(z.mean()) < 0.01
    assert z.std() == pytest.approx(1.0, rel=0.01)
    kurt = np.mean(z**4) / np.mean(z**2) ** 2
    assert kurt == pytest.approx(3.0, abs=0.05)


def test_same_seed_same_codes_and_fresh_generator_differs():
    wf = step_waveforms()
    acq = fine_settings(adc_bits=8, noise_lsb=1.0, seed=11)
    a = digitize(wf, acq)["diode_voltage"].codes
    b = digitize(wf, acq)["diode_voltage"].codes
    c = digitize(wf, acq, np.random.default_rng(99))["diode_voltage"].codes
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)


def test_invalid_settings_rejected():
    with pytest.raises(ValueError):
        AcquisitionSettings(0.0, 100, 0.0, {"gate": (10.0, 0.0)})
    with pytest.raises(ValueError):
        AcquisitionSettings(1e-9, 100, 0.0, {"gate": (-10.0, 0.0)})


@pytest.mark.parametrize(
    ("t_start", "length"), [(-20e-9, 200_003), (-2e-6, 150_000), (0.5e-6, 70_001)],
    ids=["inside", "starts-before-the-waveform", "ends-after-the-waveform"],
)
def test_record_equals_plain_interpolation_of_the_filtered_waveform(t_start, length):
    # digitize works block by block in ADC-code units on the simulator's own grid; without
    # noise the record must be the textbook sequence: sample the (filtered) waveform at
    # t_k − skew by linear interpolation (numpy.interp as the reference), scale to codes,
    # round, clip.  Rounding ties may differ by floating-point order: allow 1 code on 0.01 %.
    wf = step_waveforms(level=100.0, t_stop=1e-6)
    acq = AcquisitionSettings(
        sample_interval_s=13e-12, record_length=length, t_start_s=t_start,
        channel_ranges={"diode_voltage": (150.0, 40.0), "diode_current": (90.0, 10.0)},
        bandwidth_hz={"diode_voltage": 150e6}, skew_s={"diode_current": 1.7e-9},
        noise_lsb=0.0,
    )
    out = digitize(wf, acq)
    t = acq.time_axis()
    for name, (span, offset) in acq.channel_ranges.items():
        bw = acq.bandwidth_hz.get(name)
        y = wf.channel(name) if bw is None else lowpass_first_order(
            wf.t, wf.channel(name), 1.0 / (2 * np.pi * bw)
        )
        gain = span / 255.0
        analog = np.interp(t - acq.skew_s.get(name, 0.0), wf.t, y)
        expected = np.clip(np.rint((analog - offset) / gain), -128, 127)
        diff = np.abs(out[name].codes - expected)
        assert diff.max() <= 1
        assert np.count_nonzero(diff) <= 1e-4 * length
