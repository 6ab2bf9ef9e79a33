"""Bench file schema: instruments, probes, fixture, safety, calibration dates."""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import pytest

from benchrun.config.bench import calibration_states, load_bench
from benchrun.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]

BENCH = """\
name: test bench
instruments:
  scope:   {resource: "TCPIP0::10.0.0.5::5025::SOCKET", family: scope-generic,
            calibration_due: 2027-01-10}
  pulse:   {resource: sim, family: pulse-generic, calibration_due: 2026-12-20}
  supply:  {resource: sim, family: supply-generic, calibration_due: 2026-11-30}
probes:
  diode_voltage: {channel: 1, kind: voltage, attenuation: 100}
  diode_current: {channel: 2, kind: current_sensor, sensitivity: 0.01 V/A, deskew: 2 ns}
fixture:
  load_inductance: 200 uH
  load_resistance: 20 mohm
  stray_inductance: 40 nH
  inductor_saturation_current: 80 A
  max_pulse_width: 50 us
  bus_capacitance: 100 uF
  bleeder_resistance: 20 kohm
safety:
  max_bus_voltage: 1000 V
  max_current: 60 A
  max_inductor_energy: 1 J
  max_capacitor_energy: 60 J
"""


def write(tmp_path, text):
    path = tmp_path / "bench.yaml"
    path.write_text(text)
    return path


def test_example_bench_loads():
    bench = load_bench(ROOT / "sequences" / "bench-sim.yaml")
    assert bench.visa_library == "@py"
    assert bench.simulated
    assert bench.probes["diode_current"].scale == pytest.approx(100.0)  # 1 / 10 mOhm
    assert bench.fixture.load_inductance == pytest.approx(200e-6)


def test_quantities_and_probe_scales(tmp_path):
    bench = load_bench(write(tmp_path, BENCH))
    assert bench.visa_library == "@py"  # default
    assert not bench.simulated
    assert bench.instruments.thermal is None
    assert bench.probes["diode_voltage"].scale == 100.0
    # a 0.01 V/A sensor: 100 A per channel volt
    assert bench.probes["diode_current"].scale == pytest.approx(100.0)
    assert bench.probes["diode_current"].deskew == pytest.approx(2e-9)
    assert bench.safety.touch_safe_voltage == 60.0  # IEC 61140 / IEC 62368-1 ES1 default


def test_simulated_probe_errors_parse_with_units(tmp_path):
    from benchrun.runner.simbench import sim_capture_model

    text = BENCH.replace(
        "deskew: 2 ns}",
        "deskew: 2 ns,\n                  simulated: {offset: 0.3 A, gain_error: 0.01, "
        "skew: 2 ns, bandwidth: 80 MHz}}")
    bench = load_bench(write(tmp_path, text))
    sim = bench.probes["diode_current"].simulated
    assert (sim.offset, sim.gain_error, sim.skew, sim.bandwidth) == (
        pytest.approx(0.3), 0.01, pytest.approx(2e-9), pytest.approx(80e6))
    model = sim_capture_model(bench)
    assert model.offset_error["diode_current"] == pytest.approx(0.3)
    assert model.bandwidth_hz["diode_current"] == pytest.approx(80e6)
    assert model.skew_s["diode_current"] == pytest.approx(2e-9)
    assert sim_capture_model(load_bench(write(tmp_path, BENCH))) is None
    # an offset in the wrong unit for the probe kind is refused
    with pytest.raises(ConfigError):
        load_bench(write(tmp_path, text.replace("offset: 0.3 A", "offset: 0.3 V")))


def test_unknown_key_names_line(tmp_path):
    text = BENCH.replace("  bleeder_resistance: 20 kohm\n",
                         "  bleeder_resistance: 20 kohm\n  bleder: 1 ohm\n")
    with pytest.raises(ConfigError) as info:
        load_bench(write(tmp_path, text))
    assert info.value.line == 18
    assert info.value.field == "fixture.bleder"


def test_wrong_dimension(tmp_path):
    text = BENCH.replace("load_inductance: 200 uH", "load_inductance: 200 uF")
    with pytest.raises(ConfigError) as info:
        load_bench(write(tmp_path, text))
    assert info.value.field == "fixture.load_inductance"
    assert info.value.line == 11


