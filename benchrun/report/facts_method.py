"""The method as the report states it: metric definitions and analysis conventions.

The wording of the report's method table lives here (fractions filled in from the analysis
options the run used); DESIGN §3 holds the definitions behind it.
"""

from __future__ import annotations

from typing import Any

from benchrun.analysis.conventions import Convention
from benchrun.analysis.method import METRIC_DEFINITIONS as ANALYSIS_DEFINITIONS
from benchrun.analysis.method import definition as method_definition
from benchrun.analysis.method import method_rows
from benchrun.report.facts import METRIC_LABELS

#: Definitions printed in the report: the analysis' own wording (benchrun.analysis.method),
#: the one source for the report, the README and the code's docstrings.
METRIC_DEFINITIONS: dict[str, str] = ANALYSIS_DEFINITIONS


def method_table(options: dict[str, Any]) -> list[list[str]]:
    rows = [["Metric", "Definition (values positive, SI units; times by linear interpolation)"]]
    for key in ("if_A", "irrm_A", "ta_s", "trr_s", "tb_s", "softness", "rrsf", "qrr_C", "err_J",
                "didt_A_per_s", "vrm_V", "vr_V"):
        rows.append([METRIC_LABELS[key][0], method_definition(key, options)])
    rows.append(["t0", "first falling zero crossing of the diode current at the analysed "
                       "commutation"])
    # offsets, filtering, convention, uncertainty, flags, refusals: worded by the analysis
    rows.extend([item, text] for item, text in method_rows(options))
    return rows


def window_convention(metric: str, options: dict[str, Any]) -> str:
    """Where in the record a metric is taken (the window and end points that define it)."""
    fit_high = options.get("fit_high", 0.9)
    fit_low = options.get("fit_low", 0.25)
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
        "qrr_C": Convention.of(options).describe().split(";")[0],
        "err_J": Convention.of(options).describe().split(";")[0],
        "vrm_V": "maximum of −v from t0 until the reverse voltage has settled (end of the VR "
                 "window)",
        "vr_V": "steady reverse voltage after the event",
        "if_A": "plateau before the commutation",
        "didt_A_per_s": "between i = +0.5·IF and i = −0.5·Irrm",
    }
    return conventions.get(metric, "as defined in the method table")
