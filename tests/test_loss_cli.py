"""``benchrun loss`` end to end over stored results (SQLite results databases).

Reference for the numbers: P = fsw·E (common practice), worked by hand in the comments.
"""

from __future__ import annotations

import json

import pytest

from benchrun.cli import main
from benchrun.records import ShotResult, TestPoint
from benchrun.store.results import ResultsStore


def _store(path, run_id, part, lot, err, rec):
    url = f"sqlite:///{path}"
    with ResultsStore(url) as store:
        store.create_run(run_id, part, lot, {"run_id": run_id})
        for k, serial in enumerate(("D1", "D2")):
            store.add_shot(ShotResult(
                run_id=run_id, part=part, lot=lot, serial=serial,
                point=TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0,
                                forward_current_A=20.0),
                repeat=0, attempt=0, timestamp=f"2031-01-01T00:00:0{k}Z",
                conditions={"if_A": 20.0, "didt_A_per_s": 5e8, "vr_V": 600.0,
                            "temperature_K": 298.15},
                metrics={"err_J": err, "eon_recovery_J": rec, "eon_recovery_estimate_J": rec},
            ))
    return url


@pytest.fixture()
def stores(tmp_path):
    si = _store(tmp_path / "si.db", "R-SI", "DX-4417", "LT-0117", 500e-6, 1000e-6)
    sic = _store(tmp_path / "sic.db", "R-SIC", "DX-5203", "LT-0131", 20e-6, 130e-6)
    return si, sic


def test_json_output_with_compare(stores, capsys):
    si, sic = stores
    code = main(["loss", sic, "--fsw", "20kHz", "--fsw", "50 kHz", "--compare", si, "--json"])
    assert code == 0
    data = json.loads(capsys.readouterr().out)
    assert data["loss"]["fsw_hz"] == [20e3, 50e3]
    (group,) = data["loss"]["groups"]
    # E = 20 µJ + 130 µJ = 150 µJ → 3 W at 20 kHz, 7.5 W at 50 kHz (hand)
    assert group["power_mean_W"] == pytest.approx([3.0, 7.5])
    (row,) = data["compare"]["rows"]
    # silicon 1.5 mJ → 30 W at 20 kHz; saving 27 W = 90 % (hand)
    assert row["saving_W"] == pytest.approx([27.0, 67.5])
    assert row["saving_pct"] == pytest.approx([90.0, 90.0])
    assert data["compare"]["run_id"] == "R-SI"


def test_text_output(stores, capsys):
    si, sic = stores
    assert main(["loss", si, "--fsw", "20kHz", "--compare", sic]) == 0
    out = capsys.readouterr().out
    assert "DX-4417   lot LT-0117" in out
    assert "30 W" in out  # 1.5 mJ × 20 kHz
    assert "-27 W" in out  # the silicon part loses more than the SiC reference


def test_bad_frequency_is_one_line_error(stores, capsys):
    si, _ = stores
    assert main(["loss", si, "--fsw", "20 kV"]) == 2
    err = capsys.readouterr().err
    assert "--fsw" in err and len(err.strip().splitlines()) == 1
    assert main(["loss", si, "--fsw", "0 Hz"]) == 2


def test_missing_results_is_an_error(tmp_path, capsys):
    assert main(["loss", str(tmp_path / "nowhere"), "--fsw", "20kHz"]) == 2
    assert "error" in capsys.readouterr().err


def test_line_cycle_option(stores, capsys):
    si, _ = stores
    # one IF only in this store: the line-cycle average is refused with the reason
    assert main(["loss", si, "--fsw", "20kHz", "--line-peak", "28 A", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["line_cycle"]["results"] == []
    assert "one forward current only" in data["line_cycle"]["not_fitted"][0]
    assert main(["loss", si, "--fsw", "20kHz", "--line-peak", "28 V"]) == 2
    assert "--line-peak" in capsys.readouterr().err
