"""What the analysis does, in words: the single source of the metric definitions and the
method rows the report prints (and the README's metrics section repeats). Built from the
constants the code uses, so claim and code cannot drift apart unnoticed
(tests/test_method_claims.py checks both against the analysis' behaviour).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from benchrun.analysis import baseline as bl
from benchrun.analysis import quality as qa
from benchrun.analysis.conventions import Convention
from benchrun.analysis.measure import END_NOISE_MULTIPLE, MIN_PLATEAU_SNR, T0_SLOPE_BAND

#: Metric key → definition (``{fit_high}``, ``{fit_low}``, ``{end}``, ``{threshold}`` filled
#: from the analysis options).
METRIC_DEFINITIONS: dict[str, str] = {
    "if_A": ("forward current on the plateau just before commutation (mean of the samples "
             "within 4σ of their median)"),
    "irrm_A": "peak reverse recovery current, −min(i) in the recovery",
    "ta_s": "t0 to the instant of Irrm",
    "trr_s": ("t0 to the zero crossing of the straight line through the points where i "
              "rises through −{fit_high}·Irrm and −{fit_low}·Irrm (IEC 60747-2 extrapolation)"),
    "trr_s_threshold": ("t0 to the instant i rises through −{threshold}·Irrm "
                        "(JEDEC 'current reaches a set value' method)"),
    "tb_s": "trr − ta",
    "softness": "S = tb / ta",
    "rrsf": ("|di/dt at t0| / steepest di/dt after the minimum; both least-squares slopes: "
             f"at t0 over the samples between ±{T0_SLOPE_BAND:g}·min(IF, Irrm), after the "
             "minimum the largest slope of a line over a sliding window (at least 3 samples) "
             "up to t2, or over one window from the minimum when t2 comes sooner"),
    "qrr_C": "−∫ i dt from t0 to t2; t2 where i rises through −{end}·Irrm",
    "qrr_C_trr_end": "−∫ i dt from t0 to the trr end",
    "qrr_C_triangle": "½·Irrm·trr (triangle)",
    "err_J": "∫ v·i dt from t0 to t2 (energy dissipated in the diode)",
    "didt_A_per_s": ("commutation slope (0.5·IF + 0.5·Irrm) / Δt, Δt between the instants the "
                     "current falls through +0.5·IF and through −0.5·Irrm"),
    "vrm_V": ("max(−v) from t0 until the reverse voltage has settled: to the end of the "
              "window VR is taken from, t2 + trr + max(5·(t2 − t0), 32 samples)"),
    "vr_V": ("steady reverse voltage: mean of −v (within 4σ of the median) over "
             "t2 + trr … t2 + trr + max(5·(t2 − t0), 32 samples)"),
}

OFFSET_TEXT = (
    "both channels zeroed before the first pulse when the record holds it (no voltage, no "
    "current: the diode is shunted by the unenergised load inductor); else the current is "
    "zeroed during the first pulse (the diode blocks; its leakage is removed with the "
    f"offset) over up to {bl.BASELINE_MAX} samples, or from the quiet window after the "
    "recovery when the record starts on the plateau, and the voltage is not corrected; "
    "the offsets applied, their rule and residual uncertainty are in every result's "
    f"corrections; flag offset_large above {100 * qa.OFFSET_LARGE_FRACTION:g} % of IF or VR"
)

UNCERTAINTY_TEXT = (
    "u of every metric from the capture itself: plateau noise σ (the code step/√12 on "
    "noise-free quantised data), noise/|slope| at every crossing, the peak fit's covariance "
    "and model error (up to the most extreme sample under the fit, rectangular), "
    "σ·Δt·√N for the integrals and the offset residuals, propagated into ta, tb, trr, S, "
    "Qrr and Err; u(RRSF) adds the bound √(2·ln N)·u on how far noise lifts the largest of "
    "the N window slopes above the true steepest one"
)

FLAG_RULES: dict[str, str] = {
    "offset_large": f"an offset above {100 * qa.OFFSET_LARGE_FRACTION:g} % of IF or VR removed",
    "rise_time_limited": (f"the chain's rise time above {100 * qa.RISE_TIME_FRACTION:g} % of "
                          "the shorter of ta and tb"),
    "deskew_suspect": ("the reverse voltage passes VR by 3σ before the current peak by more "
                       "than the deskew tolerance (1 ns by default)"),
    "rrsf_unresolved": f"RRSF not found or u(RRSF) above {100 * qa.RRSF_U_FRACTION:g} % of it",
    "vrm_below_vr": "VRM more than 3 u below VR",
    "trr_beyond_integration": ("the trr end after t2 by more than a straight return would "
                               "put it, and the reverse voltage passes "
                               f"{100 * qa.CAPACITIVE_VOLTAGE_FRACTION:g} % of its value at "
                               "the current peak (or 5 noise sigmas: a fraction x) before "
                               "(1 + √x)/2 of the charge to the peak has flowed (the "
                               "junction charges like a capacitor from t0): capacitive "
                               "recovery; Qrr and Err are Qc and Ec"),
    "ringing": (f"the current swings beyond {100 * qa.RINGING_FRACTION:g} % of Irrm (and 5σ) "
                "after t2"),
    "snap": (f"the steepest slope after the peak above {qa.SNAP_MULTIPLE:g} × the slope at t0 "
             "by more than noise explains: some window's slope − "
             f"{qa.SNAP_MULTIPLE:g} × |slope at t0| above z·√(u² + 9·u(t0 slope)²), over the "
             "RRSF windows and 2, 4, "
             f"8… times wider ones, z = Φ⁻¹(1 − {qa.SNAP_FALSE_ALARM:g}/N) for N "
             "windows (union bound: noise alone flags a recovery at the threshold with at "
             f"most {100 * qa.SNAP_FALSE_ALARM:g} % probability); without noise plain "
             f"{qa.SNAP_MULTIPLE:g} ×"),
    "ta_unresolved": f"u(ta) above {100 * qa.TA_U_FRACTION:g} % of ta",
    "end_in_noise": (f"the integration end level below {END_NOISE_MULTIPLE:g} current noise "
                     "sigmas: t2 from a wider moving average, the return must hold for its "
                     "width; u(t2), u(Qrr), u(Err) include it"),
    "clipped_diode_current": ("samples pile up at the lowest current value (at least 5, 3 in "
                              "a row, 3 × the next code): the screen edge"),
}

REFUSALS_TEXT = (
    f"refused: a forward plateau under {MIN_PLATEAU_SNR:g} noise sigmas (noise), a record "
    f"whose voltage does not go reverse by {qa.COMMUTATION_VOLTAGE_RATIO:g} × the plateau "
    "voltage after the current reverses (no diode commutation; a reversed voltage probe is "
    "named)"
)


def definition(key: str, options: Mapping[str, Any] | None = None) -> str:
    """The definition of a metric under ``options`` (a run's ``analysis_options``)."""
    conv = Convention.of(options)
    name = key
    if key == "trr_s" and conv.trr_method == "threshold":
        name = "trr_s_threshold"
    if key == "qrr_C" and conv.integration_window != "fraction":
        name = f"qrr_C_{conv.integration_window}"
    text = METRIC_DEFINITIONS[name]
    if key == "err_J" and conv.integration_window != "fraction":
        text = "∫ v·i dt from t0 to the trr end (energy dissipated in the diode)"
    return text.format(fit_high=conv.fit_high, fit_low=conv.fit_low,
                       end=conv.integration_end_fraction,
                       threshold=conv.trr_threshold_fraction)


def method_rows(options: Mapping[str, Any] | None = None) -> list[tuple[str, str]]:
    """The conditioning and quality rows of the report's method table."""
    options = options or {}
    low = options.get("lowpass_hz")
    return [
        ("offsets", OFFSET_TEXT),
        ("filtering", f"zero-phase low-pass at {low:g} Hz" if low else
         "none (samples as captured)"),
        ("convention", Convention.of(options).describe()),
        ("uncertainty", UNCERTAINTY_TEXT),
        ("flags", "; ".join(f"{k}: {v}" for k, v in FLAG_RULES.items())),
        ("refused", REFUSALS_TEXT),
    ]
