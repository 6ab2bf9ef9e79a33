"""Every injected instrument fault ends in a retry or a clear error with the bench safe.

Faults are switched on in the simulated instruments (benchrun.simulator.faults) after the
first stored shot, so identification and set-up have passed and the bench is energised.
"Safe" is read from the simulated instruments themselves: pulse output off, supply output
off, bus below 60 V (IEC 61140 / IEC 62368-1 ES1).
"""

from __future__ import annotations

import json

import pytest
from test_runner_support import write_bench, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.errors import InstrumentError, RunError
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.rundata import load_run

#: Wait for a trigger that must come (returns as soon as the capture is there).
TRIGGER_WAIT_S = 30.0


def run_with_fault(tmp_path, role, apply, *, temperatures="[25 degC]", thermal="",
                   devices="[SN0117-001]", scope_timeout=None,
                   trigger_timeout_s=TRIGGER_WAIT_S, repeats=3):
    """Run a short sequence; ``apply`` switches the fault on after the first stored shot.

    The runner reads a shot's analysed result (and calls ``on_stored``) once the next shot of
    the device has fired, so with three repeats the fault meets the third shot.

    I/O timeouts are generous (a loaded machine must not add faults of its own); a case
    that has to wait out a timeout shortens only what it waits for (``scope_timeout``,
    ``trigger_timeout_s``).
    """
    seq = write_sequence(tmp_path, devices=devices, temperatures=temperatures,
                         repeats=repeats, extra=thermal)
    bench_path = write_bench(tmp_path, scope_timeout=scope_timeout)
    sequence = load_sequence(seq)
    with simulated_bench(load_bench(bench_path), sequence) as sim:
        count = {"n": 0}

        def inject(result):
            count["n"] += 1
            if count["n"] == 1:
                apply(sim.bench.faults[role])

        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False,
                             trigger_timeout_s=trigger_timeout_s, on_stored=inject)
        error = None
        outcome = None
        try:
            outcome = run_sequence(seq, bench_path, options)
        except (InstrumentError, RunError) as exc:
            error = exc
        for switches in sim.bench.faults.values():
            switches.clear()
        safe = (not sim.bench.instruments["pulse"].output_on,
                not sim.bench.supply.output_on,
                sim.bench.supply.bus_voltage() < 60.0)
    run_dir = next((tmp_path / "out").iterdir())
    return outcome, error, safe, run_dir


def assert_safe_and_recorded(safe, run_dir, status):
    assert safe == (True, True, True)
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == status
    assert manifest["safe_state"]["reached"] is True


@pytest.mark.parametrize(
    ("role", "apply", "options"),
    [
        ("scope", lambda f: f.set(drop_connections=1), {}),
        # the drop swallows the fire command (never repeated): the shot shows up as a missing
        # trigger, so only the trigger wait ends that attempt (150x a healthy trigger's ~20 ms)
        ("pulse", lambda f: f.set(drop_connections=1), {"trigger_timeout_s": 3.0}),
        ("supply", lambda f: f.set(drop_connections=1), {}),
        ("pulse", lambda f: f.inject_errors([(-222, "width out of range")]), {}),
        ("scope", lambda f: f.inject_errors([(-113, "undefined header")]), {}),
    ],
    ids=["scope-drop", "pulse-drop", "supply-drop", "pulse-error-queue", "scope-error-queue"],
)
@pytest.mark.slow
def test_transient_fault_is_retried(tmp_path, role, apply, options):
    outcome, error, safe, run_dir = run_with_fault(tmp_path, role, apply, **options)
    assert error is None, error
    assert outcome.status == "complete"
    assert len({s.repeat for s in load_run(run_dir).shots if s.valid}) == 3
    assert_safe_and_recorded(safe, run_dir, "complete")


