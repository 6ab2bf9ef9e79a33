"""The sample capture shipped in samples/ reads with ``benchrun analyze`` as it is today."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from benchrun.cli import main

SAMPLE = Path(__file__).resolve().parent.parent / "samples" / "dx4417-25C.csv"


def test_sample_is_small_and_in_the_plain_format():
    assert SAMPLE.stat().st_size < 300_000  # "a few hundred kB at most"
    assert SAMPLE.read_text().splitlines()[0] == "t (s),v (V),i (A)"


def test_analyze_reads_the_sample_and_gives_the_metrics_its_run_stored(capsys):
    assert main(["analyze", str(SAMPLE), "--json"]) == 0
    metrics = json.loads(capsys.readouterr().out)
    # the values the simulated run stored for this shot (samples/README.md); the sample is
    # cropped and rounded to 6 digits, so agreement within 1 % is expected
    assert metrics["irrm_A"] == pytest.approx(41.4451, rel=0.01)
    assert metrics["qrr_C"] == pytest.approx(2.62553e-6, rel=0.01)
    assert metrics["trr_s"] == pytest.approx(118.879e-9, rel=0.01)
    assert metrics["if_A"] == pytest.approx(30.1246, rel=0.01)
    # the flags the run stored with the shot (samples/README.md)
    assert metrics["flags"] == ["rrsf_unresolved"]
