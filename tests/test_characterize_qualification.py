"""Qualification verdicts of a characterisation run (benchrun.characterize.qualification).

Invented DX-4425 shots (no simulator): a nominal point, a di/dt sweep point that also lies
within the nominal condition's tolerances (the limits' nominal condition names no di/dt), and
the worst-case snappiness point.  References: the expected peak reverse voltage VR + Ls·di/dt
is Kirchhoff's voltage law round the commutation loop (the stray inductance's voltage adds to
the bus); the limits are the shipped limits/DX-4425.yaml and the bench file's Ls = 40 nH.
"""

from __future__ import annotations

import dataclasses
import shutil
import subprocess

import pytest
from grading_helpers import shot
from test_runner_support import BENCH, ROOT

from benchrun.characterize.qualification import (
    grade_qualification,
    select_graded_points,
)
from benchrun.characterize.qualification_tables import (
    condition_rows,
    summary_lines,
    worst_case_rows,
)
from benchrun.config.bench import load_bench
from benchrun.config.limits import load_limits
from benchrun.grading.decision import CONFORMING, INVALID, NONCONFORMING
from benchrun.grading.grade import shot_problems
from benchrun.grading.worst_case import grade_worst_case
from benchrun.records import TestPoint

LIMITS = load_limits(ROOT / "limits" / "DX-4425.yaml")
BENCH_FILE = load_bench(BENCH)
LS = 40e-9  # sequences/bench-sim.yaml fixture.stray_inductance

NOMINAL = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=30.0,
                    didt_A_per_s=6e8, label="nominal @ 25 degC")
SWEEP = TestPoint(index=1, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=30.0,
                  didt_A_per_s=3e8, label="di/dt sweep: 600 V, 30 A, 300 A/us @ 25 degC")
WORST = TestPoint(index=2, temperature_K=233.15, bus_voltage_V=800.0, forward_current_A=3.0,
                  didt_A_per_s=8e8, label="worst-case snappiness @ -40 degC",
                  qualification="worst_case_snappiness")
SERIALS = ("SN0140-001", "SN0140-002")


def _at(point, serial, repeat, *, flags=(), valid=True, **metrics):
    didt = point.didt_A_per_s
    s = shot(serial, point, repeat, part="DX-4425", valid=valid,
             conditions={"didt_A_per_s": didt}, didt_A_per_s=didt,
             vr_V=point.bus_voltage_V, **metrics)
    return dataclasses.replace(s, lot="LT-0140", flags=tuple(flags) + s.flags)


def _shots(*, nominal_valid=True):
    out = []
    for serial in SERIALS:
        for r in range(2):
            out.append(_at(NOMINAL, serial, r, valid=nominal_valid or serial != SERIALS[1],
                           trr=100e-9, irrm=25.0, qrr=1.3e-6, vrm_V=650.0))
            out.append(_at(SWEEP, serial, r, trr=120e-9, irrm=20.0, qrr=1.2e-6, vrm_V=630.0))
    soft = dict(vrm_V=820.0, irrm=12.0, rrsf=0.8, ring_amplitude_A=0.5, vrm_dwell_s=0.0)
    out += [_at(WORST, SERIALS[0], r, **soft) for r in range(2)]
    out.append(_at(WORST, SERIALS[1], 0, **soft))
    # the second device snaps on its second shot: VRM 950 V, RRSF 0.2
    out.append(_at(WORST, SERIALS[1], 1, flags=("snap",), vrm_V=950.0, irrm=12.0, rrsf=0.2,
                   ring_amplitude_A=0.5, vrm_dwell_s=0.0))
    return out


ENTRY = {0: "nominal", 1: "di/dt sweep: 600 V, 30 A, 300 A/us", 2: "worst-case snappiness"}


def test_selection_is_the_labelled_point_and_the_marked_point():
    chosen = {g.condition: g for g in select_graded_points(
        [NOMINAL, SWEEP, WORST], LIMITS, ENTRY)}
    assert chosen["nominal"].point == NOMINAL and "labelled 'nominal'" in chosen["nominal"].how
    assert chosen["worst-case"].point == WORST
    assert "worst_case_snappiness" in chosen["worst-case"].how
    # without the label the two matching points leave the condition ungraded, named
    renamed = {0: "first", 1: "second", 2: "third"}
    unlabelled = {g.condition: g for g in select_graded_points(
        [NOMINAL, SWEEP, WORST], LIMITS, renamed)}
    assert unlabelled["nominal"].point is None
    assert "#0" in unlabelled["nominal"].how and "#1" in unlabelled["nominal"].how
    # only one point at the condition: taken even without its label
    alone = {g.condition: g for g in select_graded_points([SWEEP, WORST], LIMITS, renamed)}
    assert alone["nominal"].point == SWEEP and "only point" in alone["nominal"].how


