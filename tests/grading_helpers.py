"""Builders of ShotResult lists and limits files for the grading tests (invented demo data)."""

from __future__ import annotations

from benchrun.grading.uncertainty import InstrumentInputs
from benchrun.records import ShotResult, TestPoint

COLD = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=30.0,
                 gate_resistance_ohm=10.0, label="nominal")
HOT = TestPoint(index=1, temperature_K=398.15, bus_voltage_V=600.0, forward_current_A=30.0,
                gate_resistance_ohm=10.0, label="nominal")

ACQUISITION = {"sample_interval_s": 1e-9, "voltage_range_V": 1000.0, "current_range_A": 80.0,
               "adc_bits": 8}


def metrics(qrr: float = 2.0e-6, irrm: float = 18.0, trr: float = 180e-9, **extra: float):
    """A plausible metrics dict; ta/tb split 60/40, Err ≈ VR·Qrr/4."""
    ta = 0.6 * trr
    values = {
        "if_A": 30.0, "t0_s": 5e-6, "irrm_A": irrm, "ta_s": ta, "tb_s": trr - ta,
        "trr_s": trr, "softness": (trr - ta) / ta, "rrsf": 0.8, "qrr_C": qrr,
        "err_J": 600.0 * qrr / 4, "didt_A_per_s": 5e8, "vrm_V": 720.0, "vr_V": 600.0,
    }
    values.update(extra)
    return values


def shot(serial: str, point: TestPoint, repeat: int = 0, *, attempt: int = 0,
         valid: bool = True, conditions: dict | None = None, part: str = "DX-4417",
         acquisition: dict | None = None, **metric_values: float) -> ShotResult:
    measured = {"if_A": point.forward_current_A, "didt_A_per_s": 5e8,
                "vr_V": point.bus_voltage_V, "temperature_K": point.temperature_K}
    measured.update(conditions or {})
    return ShotResult(
        run_id="R-TEST", part=part, lot="LT-0117", serial=serial, point=point, repeat=repeat,
        attempt=attempt, timestamp=f"2026-01-01T00:00:{repeat:02d}Z", conditions=measured,
        metrics=metrics(**metric_values), flags=() if valid else ("no_event",), valid=valid,
        raw_ref=f"shots/{serial}/{point.index}/{repeat}/{attempt}",
        acquisition=dict(ACQUISITION if acquisition is None else acquisition),
    )


LIMITS_YAML = """\
part: DX-4417
conditions:
  - {name: 25C, temperature: 25 degC}
  - {name: 125C, temperature: 125 degC}
tolerances: {forward_current: 5 %, didt: 25 %, reverse_voltage: 5 %, temperature: 3 K}
limits:
  - {metric: qrr_C, condition: 25C, max: 3.0 uC}
  - {metric: qrr_C, condition: 125C, max: 6.5 uC}
  - {metric: trr_s, max: 400 ns}
decision_rule: {rule: RULE, guard_factor: 1}
uncertainty:
  coverage_factor: 2
bins:
  metric: qrr_C
  condition: 125C
  classes: [{name: Q1, max: 4.5 uC}, {name: Q2, max: 5.5 uC}, {name: Q3, max: 6.5 uC}]
lot: {lot_size: 20, sample_size: 5, plan: zero-acceptance, aql: 1 %, acceptance_number: 0}
"""

#: Instrument and probe accuracies as a bench file would give them (typical figures, common
#: practice): scope 1.5 % of full scale, shunt 1 %, voltage probe 2 %, residual skew 0.5 ns.
INPUTS = InstrumentInputs(scope_vertical_accuracy=0.015, current_sensor_tolerance=0.01,
                          voltage_probe_tolerance=0.02, deskew=0.5e-9,
                          scope_source="certificate T-1, calibrated 2026-01-12",
                          current_source="certificate T-2, calibrated 2026-01-12",
                          voltage_source="certificate T-3, calibrated 2026-01-12",
                          deskew_source="certificate T-2, calibrated 2026-01-12")


def write_limits(tmp_path, text: str = LIMITS_YAML, rule: str = "guarded", name: str = "l.yaml"):
    path = tmp_path / name
    path.write_text(text.replace("RULE", rule))
    return path
