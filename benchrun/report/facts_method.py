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


def window_convention(metric: str, options: dict[str, Any]) -> str:
    """Where in the record a metric is taken (the window and end points that define it)."""
    fit_high = options.get("fit_high", 0.9)
    fit_low = options.get("fit_low", 0.25)
    end = options.get("integration_end_fraction", 0.02)
    threshold = options.get("trr_threshold_fraction", 0.25)
    trr = (f"from t0 to the zero of the line through −{fit_high:g}·Irrm and −{fit_low:g}·Irrm"
           if options.get("trr_method", "extrapolate") != "threshold"
           else f"from t0 to i = −{threshold:g}·Irrm")
    conventions = {
        "trr_s": trr,
        "ta_s": "from t0 to the instant of Irrm",
        "tb_s": "from the instant of Irrm to the end of trr",
        "softness": "tb / ta of the same shot",
        "rrsf": "slopes at t0 and after the current minimum",
        "irrm_A": "minimum of i from t0 to t2",
        "qrr_C": f"integral from t0 to t2 (i = −{end:g}·Irrm)",
        "err_J": f"integral from t0 to t2 (i = −{end:g}·Irrm)",
        "vrm_V": "maximum of −v from t0 to t2 + trr",
        "vr_V": "steady reverse voltage after the event",
        "if_A": "plateau before the commutation",
        "didt_A_per_s": "between i = +0.5·IF and i = −0.5·Irrm",
    }
    return conventions.get(metric, "as defined in the method table")
