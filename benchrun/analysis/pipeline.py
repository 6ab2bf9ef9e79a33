"""The one path from raw scope data to metrics.

Used by the runner when a shot is fired *and* by verification when a stored shot is
re-analysed, so both give identical numbers::

    codes ──(× gain + offset)──► channel volts ──(× probe scale)──► physical units
          ──(deskew)──► analyze_recovery ──► ShotAnalysis

Clipping (samples at the ADC limits) is detected on the codes and reported as flags
``clipped_<channel>``; a clipped diode channel also flags the recovery result.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, is_dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from benchrun.analysis.conditioning import codes_to_volts, deskew, detect_clipping, scale
from benchrun.analysis.forward import ForwardMetrics, analyze_forward
from benchrun.analysis.recovery import RecoveryMetrics, RecoveryOptions, analyze_recovery
from benchrun.analysis.snappiness import OscillationMetrics, analyze_oscillation
from benchrun.analysis.switching import (
    analyze_switch_turn_on,
    switch_current_from_diode,
    switching_estimate,
)
from benchrun.errors import ConfigError, InputDataError

if TYPE_CHECKING:
    from benchrun.analysis.switching import SwitchingMetrics

#: Key prefix of a metric's capture uncertainty among a shot's metrics (``u_qrr_C``).
CAPTURE_U_PREFIX = "u_"

#: Channel names the pipeline knows.
DIODE_VOLTAGE = "diode_voltage"
DIODE_CURRENT = "diode_current"
SWITCH_VOLTAGE = "switch_voltage"
GATE = "gate"


@dataclass(frozen=True)
class ChannelData:
    """One scope channel as captured: ``volts = codes * gain + offset``.

    ``code_min`` / ``code_max`` are the ADC limits; samples there are over-range.
    """

    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int

    def volts(self) -> np.ndarray:
        """Channel volts (float64)."""
        return codes_to_volts(self.codes, self.gain, self.offset)


@dataclass(frozen=True)
class ProbeCalibration:
    """Probe or sensor: physical value = channel volts × ``scale`` (V/V or A/V), moved
    ``deskew_s`` earlier in time to compensate the probe's delay; ``rise_time_s`` the 10-90 %
    rise time of probe and channel (≈ 0.35 / bandwidth), when known (recorded in the result's
    ``corrections``; ``rise_time_limited`` flag)."""

    scale: float
    deskew_s: float = 0.0
    rise_time_s: float | None = None


def clip_flag(name: str) -> str:
    """Flag string for a clipped channel."""
    return f"clipped_{name}"


def _numeric_items(result: Any) -> dict[str, Any]:
    if hasattr(result, "to_dict"):
        data = dict(result.to_dict())
    elif is_dataclass(result):
        data = asdict(result)
    else:
        data = dict(result)
    for key in ("flags", "u", "corrections"):
        data.pop(key, None)
    return data


@dataclass(frozen=True)
class ShotAnalysis:
    """Everything analysed from one shot.

    Attributes
    ----------
    recovery
        Diode recovery metrics.
    switching
        Switch turn-on metrics: measured when a switch-voltage channel was captured, else
        only the labelled ``VR·Qrr`` estimate (``SwitchingMetrics.is_estimate``).
    flags
        Union of the recovery, switching and conditioning flags (ordered, no repeats).
    """

    recovery: RecoveryMetrics
    switching: SwitchingMetrics | None = None
    flags: tuple[str, ...] = field(default=())
    forward: ForwardMetrics | None = None
    oscillation: OscillationMetrics | None = None

    def metrics(self) -> dict[str, float | None]:
        """All numeric keys of the recovery, switching and forward results, merged, and the
        capture uncertainty of each recovery metric as ``u_<key>`` (:data:`CAPTURE_U_PREFIX`)."""
        out = _numeric_items(self.recovery)
        if self.switching is not None:
            out.update(_numeric_items(self.switching))
        if self.forward is not None:
            out.update(_numeric_items(self.forward))
        if self.oscillation is not None:
            out.update(self.oscillation.to_dict())
        for key, u in self.recovery.u.items():
            if u is not None:
                out[CAPTURE_U_PREFIX + key] = u
        return out


def physical_channel(
    name: str, dt: float, channel: ChannelData, probe: ProbeCalibration
) -> tuple[np.ndarray, tuple[str, ...]]:
    """Physical samples of one channel (scaled, deskewed) and its clipping flags."""
    codes = np.asarray(channel.codes)
    if codes.ndim != 1:
        raise InputDataError(f"channel {name!r}: codes must be 1-D, got shape {codes.shape}")
    clipped = detect_clipping(codes, channel.code_min, channel.code_max)
    flags = (clip_flag(name),) if clipped["low"] or clipped["high"] else ()
    values = scale(channel.volts(), probe.scale)
    if probe.deskew_s:
        values = deskew(values, dt, probe.deskew_s)
    return values, flags


def _merge_flags(*groups: tuple[str, ...]) -> tuple[str, ...]:
    seen: dict[str, None] = {}
    for group in groups:
        for flag in group:
            seen.setdefault(flag, None)
    return tuple(seen)


def analyze_channels(
    t_start: float,
    dt: float,
    channels: Mapping[str, ChannelData],
    probes: Mapping[str, ProbeCalibration],
    options: RecoveryOptions | None = None,
) -> ShotAnalysis:
    """Analyse one shot from raw channel data.

    Parameters
    ----------
    t_start, dt
        Time of the first sample and sample interval [s].
    channels
        Captured channels by name: ``"diode_voltage"`` and ``"diode_current"`` are required;
        ``"switch_voltage"`` and ``"gate"`` are optional.
    probes
        Probe calibration for every channel used.
    options
        Recovery analysis options.

    Raises
    ------
    InputDataError
        A required channel is missing, or the data are unusable.
    NoEventError
        No recovery event in the record.
    """
    physical: dict[str, np.ndarray] = {}
    conditioning_flags: dict[str, tuple[str, ...]] = {}
    for name in channels:
        if name not in probes:
            raise ConfigError(f"no probe calibration for channel {name!r}", field="probes")
    for required in (DIODE_VOLTAGE, DIODE_CURRENT):
        if required not in channels:
            raise InputDataError(f"required channel {required!r} is missing")
    for name in (DIODE_VOLTAGE, DIODE_CURRENT, SWITCH_VOLTAGE):
        if name in channels:
            physical[name], conditioning_flags[name] = physical_channel(
                name, dt, channels[name], probes[name]
            )
    opts = options or RecoveryOptions()
    opts = replace(opts,
                   voltage_rise_time_s=probes[DIODE_VOLTAGE].rise_time_s
                   or opts.voltage_rise_time_s,
                   current_rise_time_s=probes[DIODE_CURRENT].rise_time_s
                   or opts.current_rise_time_s)
    recovery = analyze_recovery(
        None, physical[DIODE_VOLTAGE], physical[DIODE_CURRENT], opts, dt=dt, t_start=t_start
    )
    recovery = replace(recovery, corrections={
        **recovery.corrections,
        "deskew_s": {name: probes[name].deskew_s for name in physical},
    })
    diode_flags = conditioning_flags[DIODE_VOLTAGE] + conditioning_flags[DIODE_CURRENT]
    if diode_flags:
        recovery = replace(recovery, flags=_merge_flags(diode_flags, recovery.flags))
    # Switch turn-on metrics (benchrun.analysis.switching): measured when a switch-voltage
    # channel is present (switch current = IF − diode current during the commutation), else
    # only the VR·Qrr estimate, whose "estimate only" flag stays inside the switching result.
    switch_flags: tuple[str, ...] = ()
    if SWITCH_VOLTAGE in physical and recovery.if_A is not None:
        i_sw = switch_current_from_diode(physical[DIODE_CURRENT], recovery.if_A)
        switching = analyze_switch_turn_on(
            None, physical[SWITCH_VOLTAGE], i_sw, recovery, dt=dt, t_start=t_start
        )
        switch_flags = switching.flags
    else:
        switching = switching_estimate(recovery)
    forward = _forward(t_start, dt, physical, channels[DIODE_VOLTAGE], probes[DIODE_VOLTAGE],
                       recovery)
    # what follows the recovery: overshoot, oscillation, flat top (benchrun.analysis.snappiness)
    t_axis = t_start + dt * np.arange(physical[DIODE_VOLTAGE].size)
    oscillation = analyze_oscillation(t_axis, physical[DIODE_VOLTAGE], physical[DIODE_CURRENT],
                                      t0_s=recovery.t0_s, t2_s=recovery.t2_s,
                                      vr_V=recovery.vr_V, vrm_V=recovery.vrm_V)
    return ShotAnalysis(
        recovery=recovery,
        switching=switching,
        flags=_merge_flags(recovery.flags, switch_flags, forward.flags,
                           *conditioning_flags.values()),
        forward=forward,
        oscillation=oscillation,
    )


def _forward(t_start: float, dt: float, physical: Mapping[str, np.ndarray],
             voltage: ChannelData, probe: ProbeCalibration,
             recovery: RecoveryMetrics) -> ForwardMetrics:
    """VF at IF and forward recovery (benchrun.analysis.forward) from the same capture."""
    v = physical[DIODE_VOLTAGE]
    t = t_start + dt * np.arange(v.size)
    return analyze_forward(t, v, physical[DIODE_CURRENT], if_A=recovery.if_A,
                           t0_s=recovery.t0_s, voltage_lsb_V=abs(voltage.gain * probe.scale))
