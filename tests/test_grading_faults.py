"""Regression tests of the grading faults: units required, aggregation, guarded bin edges,
sampling plan and its OC figures, instrument accuracies from the bench file.

The shot values are invented demo numbers. Outside references: the decision rules of
ILAC-G8:09/2019 §4.2 (also applied to bin edges), the binomial and hypergeometric
distributions of scipy.stats for the OC figures, and the closed forms of a c = 0 plan
(Pa = (1 − p)^n, LTPD = 1 − β^(1/n); Montgomery, Introduction to Statistical Quality Control,
ch. 15).
"""

from __future__ import annotations

import json
import shutil
from dataclasses import replace
from pathlib import Path

import pytest
from grading_helpers import COLD, HOT, INPUTS, LIMITS_YAML, shot, write_limits
from scipy import stats

from benchrun.cli import main
from benchrun.config.bench import load_bench
from benchrun.config.limits import load_limits
from benchrun.errors import ConfigError, GradingError
from benchrun.grading import grade_lot
from benchrun.grading.sampling import (
    binomial_acceptance,
    hypergeometric_acceptance,
    lot_ltpd_count,
    ltpd,
)
from benchrun.grading.uncertainty import bench_inputs

ROOT = Path(__file__).resolve().parents[1]


def _line_of(text: str, needle: str) -> int:
    return next(n for n, line in enumerate(text.splitlines(), 1) if needle in line)


def _refused(tmp_path, old: str, new: str) -> tuple[ConfigError, str]:
    assert old in LIMITS_YAML, old
    text = LIMITS_YAML.replace(old, new).replace("RULE", "guarded")
    with pytest.raises(ConfigError) as info:
        load_limits(write_limits(tmp_path, text))
    return info.value, text


# ------------------------------------------------------------------ 1. units are required


@pytest.mark.parametrize(
    ("old", "new", "needle", "field"),
    [
        # the reported fault: trr 150 read as 150 s, Qrr 3.2 as 3.2 C
        ("{metric: trr_s, max: 400 ns}", "{metric: trr_s, max: 150}", "max: 150}",
         "limits.2.max"),
        ("{metric: qrr_C, condition: 25C, max: 3.0 uC}",
         "{metric: qrr_C, condition: 25C, max: 3.2}", "max: 3.2}", "limits.0.max"),
        # a number written as text is no better
        ("{metric: trr_s, max: 400 ns}", "{metric: trr_s, max: '150'}", "'150'",
         "limits.2.max"),
        # tolerances
        ("forward_current: 5 %", "forward_current: 0.05", "forward_current: 0.05",
         "tolerances.forward_current"),
        ("temperature: 3 K}", "temperature: 3}", "temperature: 3}", "tolerances.temperature"),
        # a bin edge
        ("{name: Q2, max: 5.5 uC}", "{name: Q2, max: 5.5e-6}", "5.5e-6", "bins.classes"),
        # a condition's target
        ("{name: 25C, temperature: 25 degC}", "{name: 25C, temperature: 298.15}", "298.15",
         "conditions.0.temperature"),
        # an uncertainty input
        ("  coverage_factor: 2\n",
         "  coverage_factor: 2\n  extra:\n    - {metric: qrr_C, name: fixture, absolute: 5e-9}\n",
         "absolute: 5e-9", "uncertainty.extra.0.absolute"),
        ("  coverage_factor: 2\n",
         "  coverage_factor: 2\n  extra:\n    - {metric: qrr_C, name: fixture, relative: 0.01}\n",
         "relative: 0.01", "uncertainty.extra.0.relative"),
        # the lot's AQL
        ("aql: 1 %", "aql: 0.01", "aql: 0.01", "lot.aql"),
    ],
)
def test_a_value_without_unit_is_refused_at_file_line_field(tmp_path, old, new, needle, field):
    err, text = _refused(tmp_path, old, new)
    assert err.line == _line_of(text, needle)
    assert err.field is not None and err.field.startswith(field)
    assert "has no unit" in err.message
    assert str(err).startswith(f"{err.file}:{err.line}: {err.field}: ")


def test_dimensionless_metrics_take_bare_numbers(tmp_path):
    text = LIMITS_YAML.replace("  - {metric: trr_s, max: 400 ns}\n",
                               "  - {metric: trr_s, max: 400 ns}\n"
                               "  - {metric: softness, min: 0.5}\n  - {metric: rrsf, max: 2}\n")
    spec = load_limits(write_limits(tmp_path, text))
    limits = {item.metric: item for item in spec.limits_at("25C")}
    assert limits["softness"].min == 0.5 and limits["rrsf"].max == 2.0


