"""From a capture to a stored, analysed shot — the same path live and when recovering.

:func:`analyse` runs :func:`benchrun.analysis.analyze_channels` (the one path shared with
verification) and turns a capture that cannot be analysed into an *invalid result*, never an
exception. :func:`build_result` adds the measured conditions and their check.
:func:`shot_key` names a shot in the raw record deterministically, so a shot that reached the
raw record but not the database before a crash is found and completed on resume.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchrun.analysis import ChannelData, ProbeCalibration, RecoveryOptions, analyze_channels
from benchrun.config.bench import BenchConfig, system_rise_time
from benchrun.config.sequence import SequenceConfig
from benchrun.errors import AnalysisError
from benchrun.records import CONDITION_KEYS, ShotResult, TestPoint
from benchrun.runner.conditions import check_conditions
from benchrun.runner.didt import commutation_didt

#: Flag of a shot whose capture could not be analysed at all.
FLAG_ANALYSIS_FAILED = "analysis_failed"
#: Metrics without which a shot cannot be graded.
REQUIRED_METRICS = ("if_A", "irrm_A", "qrr_C", "trr_s")


#: Serial characters kept as they are in a raw-record key; every other byte is escaped.
_KEY_SAFE = frozenset(b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789_.-")


def key_safe_serial(serial: str) -> str:
    """A serial as it appears in a raw-record key: one-to-one, unchanged when plain.

    Letters, digits, ``_``, ``.`` and ``-`` stay; every other UTF-8 byte becomes ``%XX``
    (percent-encoding as in RFC 3986 §2.1, upper-case hex). ``%`` never occurs in a plain
    serial, so distinct serials always give distinct keys and the keys of plain serials are
    those older records hold.
    """
    return "".join(chr(b) if b in _KEY_SAFE else f"%{b:02X}" for b in serial.encode("utf-8"))


def shot_key(point_index: int, serial: str, repeat: int, attempt: int) -> str:
    """Raw-record key of one shot: ``p000-<serial>-r00-a0`` (serial by
    :func:`key_safe_serial`)."""
    return f"p{point_index:03d}-{key_safe_serial(serial)}-r{repeat:02d}-a{attempt}"


def probes_for(bench: BenchConfig) -> dict[str, ProbeCalibration]:
    """Probe calibrations of every wired signal."""
    return {name: ProbeCalibration(scale=p.scale, deskew_s=p.deskew,
                                   rise_time_s=system_rise_time(bench, name))
            for name, p in bench.probes.items()}


def recovery_options(sequence: SequenceConfig) -> RecoveryOptions:
    return RecoveryOptions(**sequence.analysis.option_values())


def analyse(t_start: float, dt: float, channels: Mapping[str, ChannelData],
            probes: Mapping[str, ProbeCalibration], options: RecoveryOptions
            ) -> tuple[dict[str, float | None], tuple[str, ...]]:
    """Metrics and flags of one capture; a capture without an event gives empty metrics and
    the flag ``analysis_failed: <reason>``."""
    try:
        result = analyze_channels(t_start, dt, dict(channels), dict(probes), options)
    except AnalysisError as exc:
        return {}, (f"{FLAG_ANALYSIS_FAILED}: {exc}",)
    metrics = {k: (None if v is None or not math.isfinite(float(v)) else float(v))
               for k, v in result.metrics().items()}
    return metrics, tuple(result.flags)


def narrowest(channel: ChannelData) -> ChannelData:
    """The channel with its codes in int8 when the ADC range fits (8-bit scopes): half the
    bytes to compress and store, the same values (so the same analysis)."""
    codes = np.asarray(channel.codes)
    if codes.dtype != np.int8 and channel.code_min >= -128 and channel.code_max <= 127:
        return ChannelData(codes.astype(np.int8), channel.gain, channel.offset,
                           channel.code_min, channel.code_max)
    return channel


def adc_bits(channel: ChannelData) -> float:
    """Resolution of the ADC behind a channel, from its code range and the code step.

    A family that left-justifies an 8-bit ADC into 16-bit words has a code step of 256;
    the step is the greatest common divisor of the differences between codes seen.
    """
    codes = np.asarray(channel.codes)
    if codes.size and codes.dtype.kind in "iu" and codes.dtype.itemsize <= 2:
        # the values present, sorted, from a histogram: no sort of the whole record
        low = int(codes.min())
        values = np.flatnonzero(np.bincount((codes.astype(np.int32) - low).ravel())) + low
    else:
        values = np.unique(codes.astype(np.int64))
    diffs = np.diff(values)
    step = int(np.gcd.reduce(diffs)) if diffs.size else 1
    step = max(step, 1)
    levels = (channel.code_max - channel.code_min) / step + 1
    return round(math.log2(max(levels, 2.0)), 2)


def acquisition_facts(dt: float, channels: Mapping[str, ChannelData],
                      probes: Mapping[str, ProbeCalibration]) -> dict[str, float]:
    """What the uncertainty budget needs: sample interval, full-scale ranges, ADC bits."""
    facts: dict[str, float] = {"sample_interval_s": float(dt)}
    for name, key in (("diode_current", "current_range_A"), ("diode_voltage", "voltage_range_V")):
        ch = channels.get(name)
        if ch is None:
            continue
        full_scale = (ch.code_max - ch.code_min) * abs(ch.gain) * abs(probes[name].scale)
        facts[key] = float(full_scale)
    if "diode_current" in channels:
        facts["adc_bits"] = adc_bits(channels["diode_current"])
    for name, key in (("diode_current", "current_rise_time_s"),
                      ("diode_voltage", "voltage_rise_time_s")):
        rise = getattr(probes.get(name), "rise_time_s", None)
        if rise is not None:  # the chain's rise time from the bench file's bandwidths
            facts[key] = float(rise)
    return facts


@dataclass(frozen=True)
class ShotContext:
    """The shot's identity and the conditions measured outside the capture."""

    run_id: str
    part: str
    lot: str
    serial: str
    point: TestPoint
    repeat: int
    attempt: int
    timestamp: str
    temperature_K: float | None
    bus_voltage_V: float | None
    #: where the temperature was measured: "plate" or "case" (bench fixture)
    temperature_sensor: str | None = None
    #: the gate-drive setting the shot was fired with: ``gate_resistance_ohm`` and
    #: ``gate_drive_V`` (None: not set by the runner)
    gate: dict[str, float] | None = None

    def attrs(self, settings: dict[str, Any]) -> dict[str, Any]:
        """Shot attributes for the raw record."""
        return {
            "run_id": self.run_id, "part": self.part, "lot": self.lot, "serial": self.serial,
            "point": self.point.to_dict(), "repeat": self.repeat, "attempt": self.attempt,
            "timestamp": self.timestamp, "temperature_K": self.temperature_K,
            "bus_voltage_V": self.bus_voltage_V, "settings": settings,
            "temperature_sensor": self.temperature_sensor, "gate": self.gate,
        }  # fmt: skip

    def identity(self) -> dict[str, Any]:
        """The ``ShotResult`` fields this context fixes (who, where, when)."""
        return {"run_id": self.run_id, "part": self.part, "lot": self.lot,
                "serial": self.serial, "point": self.point, "repeat": self.repeat,
                "attempt": self.attempt, "timestamp": self.timestamp}

    @classmethod
    def from_attrs(cls, attrs: Mapping[str, Any]) -> ShotContext:
        return cls(
            run_id=attrs["run_id"], part=attrs["part"], lot=attrs["lot"],
            serial=attrs["serial"], point=TestPoint(**attrs["point"]),
            repeat=int(attrs["repeat"]), attempt=int(attrs["attempt"]),
            timestamp=attrs["timestamp"], temperature_K=attrs.get("temperature_K"),
            bus_voltage_V=attrs.get("bus_voltage_V"),
            temperature_sensor=attrs.get("temperature_sensor"), gate=attrs.get("gate"),
        )  # fmt: skip


