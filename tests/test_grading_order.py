"""Verdicts do not depend on the order in which devices are tested.

The same four devices of the invented lot LT-0117 (one of them, SN0117-009, a lifetime
outlier with a large Irrm) are tested on the simulated bench twice, in two different orders.
The scope windows of a test point are planned from the part's limits and the point alone
(benchrun/runner/plan.py), so every device sees the same full scale in both runs, hence the
same uncertainty budget, guard band, verdict and bin. Before this, the current window widened
with the largest Irrm seen so far and never narrowed, so the devices tested after the outlier
got wider windows, a larger U and possibly another verdict.
"""

from __future__ import annotations

import pytest
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.grading import grade_lot, load_limits, run_bench
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.rundata import load_run

SERIALS = ["SN0117-009", "SN0117-001", "SN0117-003", "SN0117-004"]


def _run(folder, devices: list[str]):
    folder.mkdir()
    seq = write_sequence(folder, devices="[" + ", ".join(devices) + "]", repeats=2)
    bench = load_bench(BENCH)
    with simulated_bench(bench, load_sequence(seq)) as sim:
        options = RunOptions(out_dir=folder / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False)
        outcome = run_sequence(seq, BENCH, options)
    assert outcome.status == "complete"
    run = load_run(outcome.run_dir)
    lot = grade_lot(run.shots, load_limits(run.limits_path), bench=run_bench(run))
    return run, lot


def _windows(run) -> dict[tuple[str, int, int], tuple[float, float]]:
    """Full scales of the valid shot of every (device, point, repeat)."""
    return {(s.serial, s.point.index, s.repeat): (s.acquisition["current_range_A"],
                                                 s.acquisition["voltage_range_V"])
            for s in run.shots if s.valid}


@pytest.mark.slow
def test_two_device_orders_give_identical_windows_verdicts_and_bins(tmp_path):
    first_run, first = _run(tmp_path / "a", SERIALS)
    second_run, second = _run(tmp_path / "b", list(reversed(SERIALS)))

    # the outlier first, then the others; and the reverse
    assert first_run.manifest["devices"] == SERIALS
    assert second_run.manifest["devices"] == list(reversed(SERIALS))

    # the same full scale for the same test of the same device in both orders
    assert _windows(first_run) == _windows(second_run)

    verdicts = {d.serial: (d.verdict, d.bin, d.bin_reason is None) for d in first.devices}
    assert verdicts == {d.serial: (d.verdict, d.bin, d.bin_reason is None)
                        for d in second.devices}
    assert first.disposition == second.disposition == "reject"
    assert first.device("SN0117-009").verdict == "non-conforming"
    for device in first.devices:
        other = second.device(device.serial)
        for grade in device.grades:
            twin = other.grade(grade.metric, grade.condition)
            assert twin.outcome == grade.outcome, (device.serial, grade.metric)
            # the same windows give the same full scale in every scope-gain term of the
            # budget (only the simulator's noise differs between the runs)
            assert _full_scales(grade) == _full_scales(twin), (device.serial, grade.metric)


def _full_scales(grade) -> list[str]:
    if grade.budget is None:
        return []
    return [c.name.split(" full scale")[0] for c in grade.budget.contributors
            if "full scale" in c.name]