def test_the_example_limits_files_carry_units():
    for name in ("DX-4417.yaml", "DX-5203.yaml"):
        spec = load_limits(ROOT / "limits" / name)
        qrr = next(item for item in spec.limits if item.metric == "qrr_C")
        assert qrr.max is not None and qrr.max < 1e-5  # micro- or nanocoulombs, not coulombs


def _run_folder(tmp_path, shots, limits_text=LIMITS_YAML):
    from benchrun.store.results import ResultsStore
    from benchrun.store.rundata import write_manifest

    run_dir = tmp_path / "R-TEST"
    run_dir.mkdir()
    with ResultsStore(f"sqlite:///{run_dir / 'results.db'}") as store:
        store.create_run("R-TEST", "DX-4417", "LT-0117", {"run_id": "R-TEST"})
        for item in shots:
            store.add_shot(item)
    write_manifest(run_dir, {"run_id": "R-TEST", "part": "DX-4417", "lot": "LT-0117"})
    (run_dir / "limits.yaml").write_text(limits_text.replace("RULE", "guarded"))
    shutil.copy(ROOT / "sequences" / "bench-sim.yaml", run_dir / "bench.yaml")
    return run_dir


def test_cli_grade_refuses_a_unitless_limit_with_file_and_line(tmp_path, capsys):
    run_dir = _run_folder(tmp_path, [shot("S000", COLD, 0), shot("S000", HOT, 0)])
    text = LIMITS_YAML.replace("RULE", "guarded").replace(
        "{metric: qrr_C, condition: 25C, max: 3.0 uC}", "{metric: qrr_C, condition: 25C, max: 3.2}")
    bad = tmp_path / "unitless.yaml"
    bad.write_text(text)
    code = main(["grade", str(run_dir), "--limits", str(bad)])
    err = capsys.readouterr().err
    assert code != 0
    assert f"{bad}:{_line_of(text, 'max: 3.2}')}: limits.0.max:" in err
    assert "has no unit" in err and "Traceback" not in err


# ------------------------------------------------------------------ 3. aggregation


def _vrm_limits(tmp_path, aggregation: str = ""):
    """Simple acceptance (w = 0) so that the aggregation alone decides."""
    extra = f", aggregation: {aggregation}" if aggregation else ""
    text = LIMITS_YAML.replace("  - {metric: trr_s, max: 400 ns}\n",
                               "  - {metric: trr_s, max: 400 ns}\n"
                               f"  - {{metric: vrm_V, max: 960 V{extra}}}\n"
                               "  - {metric: irrm_A, max: 40 A}\n")
    return load_limits(write_limits(tmp_path, text, rule="simple"))


def _peaky_device():
    # Vrm 860 V and 1060 V: the mean (960 V) sits on the limit, the worst shot 100 V over it
    return [shot("S000", COLD, 0, vrm_V=860.0), shot("S000", COLD, 1, vrm_V=1060.0),
            shot("S000", HOT, 0), shot("S000", HOT, 1)]


def test_peak_limits_default_to_the_worst_shot(tmp_path):
    spec = _vrm_limits(tmp_path)
    by_metric = {item.metric: item for item in spec.limits_at("25C")}
    assert by_metric["vrm_V"].combine == "worst" and by_metric["irrm_A"].combine == "worst"
    assert by_metric["qrr_C"].combine == "mean" and by_metric["trr_s"].combine == "mean"
    lot = grade_lot(_peaky_device(), spec, bench=INPUTS)
    device = lot.device("S000")
    vrm = device.grade("vrm_V", "25C")
    # the lot's representative budget of a worst-shot limit also takes s of one reading
    pooled = next(c for c in lot.budgets["vrm_V@25C"].contributors
                  if c.name.startswith("repeatability"))
    assert pooled.standard_uncertainty == pytest.approx(stats.tstd([860.0, 1060.0]))
    assert vrm.aggregation == "worst" and vrm.value == 1060.0
    assert vrm.outcome == "non-conforming"
    assert vrm.shot_values == (860.0, 1060.0)
    # the worst shot is one reading: its Type A term is s, not s/√n
    repeat = next(c for c in vrm.budget.contributors if c.name.startswith("repeatability"))
    assert repeat.standard_uncertainty == pytest.approx(stats.tstd([860.0, 1060.0]))
    assert device.grade("qrr_C", "25C").aggregation == "mean"


def test_a_limit_can_state_the_mean(tmp_path):
    device = grade_lot(_peaky_device(), _vrm_limits(tmp_path, "mean"), bench=INPUTS
                       ).device("S000")
    vrm = device.grade("vrm_V", "25C")
    assert vrm.aggregation == "mean" and vrm.value == pytest.approx(960.0)
    assert vrm.outcome == "conforming"  # at the limit, accepted by simple acceptance


