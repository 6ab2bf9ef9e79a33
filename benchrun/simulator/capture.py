"""What the simulated scope captures: capture models behind :class:`SimulatedBench`.

* :class:`PhysicsCaptureModel` (the default): the shot condition goes through
  :func:`benchrun.simulator.physics.simulate_double_pulse` (cached per condition) and the
  physics module's ``digitize`` (probe bandwidth, skew, 8-bit quantisation over the set
  range, noise).
* :class:`PatternCaptureModel`: an idealised, piecewise-linear double-pulse pattern computed
  directly on the sample grid, quantised by :func:`quantize`. It is a signal generator for
  transfer benchmarks and protocol tests, *not* a device model: its waveforms carry no
  physics beyond ``I = V·t/L``.

Both trigger like a scope: the first crossing of the trigger level on the trigger signal in
the chosen direction is ``t = 0``; no crossing, no capture.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from benchrun.simulator.server import (
    AcquisitionSetup,
    Capture,
    CapturedChannel,
    ChannelSetup,
    ShotCondition,
    catalog_device,
)

#: Simulated 8-bit ADC: codes -128..127 span the set full-scale range (255 code steps), as in
#: the physics model's ``acquisition.digitize`` and the scope-generic table's scaling rule.
ADC_CODE_MIN = -128
ADC_CODE_MAX = 127
ADC_CODES_FULL_SCALE = ADC_CODE_MAX - ADC_CODE_MIN


def quantize(signal: np.ndarray, setup: ChannelSetup) -> CapturedChannel:
    """8-bit quantisation of a physical signal (probe units) over the channel's set range.

    Channel volts = physical / probe; the full-scale range spans
    :data:`ADC_CODES_FULL_SCALE` codes centred on the offset; codes beyond the ADC limits clip.
    """
    gain = setup.range / setup.probe / ADC_CODES_FULL_SCALE
    offset = setup.offset / setup.probe
    volts = np.asarray(signal, dtype=float) / setup.probe
    codes = np.clip(np.rint((volts - offset) / gain), ADC_CODE_MIN, ADC_CODE_MAX)
    return CapturedChannel(codes.astype(np.int16), float(gain), float(offset), ADC_CODE_MIN,
                           ADC_CODE_MAX)


def trigger_time(t: np.ndarray, signal: np.ndarray, level: float, slope: str) -> float | None:
    """First instant ``signal`` crosses ``level`` in direction ``slope``; None if never."""
    above = signal >= level if slope == "rising" else signal <= level
    crossings = np.flatnonzero(~above[:-1] & above[1:])
    if crossings.size == 0:
        return None
    k = int(crossings[0])
    s0, s1 = float(signal[k]), float(signal[k + 1])
    frac = 0.0 if s1 == s0 else (level - s0) / (s1 - s0)
    return float(t[k] + frac * (t[k + 1] - t[k]))


class PatternCaptureModel:
    """Idealised double-pulse pattern (see module docstring).

    Parameters
    ----------
    load_inductance_H, didt_A_per_s_at_10_ohm, recovery_charge_C, gate_on_V
        Pattern shape: current ramp V·t/L, commutation slope scaled by 10 Ω / Rg, a
        triangular reverse-recovery lobe holding ``recovery_charge_C``.
    """

    def __init__(self, load_inductance_H: float = 200e-6, didt_A_per_s_at_10_ohm: float = 1e9,
                 recovery_charge_C: float = 2e-6, gate_on_V: float = 15.0) -> None:
        self.load_inductance_H = load_inductance_H
        self.didt_at_10_ohm = didt_A_per_s_at_10_ohm
        self.recovery_charge_C = recovery_charge_C
        self.gate_on_V = gate_on_V

    def signals(self, condition: ShotCondition, t: np.ndarray) -> dict[str, np.ndarray]:
        """Physical signals on the time grid ``t`` (0 = first gate edge)."""
        v = condition.bus_voltage_V
        t1 = condition.first_pulse_s
        t2 = t1 + condition.off_time_s
        t3 = t2 + condition.second_pulse_s
        i_peak = v * t1 / self.load_inductance_H
        didt = self.didt_at_10_ohm * 10.0 / condition.gate_resistance_ohm
        irrm = math.sqrt(self.recovery_charge_C * didt)  # triangle: Q = Irrm²/(2·didt)·2
        gate = np.where((t >= 0) & (t < t1), self.gate_on_V, 0.0)
        i_load = np.clip(np.where(t < t1, t, t1) * v / self.load_inductance_H, 0.0, None)
        i_diode = np.where((t >= t1), i_peak, 0.0)
        v_diode = np.where((t >= t1), 1.0, -v)
        v_diode = np.where(t < 0, 0.0, v_diode)
        if condition.second_pulse_s > 0:
            gate = np.where((t >= t2) & (t < t3), self.gate_on_V, gate)
            fall = i_peak - didt * (t - t2)
            t_zero = t2 + i_peak / didt
            recover = -irrm + didt * 0.5 * (t - t_zero - irrm / didt)
            lobe = np.where(t < t_zero + irrm / didt, fall, np.minimum(recover, 0.0))
            i_diode = np.where((t >= t2) & (t < t3), np.maximum(lobe, -irrm), i_diode)
            i_diode = np.where(t >= t3, i_peak, i_diode)
            v_diode = np.where((t >= t2 + (i_peak + irrm) / didt) & (t < t3), -v, v_diode)
        v_switch = np.where(gate > 0, 0.5, v)
        return {"diode_voltage": v_diode, "diode_current": i_diode, "switch_voltage": v_switch,
                "gate": gate, "load_current": i_load}

    def capture(self, condition: ShotCondition, setup: AcquisitionSetup, catalog: Any,
                fixture: Any, rng: np.random.Generator) -> Capture | None:
        dt = setup.sample_interval_s
        # locate the trigger on a coarse grid spanning the whole shot
        span = condition.first_pulse_s + condition.off_time_s + condition.second_pulse_s
        coarse = np.linspace(-1e-6, span + 1e-6, 4001)
        trig_signal = self.signals(condition, coarse).get(setup.trigger_signal)
        if trig_signal is None:
            return None
        t_trig = trigger_time(coarse, trig_signal, setup.trigger_level, setup.trigger_slope)
        if t_trig is None:
            return None
        t = t_trig + setup.t_start_s + dt * np.arange(setup.record_length)
        signals = self.signals(condition, t)
        channels = {}
        for ch in setup.channels:
            physical = signals.get(ch.signal, np.zeros_like(t))
            channels[ch.channel] = quantize(physical, ch)
        return Capture(channels, setup.t_start_s, dt)


class PhysicsCaptureModel:
    """Shots from the circuit physics (see module docstring).

    Parameters
    ----------
    bandwidth_hz
        Probe/front-end bandwidth per fixture signal (missing = unlimited).
    skew_s
        Probe delay per fixture signal (the bench file's deskew should cancel it).
    noise_lsb
        ADC noise, rms in LSB.
    gain_error, offset_error
        Probe scale error (relative) and additive offset (physical units) per fixture signal.
    voltage_resolution_V, temperature_resolution_K
        Shot conditions are rounded to these steps so that repeated shots at one setting
        reuse the cached circuit solution (the physics is insensitive below them).
    """

    def __init__(
        self,
        bandwidth_hz: Mapping[str, float | None] | None = None,
        skew_s: Mapping[str, float] | None = None,
        noise_lsb: float = 0.6,
        voltage_resolution_V: float = 0.1,
        temperature_resolution_K: float = 0.1,
        gain_error: Mapping[str, float] | None = None,
        offset_error: Mapping[str, float] | None = None,
    ) -> None:
        self.bandwidth_hz = dict(DEFAULT_BANDWIDTH_HZ if bandwidth_hz is None else bandwidth_hz)
        self.skew_s = dict(skew_s or {})
        self.gain_error = dict(gain_error or {})
        self.offset_error = dict(offset_error or {})
        self.noise_lsb = noise_lsb
        self.voltage_resolution_V = voltage_resolution_V
        self.temperature_resolution_K = temperature_resolution_K

    def waveforms(self, condition: ShotCondition, record_end_s: float, catalog: Any,
                  fixture: Any) -> Any:
        """Dense circuit waveforms of a shot (cached by the physics module per condition)."""
        from benchrun.simulator import physics

        diode = catalog_device(catalog, condition.serial)
        switch = physics.SwitchModel(gate_resistance_ohm=condition.gate_resistance_ohm)
        drive = getattr(condition, "gate_drive_V", None)
        if drive is not None:
            switch = dataclasses.replace(switch, gate_on_V=float(drive))
        if condition.second_pulse_s > 0:
            timing = physics.PulseTiming(condition.first_pulse_s, condition.off_time_s,
                                         condition.second_pulse_s)
        else:
            # single-pulse (trim) shot: the solver always runs two pulses, so the second
            # turn-on is placed after the end of the record, where the scope cannot see it
            off = max(record_end_s - condition.first_pulse_s, 0.0) + 5e-6
            timing = physics.PulseTiming(condition.first_pulse_s, off, 1e-6)
        bus = _round_to(condition.bus_voltage_V, self.voltage_resolution_V)
        temperature = _round_to(condition.temperature_K, self.temperature_resolution_K)
        return physics.simulate_double_pulse(fixture, switch, diode, timing, bus, temperature)

    def capture(self, condition: ShotCondition, setup: AcquisitionSetup, catalog: Any,
                fixture: Any, rng: np.random.Generator) -> Capture | None:
        from benchrun.simulator.acquisition import AcquisitionSettings, digitize

        record_end = 1e-6 + setup.t_start_s + setup.sample_interval_s * setup.record_length
        try:
            waves = self.waveforms(condition, max(record_end, 0.0), catalog, fixture)
            trig = waves.channel(setup.trigger_signal)
        except (ValueError, KeyError):
            return None  # no physical shot (e.g. pulse too short), or nothing on the trigger
        t_trig = trigger_time(waves.t, trig, setup.trigger_level, setup.trigger_slope)
        if t_trig is None:
            return None
        settings = AcquisitionSettings(
            sample_interval_s=setup.sample_interval_s,
            record_length=setup.record_length,
            t_start_s=t_trig + setup.t_start_s,
            channel_ranges={ch.signal: (ch.range, ch.offset) for ch in setup.channels},
            bandwidth_hz={ch.signal: self.bandwidth_hz.get(ch.signal) for ch in setup.channels},
            skew_s={ch.signal: self.skew_s.get(ch.signal, 0.0) for ch in setup.channels},
            gain_error={ch.signal: self.gain_error.get(ch.signal, 0.0) for ch in setup.channels},
            offset_error={ch.signal: self.offset_error.get(ch.signal, 0.0)
                          for ch in setup.channels},
            adc_bits=8,
            noise_lsb=self.noise_lsb,
        )
        digitized = digitize(waves, settings, rng)
        channels = {}
        for ch in setup.channels:
            data = digitized[ch.signal]  # physical units: channel volts = physical / probe
            channels[ch.channel] = CapturedChannel(
                np.asarray(data.codes, dtype=np.int16), float(data.gain) / ch.probe,
                float(data.offset) / ch.probe, int(data.code_min), int(data.code_max))
        return Capture(channels, setup.t_start_s, setup.sample_interval_s)


#: Probe bandwidths of the simulated fixture (typical of HV differential probes and wideband
#: current sensors; common practice values, not a particular product).
DEFAULT_BANDWIDTH_HZ: dict[str, float | None] = {
    "diode_voltage": 200e6,
    "switch_voltage": 200e6,
    "diode_current": 120e6,
    "gate": 100e6,
}


def _round_to(value: float, step: float) -> float:
    return float(round(value / step) * step) if step > 0 else float(value)
