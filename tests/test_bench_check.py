"""``benchrun bench check``: identify, set and read back, report, outputs off, nothing fired.

Checked against the simulated bench started as a separate process (``benchrun sim``), the way a
real bench is reached, and in-process for the cases that need a fault in an instrument.
"""

from __future__ import annotations

import subprocess
import sys

import pytest

from benchrun.config import load_bench, load_sequence
from benchrun.instruments.check import check_bench
from benchrun.instruments.session import InstrumentSession
from benchrun.simulator.instruments_sim_outputs import SimBusSupply
from benchrun.simulator.server import SimulatedBench
from tests.bench_process import BENCH, ROOT, SimProcess, env

SEQUENCE = ROOT / "sequences" / "dx4417-demo.yaml"


@pytest.fixture(scope="module")
def sim_process():
    sim = SimProcess()
    yield sim
    sim.stop()


def _check(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "benchrun.cli", "bench", "check", *args],
                          capture_output=True, text=True, env=env(), cwd=ROOT, timeout=300)


def _ask(resource: str, query: str) -> str:
    session = InstrumentSession(resource, timeout_s=10)
    try:
        return session.query(query)
    finally:
        session.close()


def test_check_against_benchrun_sim_passes_and_leaves_outputs_off(sim_process, tmp_path):
    bench = sim_process.bench_file(tmp_path)
    done = _check(str(bench), "--sequence", str(SEQUENCE))
    assert done.returncode == 0, done.stdout + done.stderr
    out = done.stdout
    for model in ("SCOPE-G4", "PULSE-2G", "SUPPLY-1K5", "THERMO-200", "HANDLER-24"):
        assert model in out
    assert "bench check passed" in out and "0 mismatches, 0 SCPI errors" in out
    # 2 test points x 2 temperatures, each: scope, double and single pulse, supply, thermal
    assert int(out.split("bench check passed: ")[1].split()[0]) > 100
    assert "outputs  pulse off, supply off (bus 0.0 V, setpoint 0 V), thermal off" in out
    assert "Traceback" not in done.stderr
    res = sim_process.resources
    # the instruments as the check left them: outputs off, supply setpoint back at 0 V, and
    # the last point's settings in place (read independently of the drivers)
    assert _ask(res["pulse"], "OUTPut:STATe?") == "0"
    assert _ask(res["supply"], "OUTPut:STATe?") == "0"
    assert float(_ask(res["supply"], "SOURce:VOLTage:LEVel?")) == 0.0
    assert _ask(res["thermal"], "OUTPut:STATe?") == "0"
    assert float(_ask(res["thermal"], "SOURce:TEMPerature:LEVel?")) == pytest.approx(125.0)
    assert _ask(res["scope"], "TRIGger:SEQuence:SOURce?") == "INT1"


def test_check_reports_a_wrong_family_clearly(sim_process, tmp_path):
    # the process serves scope-generic; the bench file says scope-alt
    bench = sim_process.bench_file(tmp_path, scope="scope-alt")
    done = _check(str(bench), "--sequence", str(SEQUENCE))
    assert done.returncode == 1
    lines = [ln for ln in done.stdout.splitlines() if ln.startswith("scope") and "MISMATCH" in ln]
    assert len(lines) == 1
    assert "'SCOPE-G4'" in lines[0] and "scope-alt" in lines[0] and "wrong family" in lines[0]
    assert "bench check FAILED" in done.stderr and "1 mismatches" in done.stderr
    assert "Traceback" not in done.stdout + done.stderr
    # the other instruments were still checked
    assert "pulse    MISMATCH" not in done.stdout and "SUPPLY-1K5" in done.stdout


def test_check_without_a_sequence(sim_process, tmp_path):
    done = _check(str(sim_process.bench_file(tmp_path)))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "no --sequence" in done.stdout and "bench check passed" in done.stdout