def test_worst_case_step_agrees_with_grade_worst_case_and_kvl():
    shots = _shots()
    q = grade_qualification(shots, LIMITS, BENCH_FILE, entry_labels=ENTRY)
    assert q.lot is not None and q.not_graded == ""
    assert q.stray_inductance_H == pytest.approx(LS)
    # independently: grade_worst_case on the marked point's shots, validity by the limits'
    # tolerances at the worst-case condition
    condition = LIMITS.condition("worst-case")
    valid = {id(s): not shot_problems(s, condition, LIMITS.tolerances) for s in shots}
    expected = {g.serial: g for g in grade_worst_case(
        shots, LIMITS.worst_case, {"worst-case": WORST}, stray_inductance_H=LS, valid=valid)}
    for serial in SERIALS:
        got = q.worst_case_of(serial)
        assert (got.outcome, got.shot, got.reason) == (
            expected[serial].outcome, expected[serial].shot, expected[serial].reason)
    assert q.worst_case_of(SERIALS[0]).outcome == CONFORMING
    step = q.worst_case_of(SERIALS[1])
    assert step.outcome == NONCONFORMING and step.shot == "repeat 1 attempt 0"
    # KVL: VR + Ls·di/dt = 800 V + 40 nH × 800 A/µs = 832 V; overshoot (950 − 832)/832
    rows = {r[0]: r for r in worst_case_rows(q, SERIALS)}
    assert rows["VR + Ls·di/dt"][2:] == ["832 V", "832 V"]
    assert rows["VR + Ls·di/dt"][1] == "Ls = 40 nH"
    assert rows["overshoot: VRM over VR + Ls·di/dt"][3] == f"{100 * (950 / 832 - 1):+.1f} %"
    assert rows["overshoot: VRM over VR + Ls·di/dt"][1] == "≤ +10 %"
    assert rows["outcome"][2:] == [CONFORMING, NONCONFORMING]
    assert rows["RRSF; snap (RRSF < 1/3)"][3] == "0.2; snap"
    assert rows["flags of the worst shot"][3] == "snap"
    # ring 0.5 A of Irrm 12 A
    assert rows["oscillation after the recovery (of Irrm)"][2] == "500 mA (4.2 %)"


def test_nominal_verdict_grades_only_the_labelled_point():
    shots = _shots()
    q = grade_qualification(shots, LIMITS, BENCH_FILE, entry_labels=ENTRY)
    for serial in SERIALS:
        verdict = q.verdict(serial, "nominal")
        assert verdict.outcome == CONFORMING and verdict.n_valid == 2
        trr = next(g for g in verdict.grades if g.metric == "trr_s")
        # the nominal point's 100 ns, not the sweep point's 120 ns
        assert trr.value == pytest.approx(100e-9)
    assert q.nominal_conditions == ["nominal"]
    rows = condition_rows(q, SERIALS)
    assert ["verdict at nominal", "", CONFORMING, CONFORMING] in rows
    # values and U with engineering prefixes, never in exponent notation (U of trr < 1 ns)
    assert not any("e+" in cell or "e-" in cell for row in rows for cell in row[2:])
    assert ["device verdict (every condition and the worst-case step)", "", CONFORMING,
            NONCONFORMING] in rows
    lines = summary_lines(q)
    assert len(lines) == 2
    assert lines[0].startswith(SERIALS[0]) and "nominal: conforming" in lines[0]
    assert "worst-case snappiness: non-conforming" in lines[1] and "snap" in lines[1]


def test_no_valid_nominal_shot_makes_the_nominal_verdict_invalid():
    q = grade_qualification(_shots(nominal_valid=False), LIMITS, BENCH_FILE,
                            entry_labels=ENTRY)
    verdict = q.verdict(SERIALS[1], "nominal")
    assert verdict.outcome == INVALID and verdict.n_valid == 0
    assert any("none of its 2 shot(s) is valid" in r for r in verdict.reasons)
    assert q.verdict(SERIALS[0], "nominal").outcome == CONFORMING


def test_limits_that_cannot_be_applied_are_a_stated_result():
    other = [dataclasses.replace(s, part="DX-4417") for s in _shots()]
    q = grade_qualification(other, LIMITS, BENCH_FILE, entry_labels=ENTRY)
    assert q.lot is None and "cannot grade" in q.not_graded
    assert summary_lines(q) == [f"qualification not graded: {q.not_graded}"]
    assert q.verdict(SERIALS[0], "nominal").outcome == INVALID
    none = grade_qualification(_shots(), None, BENCH_FILE)
    assert none.lot is None and "no limits file" in none.not_graded
    no_bench = grade_qualification(_shots(), LIMITS, None, entry_labels=ENTRY)
    assert no_bench.lot is None and "bench file" in no_bench.not_graded


def test_report_shows_the_verdicts(tmp_path):
    from report_helpers import make_signer

    from benchrun.characterize.report import render_characterization
    from benchrun.report.sign import read_attachment

    if shutil.which("pdftotext") is None:
        pytest.skip("poppler-utils not installed")
    _files, signer = make_signer(tmp_path)
    shots = _shots()
    q = grade_qualification(shots, LIMITS, BENCH_FILE, entry_labels=ENTRY,
                            limits_source="limits.yaml (DX-4425 rev A)")
    out, _ = render_characterization(shots, tmp_path / "c.pdf", signer,
                                     title="DX-4425 characterisation (invented part)",
                                     qualification=q)
    data = read_attachment(out.read_bytes())["qualification"]
    devices = {d["serial"]: d for d in data["devices"]}
    assert devices[SERIALS[1]]["worst_case"]["outcome"] == NONCONFORMING
    assert devices[SERIALS[1]]["worst_case"]["assessment"]["vrm_expected_V"] == \
        pytest.approx(832.0)
    nominal = {c["condition"]: c for c in devices[SERIALS[0]]["conditions"]}["nominal"]
    assert nominal["outcome"] == CONFORMING
    text = subprocess.run(["pdftotext", "-layout", str(out), "-"], capture_output=True,
                          text=True, timeout=30, check=True).stdout
    flat = " ".join(text.split())
    assert "Qualification verdicts" in flat and "Worst-case snappiness step" in flat
    assert "Limits at their conditions" in flat
    assert q.worst_case_of(SERIALS[1]).reason in flat
    outcome = next(line for line in text.splitlines() if line.strip().startswith("outcome"))
    assert outcome.split()[1:] == [CONFORMING, NONCONFORMING]
    nominal_row = next(line for line in text.splitlines()
                       if line.strip().startswith("verdict at nominal"))
    assert nominal_row.split()[3:] == [CONFORMING, CONFORMING]
    assert "Ls = 40 nH" in flat and "832 V" in flat
