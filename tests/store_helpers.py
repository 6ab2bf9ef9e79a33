"""Builders shared by the store tests: synthetic ADC captures and ShotResult rows.

The values are arbitrary test data (not a device model); they only have to exercise exact
round trips: awkward floats, None metrics, NaN, int8 and int16 codes.
"""

from __future__ import annotations

import numpy as np

from benchrun.analysis.pipeline import ChannelData, ProbeCalibration
from benchrun.records import ShotResult, TestPoint


def make_channels(seed: int = 0, n: int = 2000) -> dict[str, ChannelData]:
    """Two 8-bit-style channels stored as int16 and one int8 channel."""
    rng = np.random.default_rng(seed)
    return {
        "diode_voltage": ChannelData(
            codes=rng.integers(-128, 128, n).astype(np.int16),
            gain=0.1 + 0.2,  # 0.30000000000000004: exercises exact float storage
            offset=-1.0 / 3.0,
            code_min=-128,
            code_max=127,
        ),
        "diode_current": ChannelData(
            codes=rng.integers(-32768, 32767, n).astype(np.int16),
            gain=2.0**-15,
            offset=5e-324,  # smallest subnormal double
            code_min=-32768,
            code_max=32767,
        ),
        "gate": ChannelData(
            codes=rng.integers(-128, 128, n).astype(np.int8),
            gain=0.078125,
            offset=0.0,
            code_min=-128,
            code_max=127,
        ),
    }


def make_probes() -> dict[str, ProbeCalibration]:
    return {
        "diode_voltage": ProbeCalibration(scale=100.0, deskew_s=-1.25e-9),
        "diode_current": ProbeCalibration(scale=1.0 / 0.01, deskew_s=3.3e-9),
        "gate": ProbeCalibration(scale=10.0),
    }


def make_shot(
    run_id: str = "R-0001",
    serial: str = "S001",
    point_index: int = 0,
    repeat: int = 0,
    attempt: int = 0,
    *,
    valid: bool = True,
    raw_ref: str = "shots/000000",
    trr: float = 1.2345678901234567e-7,
) -> ShotResult:
    point = TestPoint(
        index=point_index,
        temperature_K=298.15 + 100.0 * point_index,
        bus_voltage_V=600.0,
        forward_current_A=30.0,
        didt_A_per_s=5e8,
        gate_resistance_ohm=None,
        label=f"P{point_index} \u00b5 test",
    )
    return ShotResult(
        run_id=run_id,
        part="DX-4417",
        lot="LT-0117",
        serial=serial,
        point=point,
        repeat=repeat,
        attempt=attempt,
        timestamp="2031-04-02T10:11:12.345678+00:00",
        conditions={
            "if_A": 30.000000000000004,
            "didt_A_per_s": 498765432.1,
            "vr_V": 599.9999999999999,
            "temperature_K": 298.15,
        },
        metrics={"trr_s": trr, "qrr_C": 1e-300, "irrm_A": -17.25, "softness": None},
        flags=("ringing", "clipped_current") if not valid else (),
        valid=valid,
        raw_ref=raw_ref,
        acquisition={"sample_interval_s": 2.5e-10, "adc_bits": 8.0, "voltage_range_V": 800.0},
    )