def test_a_setting_read_back_differently_is_a_mismatch(monkeypatch):
    # a supply that keeps a setpoint 10 V below the one sent (as a coercing one may)
    monkeypatch.setattr(SimBusSupply, "read_voltage",
                        lambda self: {"volts": self.setpoint - 10.0})
    bench, sequence = load_bench(BENCH), load_sequence(SEQUENCE)
    with SimulatedBench(seed=1) as sim:
        report = check_bench(bench, sim.resources, sequence)
        assert sim.supply.output_on is False and sim.instruments["pulse"].output_on is False
        assert sim.instruments["pulse"].shots == 0  # nothing fired
    texts = [ln.text for ln in report.lines if ln.kind == "mismatch"]
    assert texts == ["SOURce:VOLTage:LEVel 600: reads back '590'"] * 4
    assert not report.passed and report.errors == 0


def test_an_scpi_error_is_reported_in_one_line(tmp_path):
    # a user's own pulse table whose gate-resistance limit the sequence's 10 ohm exceeds:
    # the (simulated) instrument answers -222 and the check reports it
    from importlib import resources

    text = (resources.files("benchrun.instruments") / "commands" /
            "pulse-generic.yaml").read_text()
    table = tmp_path / "pulse-narrow.yaml"
    table.write_text(text.replace("family: pulse-generic", "family: pulse-narrow")
                     .replace("limits: {ohm: [0.5, 100.0]}", "limits: {ohm: [0.5, 5.0]}"))
    bench, sequence = load_bench(BENCH), load_sequence(SEQUENCE)
    # (bench files name shipped families; the check itself takes a table path too)
    pulse = bench.instruments.pulse.model_copy(update={"family": str(table)})
    bench = bench.model_copy(update={"instruments": bench.instruments.model_copy(
        update={"pulse": pulse})})
    with SimulatedBench(seed=1, families={"pulse": str(table)}) as sim:
        report = check_bench(bench, sim.resources, sequence)
    errors = [ln.text for ln in report.lines if ln.kind == "error"]
    assert len(errors) == 4  # once per test point and temperature
    assert all(e.startswith('-222,"Data out of range;ohm 10 outside [0.5, 5]" after the double')
               for e in errors)
    assert not report.passed


@pytest.mark.parametrize(("models", "passes"), [("[SCOPE-*]", True), ("[LAB8-*]", False)])
def test_table_models_are_shell_patterns(tmp_path, models, passes):
    from importlib import resources

    text = (resources.files("benchrun.instruments") / "commands" /
            "scope-generic.yaml").read_text()
    table = tmp_path / "scope-lab8.yaml"
    table.write_text(text.replace("family: scope-generic", "family: scope-lab8")
                     .replace("models: [SCOPE-G4]", f"models: {models}"))
    bench = load_bench(BENCH)
    scope = bench.instruments.scope.model_copy(update={"family": str(table)})
    bench = bench.model_copy(update={"instruments": bench.instruments.model_copy(
        update={"scope": scope})})
    with SimulatedBench(seed=1) as sim:  # serves scope-generic (model SCOPE-G4)
        report = check_bench(bench, sim.resources)
    assert report.passed is passes
    if not passes:
        assert [ln.role for ln in report.lines if ln.kind == "mismatch"] == ["scope"]


def test_a_table_without_models_still_finds_a_wrong_family_by_its_headers(tmp_path):
    # scope-alt's headers sent to a scope that speaks scope-generic, with no model list to
    # compare: the instrument never answers the table's error query (SYSTem:ERRor:NEXT?, an
    # undefined header there), and the check says so in one line instead of going on
    from importlib import resources

    text = (resources.files("benchrun.instruments") / "commands" / "scope-alt.yaml").read_text()
    table = tmp_path / "scope-nomodels.yaml"
    table.write_text(text.replace("family: scope-alt", "family: scope-nomodels")
                     .replace("  models: [SCOPE-A4]\n", ""))
    bench = load_bench(BENCH)
    scope = bench.instruments.scope.model_copy(update={"family": str(table), "timeout": 1.0})
    bench = bench.model_copy(update={"instruments": bench.instruments.model_copy(
        update={"scope": scope})})
    with SimulatedBench(seed=1) as sim:
        report = check_bench(bench, sim.resources, load_sequence(SEQUENCE))
    scope_lines = [ln for ln in report.lines if ln.role == "scope"]
    assert any("lists no models" in ln.text for ln in scope_lines)
    mismatches = [ln.text for ln in scope_lines if ln.kind == "mismatch"]
    assert len(mismatches) == 1
    assert mismatches[0].startswith("no answer to the table's error query SYSTem:ERRor:NEXT?")
    assert "wrong family?" in mismatches[0]
    assert not report.passed and report.mismatches == 1