def build_result(context: ShotContext, t_start: float, dt: float,
                 channels: Mapping[str, ChannelData], probes: Mapping[str, ProbeCalibration],
                 sequence: SequenceConfig, raw_ref: str) -> ShotResult:
    """Analyse a capture and check its measured conditions: one :class:`ShotResult`."""
    metrics, flags = analyse(t_start, dt, channels, probes, recovery_options(sequence))
    conditions: dict[str, Any] = {
        "if_A": metrics.get("if_A"),
        "didt_A_per_s": measured_didt(t_start, dt, channels, probes, metrics.get("if_A")),
        "vr_V": metrics.get("vr_V"),
        "temperature_K": context.temperature_K,
    }
    assert tuple(conditions) == CONDITION_KEYS
    check = check_conditions(context.point, conditions, sequence.tolerances)
    missing = [k for k in REQUIRED_METRICS if metrics.get(k) is None]
    all_flags = list(flags) + list(check.flags)
    if missing and not any(f.startswith(FLAG_ANALYSIS_FAILED) for f in flags):
        all_flags.append(f"metrics_missing: {', '.join(missing)}")
    clipped = any(f.startswith("clipped_diode") for f in flags)
    valid = check.valid and not missing and not clipped
    return ShotResult(
        **context.identity(),
        conditions=conditions,
        metrics=metrics,
        flags=tuple(dict.fromkeys(all_flags)),
        valid=valid,
        raw_ref=raw_ref,
        acquisition={**acquisition_facts(dt, channels, probes),
                     **{k: float(v) for k, v in (context.gate or {}).items()
                        if v is not None}},
    )


def measured_didt(t_start: float, dt: float, channels: Mapping[str, ChannelData],
                  probes: Mapping[str, ProbeCalibration], if_A: float | None) -> float | None:
    """The shot's di/dt as a test condition: :func:`benchrun.runner.didt.commutation_didt`
    on the diode current (its rate of change through the zero crossing, which the
    device under test barely shapes); None without a current channel or an IF."""
    channel = channels.get("diode_current")
    if channel is None or not if_A or not math.isfinite(if_A):
        return None
    probe = probes.get("diode_current")
    amps = (np.asarray(channel.codes, dtype=float) * channel.gain + channel.offset) * (
        probe.scale if probe is not None else 1.0)
    t = t_start + dt * np.arange(amps.size)
    return commutation_didt(t, amps, float(if_A))