def test_worst_shot_of_a_lower_limit_is_the_smallest(tmp_path):
    text = LIMITS_YAML.replace("  - {metric: trr_s, max: 400 ns}\n",
                               "  - {metric: trr_s, max: 400 ns}\n"
                               "  - {metric: softness, min: 0.5, aggregation: worst}\n")
    spec = load_limits(write_limits(tmp_path, text))
    shots = [shot("S000", COLD, 0, softness=0.9), shot("S000", COLD, 1, softness=0.6),
             shot("S000", HOT, 0)]
    grade = grade_lot(shots, spec, bench=INPUTS).device("S000").grade("softness", "25C")
    assert grade.value == pytest.approx(0.6)


def test_grade_prints_the_aggregation_of_every_limit(tmp_path, capsys):
    text = LIMITS_YAML.replace("  - {metric: trr_s, max: 400 ns}\n",
                               "  - {metric: trr_s, max: 400 ns}\n"
                               "  - {metric: vrm_V, max: 960 V}\n")
    run_dir = _run_folder(tmp_path, _peaky_device(), text)
    assert main(["grade", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert any("vrm_V@25C" in line and "worst (default)" in line for line in out.splitlines())
    assert any("qrr_C@125C" in line and "mean (default)" in line for line in out.splitlines())
    assert main(["grade", str(run_dir), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    grade = next(g for g in data["devices"][0]["grades"] if g["metric"] == "vrm_V")
    assert grade["aggregation"] == "worst"
    assert {(r["metric"], r["aggregation"]) for r in data["limits"]} >= {
        ("vrm_V", "worst"), ("qrr_C", "mean")}


# ------------------------------------------------------------------ 4. bins and uncertainty


def _binned(tmp_path, qrr_hot: float, rule: str = "guarded"):
    spec = load_limits(write_limits(tmp_path, rule=rule))
    shots = [shot("S000", COLD, r) for r in range(2)]
    shots += [shot("S000", HOT, r, qrr=qrr_hot) for r in range(2)]
    return grade_lot(shots, spec, bench=INPUTS).device("S000")


def test_an_interval_across_a_bin_edge_is_unbinned(tmp_path):
    # Q1 ≤ 4.5 µC < Q2 ≤ 5.5 µC; 4.55 µC with U ≈ 0.35 µC straddles the 4.5 µC edge
    device = _binned(tmp_path, 4.55e-6)
    grade = device.grade("qrr_C", "125C")
    assert grade.outcome == "conforming" and grade.guard_band > 0.05e-6
    assert device.verdict == "conforming"
    assert device.bin is None and device.unbinned
    assert "straddles the class edge 4.5 µC" in device.bin_reason
    assert device.bin_reason in device.reasons


def test_an_interval_inside_one_class_is_binned(tmp_path):
    device = _binned(tmp_path, 5.0e-6)
    assert device.bin == "Q2" and not device.unbinned
    assert "in class Q2 with its guard band" in device.bin_reason


def test_simple_acceptance_bins_on_the_value_alone(tmp_path):
    device = _binned(tmp_path, 4.55e-6, rule="simple")
    assert device.bin == "Q2"  # w = 0 under simple acceptance (ILAC-G8 §4.2.1)


def test_grade_prints_why_a_device_is_unbinned(tmp_path, capsys):
    shots = [shot("S000", COLD, r) for r in range(2)]
    shots += [shot("S000", HOT, r, qrr=4.55e-6) for r in range(2)]
    run_dir = _run_folder(tmp_path, shots)
    assert main(["grade", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert "S000: unbinned: qrr_C at 125C 4.55 µC ± w" in out
    assert "straddles the class edge 4.5 µC" in out


# ------------------------------------------------------------------ 5. statistics output


def test_grade_prints_capability_method_and_an_outlier_table(tmp_path, capsys):
    values = [2.00, 2.10, 1.90, 2.05, 1.95, 2.02, 2.80]
    shots = []
    for index, value in enumerate(values):
        for repeat in range(2):
            shots.append(shot(f"S{index:03d}", COLD, repeat, qrr=value * 1e-6))
            shots.append(shot(f"S{index:03d}", HOT, repeat, qrr=2 * value * 1e-6))
    text = LIMITS_YAML.replace("lot_size: 20, sample_size: 5", "lot_size: 20, sample_size: 7")
    run_dir = _run_folder(tmp_path, shots, text)
    assert main(["grade", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert "Bissell" in out and "n = 7 < 25: capability not stated" in out
    assert "Outliers (modified z-score" in out and "Iglewicz & Hoaglin" in out
    table = out[out.index("Outliers (modified z-score"):]
    row = next(line for line in table.splitlines() if line.strip().startswith("S006"))
    assert "qrr_C@25C" in row and "2.8 µC" in row
    assert "if_A@" not in out  # no statistics of ungraded quantities


# ------------------------------------------------------------------ 6. the lot's plan


def test_oc_figures_against_scipy_and_closed_forms():
    for n, c, p in [(5, 0, 0.01), (13, 1, 0.025), (50, 2, 0.04)]:
        assert binomial_acceptance(p, n, c) == pytest.approx(stats.binom.cdf(c, n, p))
        beta_p = ltpd(n, c)
        assert stats.binom.cdf(c, n, beta_p) == pytest.approx(0.10, abs=1e-9)
    # c = 0: Pa = (1 − p)^n and LTPD = 1 − 0.1^(1/n) (Montgomery ch. 15)
    assert binomial_acceptance(0.01, 5, 0) == pytest.approx(0.99**5)
    assert ltpd(5, 0) == pytest.approx(1 - 0.1 ** (1 / 5))
    for lot, n, c, d in [(20, 5, 0, 3), (100, 13, 1, 10), (10, 10, 0, 1)]:
        assert hypergeometric_acceptance(d, lot, n, c) == pytest.approx(
            stats.hypergeom.cdf(c, lot, d, n))
    # a whole-lot zero-acceptance inspection rejects any lot holding one bad device
    assert lot_ltpd_count(10, 10, 0) == 1
    for lot, n, c in [(20, 5, 0), (3200, 125, 3), (500_001, 1250, 21)]:
        d = lot_ltpd_count(lot, n, c)
        assert stats.hypergeom.cdf(c, lot, d, n) <= 0.10 < stats.hypergeom.cdf(c, lot, d - 1, n)
    assert hypergeometric_acceptance(40_000, 500_001, 1250, 21) == pytest.approx(
        stats.hypergeom.cdf(21, 500_001, 40_000, 1250), rel=1e-9)


def test_the_lot_grade_states_its_plan_and_protection(tmp_path):
    lot = grade_lot([shot("S000", COLD, 0), shot("S000", HOT, 0)],
                    load_limits(write_limits(tmp_path)), bench=INPUTS)
    plan = lot.plan
    assert (plan.kind, plan.lot_size, plan.sample_size, plan.acceptance_number) == (
        "zero-acceptance", 20, 5, 0)
    assert plan.pa_at_aql == pytest.approx(0.99**5)
    assert plan.ltpd == pytest.approx(1 - 0.1 ** 0.2)
    data = lot.to_dict()["plan"]
    assert data["pa_at_aql"] == pytest.approx(0.99**5) and data["rejection_number"] == 1
    assert "binomial" in plan.describe() and "95.1 %" in plan.describe()
    # one device graded of a sample of five: the lot is rejected, whatever its grade
    assert lot.disposition == "reject"
    assert any("fewer than the sample size n = 5" in r for r in lot.reasons)


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        ("lot_size: 20, sample_size: 5", "lot_size: 4, sample_size: 5", "larger than the lot"),
        ("lot_size: 20, sample_size: 5, ", "sample_size: 5, ", "required"),
        ("lot_size: 20, sample_size: 5, ", "lot_size: 20, ", "required"),
        ("aql: 1 %, acceptance_number: 0", "aql: 1 %, acceptance_number: 1", "zero-acceptance"),
        ("plan: zero-acceptance", "plan: iso-2859-1", "inspection_level"),
    ],
)
def test_lot_rule_mistakes_are_refused(tmp_path, old, new, message):
    err, text = _refused(tmp_path, old, new)
    assert message in err.message
    assert err.line == _line_of(text, "lot:")


def test_an_iso_plan_states_level_and_aql(tmp_path):
    text = LIMITS_YAML.replace(
        "lot: {lot_size: 20, sample_size: 5, plan: zero-acceptance, aql: 1 %, "
        "acceptance_number: 0}",
        "lot: {lot_size: 200, sample_size: 32, plan: iso-2859-1, inspection_level: II, "
        "aql: 2.5 %, acceptance_number: 2}")
    spec = load_limits(write_limits(tmp_path, text))
    lot = grade_lot([shot("S000", COLD, 0), shot("S000", HOT, 0)], spec, bench=INPUTS)
    text = lot.plan.describe()
    assert "ISO 2859-1" in text and "inspection level II" in text and "AQL 2.5 %" in text
    assert lot.plan.pa_at_aql == pytest.approx(stats.binom.cdf(2, 32, 0.025))


def test_more_devices_than_the_lot_holds_is_refused(tmp_path):
    text = LIMITS_YAML.replace("lot_size: 20, sample_size: 5", "lot_size: 2, sample_size: 2")
    spec = load_limits(write_limits(tmp_path, text))
    shots = [shot(f"S{i:03d}", point, 0) for i in range(3) for point in (COLD, HOT)]
    with pytest.raises(GradingError, match="larger than the lot"):
        grade_lot(shots, spec, bench=INPUTS)


def test_grade_prints_the_plan_and_its_oc_figures(tmp_path, capsys):
    run_dir = _run_folder(tmp_path, [shot("S000", COLD, 0), shot("S000", HOT, 0)])
    assert main(["grade", str(run_dir)]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.startswith("Sampling plan:"))
    assert "n = 5 of a lot of N = 20, c = 0" in line
    assert "Pa = 95.1 %" in line and "LTPD (Pa = 10 %): 36.9 %" in line


# ------------------------------------------------------------------ 7. accuracies from the bench


def test_instrument_accuracies_in_the_limits_file_are_refused(tmp_path):
    err, text = _refused(tmp_path, "  coverage_factor: 2\n",
                         "  coverage_factor: 2\n  scope_vertical_accuracy: 1.5 %\n")
    assert err.line == _line_of(text, "uncertainty:")
    assert "belongs to the bench file" in err.message
    assert "instruments.scope.accuracy.vertical" in err.message


def test_budget_inputs_come_from_the_bench_file(tmp_path):
    bench = load_bench(ROOT / "sequences" / "bench-sim.yaml")
    inputs = bench_inputs(bench)
    assert (inputs.scope_vertical_accuracy, inputs.current_sensor_tolerance,
            inputs.voltage_probe_tolerance, inputs.deskew) == pytest.approx(
        (0.015, 0.01, 0.02, 0.5e-9))
    spec = load_limits(write_limits(tmp_path))
    shots = [shot("S000", COLD, 0), shot("S000", HOT, 0)]
    grade = grade_lot(shots, spec, bench=bench).device("S000").grade("qrr_C", "25C")
    names = [c.name for c in grade.budget.contributors]
    assert any("KPC-CAL-2026-0313" in name and "current-sensor" in name for name in names)
    assert any("KPC-CAL-2026-0311" in name and "scope vertical" in name for name in names)
    # a coarser shunt on the bench gives a larger U for the same measurement
    shunt = bench.probes["diode_current"]
    coarse = bench.model_copy(update={"probes": {
        **bench.probes,
        "diode_current": shunt.model_copy(update={
            "accuracy": shunt.accuracy.model_copy(update={"scale": 0.05})})}})
    wider = grade_lot(shots, spec, bench=coarse).device("S000").grade("qrr_C", "25C")
    assert wider.expanded_uncertainty > 1.2 * grade.expanded_uncertainty
    assert grade_lot(shots, spec, bench=bench).instrument_inputs["current_source"] == (
        "certificate KPC-CAL-2026-0313, calibrated 2026-01-12")


def test_a_bench_without_accuracies_cannot_grade(tmp_path):
    bench = load_bench(ROOT / "sequences" / "bench-sim.yaml")
    scope = bench.instruments.scope
    bare = bench.model_copy(update={"instruments": bench.instruments.model_copy(
        update={"scope": scope.model_copy(update={"accuracy": None})})})
    with pytest.raises(GradingError, match=r"instruments\.scope\.accuracy"):
        grade_lot([shot("S000", COLD, 0)], load_limits(write_limits(tmp_path)), bench=bare)


def test_bench_accuracy_needs_units_and_a_certificate(tmp_path):
    text = (ROOT / "sequences" / "bench-sim.yaml").read_text()
    unitless = text.replace("accuracy: {scale: 1 %,", "accuracy: {scale: 0.01,")
    path = tmp_path / "bench.yaml"
    path.write_text(unitless)
    with pytest.raises(ConfigError, match="has no unit") as info:
        load_bench(path)
    assert info.value.line == _line_of(unitless, "scale: 0.01")
    path.write_text(text.replace("certificate: KPC-CAL-2026-0311, ", ""))
    with pytest.raises(ConfigError, match="required"):
        load_bench(path)


def test_regrading_with_replaced_inputs_keeps_the_limits_fraction(tmp_path):
    spec = load_limits(write_limits(tmp_path))
    lot = grade_lot([shot("S000", COLD, 0)], spec,
                    bench=replace(INPUTS, integration_end_fraction=0.5))
    assert lot.instrument_inputs["integration_end_fraction"] == 0.02
