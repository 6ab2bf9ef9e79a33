"""Channel bandwidths in the bench file → system rise time → ``rise_time_limited``.

Sources: a first-order response's 10-90 % rise time is ln(9)/(2π·BW) ≈ 0.35/BW (circuit
theory); cascaded stages combine by root sum of squares (Valley & Wallman, Vacuum Tube
Amplifiers, 1948, from memory). The flag rule (chain rise time above 20 % of the shorter of
ta and tb) is common practice (benchrun.analysis.quality).
"""

from __future__ import annotations

import math
import re

import pytest
from test_runner_run import run_sim
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench
from benchrun.config.bench import system_rise_time
from benchrun.runner.shots import probes_for
from benchrun.store.rundata import load_run


def _without_bandwidths(text: str) -> str:
    """The example bench file with its stated probe bandwidths taken out."""
    return re.sub(r"\s*\bbandwidth: [0-9.]+ [A-Za-z]+,?", "", text)


def _plain_bench(tmp_path):
    path = tmp_path / "plain-bench.yaml"
    path.write_text(_without_bandwidths(BENCH.read_text()))
    return path


def _bench_with(tmp_path, current_probe_extra: str = "", scope_extra: str = ""):
    text = _without_bandwidths(BENCH.read_text())
    old = "resistance: 10 mohm, deskew: 0 ns,"
    assert old in text
    text = text.replace(old, f"resistance: 10 mohm, deskew: 0 ns,{current_probe_extra}")
    if scope_extra:
        old_scope = "family: scope-generic,"
        assert old_scope in text
        text = text.replace(old_scope, f"family: scope-generic, {scope_extra}")
    path = tmp_path / "bench.yaml"
    path.write_text(text)
    return path


def test_rise_time_is_root_sum_square_of_035_over_bandwidth(tmp_path):
    bench = load_bench(_bench_with(tmp_path, " bandwidth: 100 MHz,", "bandwidth: 200 MHz,"))
    k = math.log(9.0) / (2.0 * math.pi)
    assert k == pytest.approx(0.35, abs=0.001)
    expected = math.hypot(k / 100e6, k / 200e6)
    assert system_rise_time(bench, "diode_current") == pytest.approx(expected, rel=1e-12)
    # the voltage probe states none: the scope input alone
    assert system_rise_time(bench, "diode_voltage") == pytest.approx(k / 200e6, rel=1e-12)
    assert probes_for(bench)["diode_current"].rise_time_s == pytest.approx(expected)


def test_channel_bandwidth_overrides_the_scope_and_none_stays_none(tmp_path):
    bench = load_bench(_bench_with(tmp_path, " channel_bandwidth: 20 MHz,",
                                   "bandwidth: 1 GHz,"))
    k = math.log(9.0) / (2.0 * math.pi)
    assert system_rise_time(bench, "diode_current") == pytest.approx(k / 20e6)
    plain = load_bench(_plain_bench(tmp_path))
    assert system_rise_time(plain, "diode_current") is None
    assert probes_for(plain)["diode_current"].rise_time_s is None


@pytest.mark.slow
def test_slow_probe_in_bench_file_flags_the_run(tmp_path):
    # a 10 MHz current probe: 35 ns rise time, well above 20 % of ta / tb of the simulated
    # silicon part (tens of ns)
    bench = _bench_with(tmp_path, " bandwidth: 10 MHz,", "bandwidth: 500 MHz,")
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    outcome, _ = run_sim(seq, tmp_path / "out", bench_path=bench)
    shots = load_run(outcome.run_dir).shots
    assert shots
    k = math.log(9.0) / (2.0 * math.pi)
    for shot in shots:
        names = [f.split(":")[0] for f in shot.flags]
        assert "rise_time_limited" in names, shot.flags
        assert shot.acquisition["current_rise_time_s"] == pytest.approx(
            math.hypot(k / 10e6, k / 500e6))
        assert shot.acquisition["voltage_rise_time_s"] == pytest.approx(k / 500e6)


@pytest.mark.slow
def test_fast_chain_does_not_flag(tmp_path):
    bench = _bench_with(tmp_path, " bandwidth: 2 GHz,", "bandwidth: 2 GHz,")
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    outcome, _ = run_sim(seq, tmp_path / "out", bench_path=bench)
    shots = load_run(outcome.run_dir).shots
    assert shots
    for shot in shots:
        assert not any(f.startswith("rise_time_limited") for f in shot.flags), shot.flags
        assert shot.acquisition["current_rise_time_s"] > 0
