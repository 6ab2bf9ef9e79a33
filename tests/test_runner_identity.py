"""The right device: a handler holding two lots (silicon DX-4417 lot LT-0117 and SiC DX-5203
lot LT-0131, rated 20 A) and a silicon sequence at 30 A with ``devices: all``: the SiC parts
are never energised, skipped with their reason recorded, or the run stops by option."""

from __future__ import annotations

import dataclasses
import json

import pytest
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench
from benchrun.errors import RunError
from benchrun.instruments.roles import connect
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import AcceleratedClock, SimulatedSetup, sim_fixture
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.server import SimulatedBench
from benchrun.store.rundata import load_run

SILICON = ("SN0117-001", "SN0117-002")
SIC = ("SN0131-001", "SN0131-002")


def two_lot_catalog():
    """The virtual catalogue cut to two devices of each of the two lots."""
    catalog = load_virtual_parts()
    silicon = dataclasses.replace(catalog.lots["LT-0117"], serials=SILICON, outliers={})
    sic = dataclasses.replace(catalog.lots["LT-0131"], serials=SIC, outliers={})
    return dataclasses.replace(catalog, lots={"LT-0117": silicon, "LT-0131": sic})


class TwoLotBench:
    """The simulated bench of the bench file with a handler holding both lots."""

    def __enter__(self) -> SimulatedSetup:
        bench = load_bench(BENCH)
        families = {role: entry.family for role, entry in bench.instruments.items()}
        wiring = {probe.channel: name for name, probe in bench.probes.items()}
        catalog = two_lot_catalog()
        self.sim = SimulatedBench(catalog, sim_fixture(bench), seed=3, clock_speedup=200.0,
                                  families=families, wiring=wiring)
        resources = self.sim.start()
        return SimulatedSetup(self.sim, resources, AcceleratedClock(self.sim), catalog)

    def __exit__(self, *exc: object) -> None:
        self.sim.stop()


def test_sic_part_is_rated_below_the_silicon_sequence():
    # the premise of the hazard: the SiC part's own rating (virtual catalogue) is below the
    # silicon sequence's 30 A
    catalog = load_virtual_parts()
    assert catalog.part("DX-5203").ratings.if_max_A == 20.0
    assert catalog.part("DX-4417").ratings.if_max_A == 30.0


def test_simulated_handler_reports_part_and_lot_of_each_device():
    with TwoLotBench() as setup:
        handler = connect("handler", setup.resources["handler"])
        # the exact string sent (our own dialect, handler-generic.yaml)
        assert handler.table.format("device_identity", serial="SN0117-002") == \
            'HANDler:DUT:IDENtity? "SN0117-002"'
        try:
            assert handler.device_identity("SN0117-002") == ("DX-4417", "LT-0117")
            assert handler.device_identity("SN0131-001") == ("DX-5203", "LT-0131")
            assert handler.device_identity("SN9999-999") is None
        finally:
            handler.session.close()


@pytest.mark.slow
def test_devices_of_another_part_are_skipped_never_fired(tmp_path):
    seq = write_sequence(tmp_path, devices="all", temperatures="[25 degC]")
    with TwoLotBench() as setup:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=setup.resources,
                             clock=setup.clock, ratings_lookup=setup.ratings,
                             show_progress=False)
        outcome = run_sequence(seq, BENCH, options)
        fired = [shot.serial for shot in setup.bench.shots]
        assert len(fired) == setup.bench.shots_fired
    assert outcome.status == "complete"
    assert set(fired) == set(SILICON)  # no SiC device was ever energised by a shot
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    assert manifest["devices"] == list(SILICON)
    assert set(manifest["skipped_devices"]) == set(SIC)
    for reason in manifest["skipped_devices"].values():
        assert "part DX-5203" in reason and "DX-4417" in reason
    assert sum("skipped" in w for w in outcome.warnings) == len(SIC)
    run = load_run(outcome.run_dir)
    assert {s.serial for s in run.shots} == set(SILICON)  # nothing graded into the lot


@pytest.mark.slow
def test_a_device_of_another_lot_is_skipped(tmp_path):
    seq = write_sequence(tmp_path, devices="all", temperatures="[25 degC]")
    seq.write_text(seq.read_text().replace("lot: LT-0117", "lot: LT-0124"))
    with TwoLotBench() as setup:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=setup.resources,
                             clock=setup.clock, ratings_lookup=setup.ratings,
                             show_progress=False)
        with pytest.raises(RunError, match="no device of DX-4417 lot LT-0124"):
            run_sequence(seq, BENCH, options)
        assert setup.bench.shots_fired == 0


@pytest.mark.slow
def test_wrong_device_can_stop_the_run_before_anything_is_energised(tmp_path):
    seq = write_sequence(tmp_path, devices="all", temperatures="[25 degC]")
    with TwoLotBench() as setup:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=setup.resources,
                             clock=setup.clock, ratings_lookup=setup.ratings,
                             show_progress=False, wrong_device="stop")
        with pytest.raises(RunError, match="SN0131-001: it is part DX-5203"):
            run_sequence(seq, BENCH, options)
        assert setup.bench.shots_fired == 0
        assert not setup.bench.supply.output_on
    manifest = json.loads(next((tmp_path / "out").iterdir()).joinpath("run.json").read_text())
    assert manifest["status"] == "aborted"
    assert "DX-5203" in manifest["error"]


def test_simulated_bench_keeps_a_bounded_shot_history():
    # a long run on the simulated bench must not grow its memory with every shot
    from benchrun.simulator.server import SHOT_HISTORY

    sim = SimulatedBench(two_lot_catalog(), seed=1)
    sim.handler.selected = SILICON[0]
    sim.scope.armed = False  # no capture needed: only the record of the fire
    for _ in range(5 * SHOT_HISTORY + 5):
        sim.fire((1e-6, 1e-6, 1e-6), 10.0)
    assert sim.shots_fired == 5 * SHOT_HISTORY + 5
    assert SHOT_HISTORY <= len(sim.shots) <= 2 * SHOT_HISTORY
