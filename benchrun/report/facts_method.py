"""The method as the report states it: metric definitions and analysis conventions.

The wording of the report's method table lives here (fractions filled in from the analysis
options the run used); DESIGN §3 holds the definitions behind it.
"""

from __future__ import annotations

from typing import Any

from benchrun.report.facts import METRIC_LABELS
from benchrun.units import format_si

#: Definitions printed in the report (DESIGN §3; fractions filled from the analysis options).
METRIC_DEFINITIONS: dict[str, str] = {
    "if_A": "forward current on the plateau just before commutation",
    "irrm_A": "peak reverse recovery current, −min(i) in the recovery",
    "ta_s": "t0 to the instant of Irrm",
    "trr_s": ("t0 to the zero crossing of the straight line through the points where i "
              "rises through −{fit_high}·Irrm and −{fit_low}·Irrm (IEC 60747-2 extrapolation)"),
    "trr_s_threshold": ("t0 to the instant i rises through −{threshold}·Irrm "
                        "(JEDEC 'current reaches a set value' method)"),
    "tb_s": "trr − ta",
    "softness": "S = tb / ta",
    "rrsf": ("JEDEC reverse-recovery softness factor: |di/dt at t0| / |steepest di/dt "
             "after the minimum|"),
    "qrr_C": "−∫ i dt from t0 to t2; t2 where i rises through −{end}·Irrm",
    "err_J": "∫ v·i dt from t0 to t2 (energy dissipated in the diode)",
    "didt_A_per_s": ("commutation slope (0.5·IF + 0.5·Irrm) / Δt, Δt between the instants the "
                     "current falls through +0.5·IF and through −0.5·Irrm"),
    "vrm_V": "max(−v) from t0 to t2 + trr (peak reverse voltage incl. overshoot)",
    "vr_V": "steady reverse voltage after the event",
}


def method_table(options: dict[str, Any]) -> list[list[str]]:
    fit_high = options.get("fit_high", 0.9)
    fit_low = options.get("fit_low", 0.25)
    end = options.get("integration_end_fraction", 0.02)
    rows = [["Metric", "Definition (values positive, SI units; times by linear interpolation)"]]
    for key in ("if_A", "irrm_A", "ta_s", "trr_s", "tb_s", "softness", "rrsf", "qrr_C", "err_J",
                "didt_A_per_s", "vrm_V", "vr_V"):
        text = METRIC_DEFINITIONS[key]
        if key == "trr_s" and options.get("trr_method") == "threshold":
            text = METRIC_DEFINITIONS["trr_s_threshold"]
        text = text.format(fit_high=fit_high, fit_low=fit_low, end=end,
                           threshold=options.get("trr_threshold_fraction", 0.25))
        rows.append([METRIC_LABELS[key][0], text])
    rows.append(["t0", "first falling zero crossing of the diode current at the analysed "
                       "commutation"])
    low = options.get("lowpass_hz")
    rows.append(["filtering", "zero-phase low-pass at " + format_si(low, "Hz")
                 if low else "none (raw ADC codes, offset removed from the pre-event baseline)"])
    return rows