@pytest.mark.slow
def test_safe_state_sends_a_lost_off_command_again(tmp_path):
    # one shot: the fault is switched on after it, so the first command the pulse source
    # gets afterwards is the safe state's "output off", which the dropped connection
    # swallows; the safe state reads the output back and switches it off again
    outcome, error, safe, run_dir = run_with_fault(
        tmp_path, "pulse", lambda f: f.set(drop_connections=1), repeats=1)
    assert error is None, error
    assert outcome.status == "complete"
    assert_safe_and_recorded(safe, run_dir, "complete")


@pytest.mark.parametrize(
    ("role", "apply", "message", "options"),
    [
        # no trigger ever: only the trigger wait ends each attempt (kept short)
        ("scope", lambda f: f.set(no_trigger=True), "did not trigger",
         {"trigger_timeout_s": 1.0}),
        ("scope", lambda f: f.set(garble_block_header=True), "block", {}),
        # half a block, then nothing: only the scope's I/O timeout ends the read
        ("scope", lambda f: f.set(truncate_block=True), "truncated", {"scope_timeout": "1 s"}),
        # every answer 1.5 s late: past the scope's 1 s timeout whatever the load
        ("scope", lambda f: f.set(delay_s=1.5), "no answer", {"scope_timeout": "1 s"}),
        # two devices: the handler is needed to change the device whatever the station
        # remembers about the one in the fixture
        ("handler", lambda f: f.set(drop_connections=-1), "connection",
         {"devices": "[SN0117-001, SN0117-002]"}),
    ],
    ids=["no-trigger", "garbled-header", "truncated-block", "late-answers", "handler-gone"],
)
@pytest.mark.slow
def test_persistent_fault_is_a_clear_error_with_the_bench_safe(tmp_path, role, apply,
                                                               message, options):
    _, error, safe, run_dir = run_with_fault(tmp_path, role, apply, **options)
    assert error is not None and message in str(error).lower()
    assert_safe_and_recorded(safe, run_dir, "aborted")
    if role == "scope":  # a shot-level fault is retried once before giving up
        assert "retrying once" in (run_dir / "run.log").read_text()


@pytest.mark.slow
def test_thermal_controller_that_never_settles(tmp_path):
    def apply(switches):
        switches.set(thermal_no_settle=True)

    thermal = "thermal: {band: 1 K, dwell: 30 s, soak: 10 s, timeout: 600 s, poll_interval: 5 s}"
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC, 125 degC]",
                         repeats=1)
    seq.write_text("\n".join(thermal if line.startswith("thermal:") else line
                             for line in seq.read_text().splitlines()) + "\n")
    sequence = load_sequence(seq)
    bench_path = write_bench(tmp_path)
    with simulated_bench(load_bench(bench_path), sequence) as sim:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False,
                             on_stored=lambda result: apply(sim.bench.faults["thermal"]))
        with pytest.raises(RunError, match="did not settle"):
            run_sequence(seq, bench_path, options)
        safe = (not sim.bench.instruments["pulse"].output_on, not sim.bench.supply.output_on,
                sim.bench.supply.bus_voltage() < 60.0)
    run_dir = next((tmp_path / "out").iterdir())
    assert_safe_and_recorded(safe, run_dir, "aborted")
    assert len(load_run(run_dir).shots) == 1  # the 25 degC shot was kept


@pytest.mark.slow
def test_ctrl_c_mid_run(tmp_path):
    def interrupt(result):
        raise KeyboardInterrupt

    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]",
                         repeats=3)
    sequence = load_sequence(seq)
    bench_path = write_bench(tmp_path)
    with simulated_bench(load_bench(bench_path), sequence) as sim:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False,
                             on_stored=interrupt)
        with pytest.raises(KeyboardInterrupt):
            run_sequence(seq, bench_path, options)
        safe = (not sim.bench.instruments["pulse"].output_on, not sim.bench.supply.output_on,
                sim.bench.supply.bus_voltage() < 60.0)
    run_dir = next((tmp_path / "out").iterdir())
    assert_safe_and_recorded(safe, run_dir, "interrupted")
