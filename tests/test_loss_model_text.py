"""What ``benchrun loss`` and the report's loss page say about the energy model is what the code
does.

Every claim of ``benchrun.loss.estimate.MODEL_CLAIMS`` has a check here that computes with the
code (hand-worked numbers: P = fsw·E and the sums of the claims, common practice); a claim
without a check fails the first test, and the command's output, the report's loss page and the
table's JSON must carry the sentences word for word.
"""

from __future__ import annotations

import html

import pytest
from reportlab.lib.styles import getSampleStyleSheet

from benchrun.commands.loss import MODEL_LINES, render_text
from benchrun.loss import estimate_losses
from benchrun.loss.estimate import BASIS_ESTIMATE, BASIS_MEASURED, MODEL_CLAIMS
from benchrun.records import ShotResult, TestPoint
from benchrun.report.pages_loss import loss_flowables


def _shot(metrics, serial="S1", valid=True, part="DX-4417"):
    return ShotResult(
        run_id="R", part=part, lot="LT-0117", serial=serial,
        point=TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0,
                        forward_current_A=20.0),
        repeat=0, attempt=0, timestamp="2031-01-01T00:00:00Z",
        conditions={"if_A": 20.0, "didt_A_per_s": 5e8, "vr_V": 600.0, "temperature_K": 298.15},
        metrics=metrics, valid=valid)


def check_energy():
    (row,) = estimate_losses([_shot({"err_J": 100e-6, "eon_recovery_J": 400e-6})], [1.0]).rows
    assert row.energy_J == pytest.approx(500e-6)  # Err + Esw,rec
    assert (row.err_J, row.switch_J) == pytest.approx((100e-6, 400e-6))


def check_switch_measured():
    # the measured switch share wins over the estimate and is marked 'measured'
    (row,) = estimate_losses([_shot({"err_J": 100e-6, "eon_recovery_J": 400e-6,
                                     "eon_recovery_estimate_J": 900e-6})], [1.0]).rows
    assert row.switch_J == pytest.approx(400e-6) and row.basis == BASIS_MEASURED


def check_switch_estimate():
    # without a measured share: the estimate, or VR·Qrr computed from the metrics
    (row,) = estimate_losses([_shot({"err_J": 100e-6, "eon_recovery_estimate_J": 300e-6})],
                             [1.0]).rows
    assert row.switch_J == pytest.approx(300e-6) and row.basis == BASIS_ESTIMATE
    (row,) = estimate_losses([_shot({"err_J": 100e-6, "qrr_C": 1e-6, "vr_V": 600.0})],
                             [1.0]).rows
    assert row.switch_J == pytest.approx(600e-6) and row.basis == BASIS_ESTIMATE  # 600 V·1 µC


def check_capacitive():
    shot = _shot({"err_J": 20e-6, "eon_recovery_J": 55e-6}, part="DX-5203")
    (row,) = estimate_losses([shot], [1.0], capacitive_parts=("DX-5203",)).rows
    assert row.energy_J == pytest.approx(55e-6) and not row.err_counted
    (row,) = estimate_losses([shot], [1.0]).rows  # not declared: Err counted
    assert row.energy_J == pytest.approx(75e-6)


def check_power():
    table = estimate_losses([_shot({"err_J": 100e-6, "eon_recovery_J": 400e-6})],
                            [20e3, 50e3])
    assert table.rows[0].power_W == pytest.approx((10.0, 25.0))  # 500 µJ × 20 kHz, × 50 kHz


def check_valid_only():
    shots = [_shot({"err_J": 100e-6, "eon_recovery_J": 400e-6}),
             _shot({"err_J": 9e-3, "eon_recovery_J": 9e-3}, valid=False),
             _shot({"err_J": 5e-3, "eon_recovery_J": 5e-3}, serial="S2")]
    table = estimate_losses(shots, [1.0], rejected={"S2"})
    assert [r.serial for r in table.rows] == ["S1"]
    assert table.rows[0].energy_J == pytest.approx(500e-6)
    assert table.rejected_excluded


CHECKS = {"energy": check_energy, "switch_measured": check_switch_measured,
          "switch_estimate": check_switch_estimate, "capacitive": check_capacitive,
          "power": check_power, "valid_only": check_valid_only}


def test_every_claim_has_a_check():
    assert [key for key, _ in MODEL_CLAIMS] == list(CHECKS)


@pytest.mark.parametrize("key", list(CHECKS))
def test_claim_holds_in_the_code(key):
    CHECKS[key]()


def test_command_report_and_json_print_the_claims_word_for_word():
    table = estimate_losses([_shot({"err_J": 100e-6, "eon_recovery_J": 400e-6})], [20e3])
    text = " ".join(render_text(table, run_id="R").split())
    page = html.unescape(" ".join(" ".join(getattr(f, "text", "") for f in
                                           loss_flowables(table, getSampleStyleSheet())).split()))
    model = table.to_dict()["model"]
    for key, sentence in MODEL_CLAIMS:
        flat = " ".join(sentence.split())
        assert flat in text, key
        assert flat in page, key
        assert model[key] == sentence
    assert MODEL_LINES[0].startswith(MODEL_CLAIMS[0][1])