def test_an_undefined_header_stops_that_instrument_with_one_clear_line(tmp_path):
    # a table that shares the error query but not the range header with the instrument
    from importlib import resources

    text = (resources.files("benchrun.instruments") / "commands" /
            "scope-generic.yaml").read_text()
    table = tmp_path / "scope-upper.yaml"
    table.write_text(text.replace("family: scope-generic", "family: scope-upper")
                     .replace("RANGe:PTPeak", "RANGe:UPPer"))
    bench = load_bench(BENCH)
    scope = bench.instruments.scope.model_copy(update={"family": str(table)})
    bench = bench.model_copy(update={"instruments": bench.instruments.model_copy(
        update={"scope": scope})})
    with SimulatedBench(seed=1) as sim:
        report = check_bench(bench, sim.resources, load_sequence(SEQUENCE))
    scope_lines = [ln for ln in report.lines if ln.role == "scope"]
    errors = [ln.text for ln in scope_lines if ln.kind == "error"]
    assert len(errors) == 3  # one per channel in use, then that instrument is left alone
    assert all(e.startswith('-113,"Undefined header;SENS') for e in errors)
    assert [ln.text for ln in scope_lines if ln.kind == "mismatch"] == [
        "the instrument does not know this table's headers: wrong family? Not checked further."]
    # the other instruments were checked to the end: per test point and temperature (4),
    # pulse 5 (double pulse, gate) + 2 (single pulse), supply 1, thermal 1
    assert report.settings_read_back == 4 * (5 + 2 + 1 + 1)


CHARACTERIZE = ROOT / "sequences" / "dx4425-characterize.yaml"


def test_di_dt_control_settings_are_set_and_read_back(monkeypatch):
    # a di/dt sequence: the check sends every gate resistor the bench file declares (the
    # runner's di/dt control may pick any); a pulse generator that keeps 3.9 ohm as 4.7 ohm
    # (a missing relay, say) is one mismatch, found without firing
    from benchrun.simulator.instruments_sim_outputs import SimPulseSource

    real = SimPulseSource.op_gate_resistance
    monkeypatch.setattr(SimPulseSource, "op_gate_resistance",
                        lambda self, ohm: real(self, 4.7 if ohm == 3.9 else ohm))
    bench, sequence = load_bench(BENCH), load_sequence(CHARACTERIZE)
    assert bench.fixture.gate_drive is not None
    with SimulatedBench(seed=1) as sim:
        report = check_bench(bench, sim.resources, sequence)
        assert sim.instruments["pulse"].shots == 0  # nothing fired
    texts = [ln.text for ln in report.lines if ln.kind == "mismatch"]
    assert texts == ["GDRive:RESistance 3.9: reads back '4.7'"]
    assert not report.passed


def test_drive_voltage_mode_sets_both_ends_of_the_range(monkeypatch, tmp_path):
    # one resistor and a drive-voltage range: the check sends the drive voltage at both ends
    import yaml

    data = yaml.safe_load(BENCH.read_text(encoding="utf-8"))
    gate = data["fixture"]["gate_drive"]
    gate["resistors"] = ["10 ohm"]
    gate.pop("drive_voltage")
    gate["drive_voltage_range"] = ["10 V", "18 V"]
    path = tmp_path / "bench.yaml"
    path.write_text(yaml.safe_dump(data), encoding="utf-8")
    sent: list[float] = []
    from benchrun.simulator.instruments_sim_outputs import SimPulseSource

    real = SimPulseSource.op_drive_voltage
    monkeypatch.setattr(SimPulseSource, "op_drive_voltage",
                        lambda self, volts: (sent.append(volts), real(self, volts))[1])
    with SimulatedBench(seed=1) as sim:
        report = check_bench(load_bench(path), sim.resources, load_sequence(CHARACTERIZE))
    assert report.passed, [ln.text for ln in report.lines]
    assert sent == [10.0, 18.0]
