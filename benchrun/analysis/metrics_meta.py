"""Unit, display name and description of every metric key (used by the CLI, limits and report).

Keys are those of ``RecoveryMetrics.to_dict()`` and ``SwitchingMetrics``; values are SI.
``MetricMeta.intervals`` names the recovery time intervals a metric needs resolved by the
sample interval (see :mod:`benchrun.analysis.resolution`).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from benchrun.errors import GradingError


@dataclass(frozen=True)
class MetricMeta:
    """What a metric key means.

    Attributes
    ----------
    key
        The metric key (``"qrr_C"``).
    unit
        SI unit symbol for :func:`benchrun.units.format_si` (``""`` for a ratio).
    name
        Short display name (``"Qrr"``).
    description
        One line with the definition and its source.
    intervals
        Recovery time intervals (``"ta"``, ``"tb"``, ``"trr"``) that must span enough
        samples for this metric to be resolved; a capture that under-samples one of them
        carries the ``undersampled_recovery`` flag naming the metric
        (:mod:`benchrun.analysis.resolution`). Empty for metrics that do not depend on them.
    """

    key: str
    unit: str
    name: str
    description: str
    intervals: tuple[str, ...] = ()


_TABLE = (
    ("if_A", "A", "IF", "forward current on the plateau just before commutation"),
    ("t0_s", "s", "t0", "instant the current falls through zero at the commutation"),
    ("irrm_A", "A", "Irrm", "peak reverse-recovery current, -min(i)"),
    ("ta_s", "s", "ta", "time from t0 to the reverse-current peak"),
    ("tb_s", "s", "tb", "trr - ta"),
    ("trr_s", "s", "trr",
     "reverse-recovery time: t0 to the zero crossing of the line through 0.9·Irrm and "
     "0.25·Irrm after the peak by default (the extrapolation of IEC 60747-2 / JESD282-B, "
     "points set by the test specification)"),
    ("softness", "", "S", "softness tb/ta"),
    ("rrsf", "", "RRSF",
     "reverse-recovery softness factor |di/dt at t0| / |steepest di/dt after the peak|, "
     "least-squares slopes (JEDEC style)"),
    ("qrr_C", "C", "Qrr",
     "recovered charge -∫i dt from t0 to the 2 % point after the peak (IEC 60747-9 practice)"),
    ("err_J", "J", "Err", "reverse-recovery energy ∫v·i dt from t0 to the 2 % point"),
    ("didt_A_per_s", "A/s", "di/dt",
     "commutation slope (0.5·IF + 0.5·Irrm) / (t(-0.5·Irrm) - t(+0.5·IF))"),
    ("vrm_V", "V", "VRM", "peak reverse voltage from t0 until the reverse voltage has settled "
     "(end of the VR window)"),
    ("vr_V", "V", "VR", "steady reverse voltage after the recovery"),
    ("t_irrm_s", "s", "t(Irrm)", "absolute instant of the reverse-current peak"),
    ("t_trr_s", "s", "t(trr)", "absolute instant at which trr ends"),
    ("t2_s", "s", "t2", "absolute end of the Qrr / Err integration"),
    ("eon_J", "J", "Eon", "switch turn-on energy"),
    ("eon_recovery_J", "J", "Eon(rec)", "part of the switch turn-on energy due to diode recovery"),
    ("eon_ideal_J", "J", "Eon(ideal)",
     "switch turn-on energy modelled for a charge-free diode at the same di/dt and dv/dt"),
    ("eon_recovery_estimate_J", "J", "VR·Qrr",
     "estimate of the recovery-caused switch energy, VR·Qrr (common practice)"),
    ("t_eon_start_s", "s", "t(Eon start)",
     "absolute start of the Eon window: switch current rises through 10 % of IF"),
    ("t_eon_end_s", "s", "t(Eon end)",
     "absolute end of the Eon window: switch voltage falls through 2 % of its off-state value"),
    ("vf_V", "V", "VF", "forward voltage: median on the IF plateau before the commutation"),
    ("vf_lsb_V", "V", "VF step", "quantisation step of the diode-voltage channel"),
    ("vfp_V", "V", "VFP", "peak forward voltage at the diode's turn-on (forward recovery)"),
    ("tfr_s", "s", "tfr",
     "forward recovery time: current through 10 % of IF to voltage below 1.1·VF"),
    ("overshoot_V", "V", "VRM−VR", "peak reverse voltage above the steady reverse voltage"),
    ("ring_amplitude_A", "A", "I(ring)",
     "largest current excursion after t2 from its settled level (snappiness.py)"),
    ("ring_frequency_Hz", "Hz", "f(ring)",
     "frequency of the current oscillation after t2, from its half-cycle peaks"),
    ("ring_decay_s", "s", "τ(ring)",
     "decay time constant of the oscillation's envelope after t2 (log-linear fit of its "
     "half-cycle peaks)"),
    ("vrm_dwell_s", "s", "VRM dwell",
     "time the reverse voltage stays within 2 % of VRM around its peak (a clamp holds)"),
)

#: The recovery time intervals each metric needs resolved (linear-interpolation timing
#: argument, :mod:`benchrun.analysis.resolution`):
#:
#: - ``irrm_A``: a peak whose far side is much steeper (a snap) falls between samples; the
#:   highest sample misses it by up to the fall slope × dt, relative error ≈ dt/ta.
#: - ``ta_s``, ``tb_s``, ``trr_s``: each end instant is known to about one sample interval.
#: - ``softness`` = tb/ta carries the errors of both.
#: - ``rrsf``: its denominator, the steepest slope after the peak (≈ Irrm/tb), is a slope
#:   across tb taken between samples.
#: - ``qrr_C``: trapezoids over t0 … t2 cut the peak's corner, an error of order
#:   Irrm·dt against Irrm·trr/2.
#: - ``err_J``, ``vrm_V``: the diode voltage builds up, and the stray-inductance overshoot
#:   Ls·|di/dt| occurs, while the current falls back during tb; over one or two
#:   samples the product v·i and the overshoot peak are not sampled.
#:
#: Absolute instants (``t0_s``, ``t_irrm_s``...) are off by at most about one sample whatever
#: the intervals, and ``didt_A_per_s`` is measured across the forward-current fall.
_INTERVALS: dict[str, tuple[str, ...]] = {
    "irrm_A": ("ta",),
    "ta_s": ("ta",),
    "tb_s": ("tb",),
    "trr_s": ("trr",),
    "softness": ("ta", "tb"),
    "rrsf": ("tb",),
    "qrr_C": ("trr",),
    "err_J": ("tb",),
    "vrm_V": ("tb",),
}

#: Metric key → :class:`MetricMeta`.
METRICS: dict[str, MetricMeta] = {
    k: MetricMeta(k, u, n, d, _INTERVALS.get(k, ())) for k, u, n, d in _TABLE
}


def meta(key: str) -> MetricMeta:
    """The :class:`MetricMeta` of ``key``; raises :class:`GradingError` for an unknown key."""
    try:
        return METRICS[key]
    except KeyError:
        known = ", ".join(METRICS)
        raise GradingError(f"unknown metric {key!r}; known metrics: {known}") from None


def unit_of(key: str) -> str:
    """SI unit symbol of a metric key."""
    return meta(key).unit


def display_name(key: str) -> str:
    """Short display name of a metric key."""
    return meta(key).name


def metrics_needing(intervals: Iterable[str]) -> tuple[str, ...]:
    """Metric keys (in table order) that need any of ``intervals`` (``"ta"``, ``"tb"``,
    ``"trr"``) resolved by the sampling: the metrics an under-sampled interval leaves
    unresolved."""
    wanted = set(intervals)
    return tuple(m.key for m in METRICS.values() if wanted.intersection(m.intervals))