def test_probe_needs_its_scaling(tmp_path):
    text = BENCH.replace("kind: current_sensor, sensitivity: 0.01 V/A",
                         "kind: shunt, sensitivity: 0.01 V/A")
    with pytest.raises(ConfigError, match="needs 'resistance'"):
        load_bench(write(tmp_path, text))


def test_current_signal_needs_current_probe(tmp_path):
    text = BENCH.replace("kind: current_sensor, sensitivity: 0.01 V/A",
                         "kind: voltage, attenuation: 10")
    with pytest.raises(ConfigError, match="shunt or current_sensor"):
        load_bench(write(tmp_path, text))


def test_shared_channel_refused(tmp_path):
    text = BENCH.replace("diode_current: {channel: 2", "diode_current: {channel: 1")
    with pytest.raises(ConfigError, match="share"):
        load_bench(write(tmp_path, text))


def test_unknown_signal(tmp_path):
    text = BENCH.replace("  diode_voltage:", "  anode_voltage:")
    with pytest.raises(ConfigError, match="unknown signal"):
        load_bench(write(tmp_path, text))


def test_calibration_states(tmp_path):
    bench = load_bench(write(tmp_path, BENCH))
    states = {s.role: s for s in calibration_states(bench, dt.date(2026, 12, 1))}
    assert states["scope"].status == "ok"  # 40 days ahead, warning window 30 days
    assert states["scope"].days_left == 40
    assert states["pulse"].status == "due-soon"
    assert states["supply"].status == "overdue"
    assert "overdue" in states["supply"].describe()


def test_calibration_ok_beyond_warning_window(tmp_path):
    bench = load_bench(write(tmp_path, BENCH))
    states = {s.role: s for s in calibration_states(bench, dt.date(2026, 11, 1))}
    assert states["scope"].status == "ok"  # 70 days ahead, warning window 30 days


def test_bleeder_discharge_time(tmp_path):
    bench = load_bench(write(tmp_path, BENCH))
    # RC discharge t = R*C*ln(V0/V1) (capacitor discharge through a resistor, circuit theory);
    # IEC 60204-1 sizing R <= t/(C*ln(V0/60 V)) is the same relation solved for R.
    t = bench.fixture.discharge_time(600.0)
    assert t == pytest.approx(20e3 * 100e-6 * math.log(10.0))
    assert bench.fixture.discharge_time(50.0) == 0.0


def test_probe_serial_switch_and_site_are_optional_and_parsed(tmp_path):
    bench = load_bench(write(tmp_path, BENCH))
    assert bench.site is None and bench.fixture.switch is None
    assert bench.probes["diode_voltage"].serial is None
    text = BENCH.replace("attenuation: 100}", "attenuation: 100, serial: PRB-7, "
                         "bandwidth: 400 MHz}")
    text = text.replace("  bleeder_resistance: 20 kohm\n", "  bleeder_resistance: 20 kohm\n"
                        "  switch: {part: SW-1 (invented), serial: S-2}\n")
    text += "site: {ambient_temperature: 23 degC, relative_humidity: 45 %}\n"
    bench = load_bench(write(tmp_path, text))
    assert bench.probes["diode_voltage"].serial == "PRB-7"
    assert bench.probes["diode_voltage"].bandwidth == pytest.approx(400e6)
    assert (bench.fixture.switch.part, bench.fixture.switch.serial) == ("SW-1 (invented)", "S-2")
    # 23 degC = 296.15 K (SI brochure, 9th ed., 2.3.4: t/degC = T/K - 273.15)
    assert bench.site.ambient_temperature == pytest.approx(296.15)
    record = bench.site.record()
    assert record["temperature_degC"] == pytest.approx(23.0)
    assert record["relative_humidity_percent"] == pytest.approx(45.0)
    assert "stated by the lab" in record["source"]


@pytest.mark.parametrize("site", ["{ambient_temperature: 23}", "{relative_humidity: 45}",
                                  "{relative_humidity: 120 %}", "{humidity: 45 %}"])
def test_site_needs_units_and_sane_values(tmp_path, site):
    with pytest.raises(ConfigError):
        load_bench(write(tmp_path, BENCH + f"site: {site}\n"))


def test_example_bench_names_probe_serials_switch_and_site():
    bench = load_bench(ROOT / "sequences" / "bench-sim.yaml")
    assert all(p.serial for p in bench.probes.values())
    assert bench.fixture.switch is not None and bench.fixture.switch.part
    assert bench.site is not None and bench.site.ambient_temperature is not None
