"""Reverse-recovery metrics of a power diode from a double-pulse capture.

Definitions (all results positive magnitudes, SI units; times by linear interpolation):

- ``if_A``: forward current on the plateau just before the commutation (median).
- ``t0_s``: falling zero crossing of the current at the commutation.
- ``irrm_A``: peak reverse current, ``-min(i)`` during the recovery.
- ``ta_s``: time from t0 to the current minimum.
- ``trr_s``: t0 to the zero crossing of the straight line through the points where the current,
  after its minimum, rises through ``-fit_high·Irrm`` and ``-fit_low·Irrm`` (0.9 / 0.25 by
  default). This is alternative 2 of the JEDEC dictionary's "reverse recovery time (trr)"
  (JESD282-B; its note: IEC 60747-2 has alternatives 2 and 3), the extrapolated current
  reaching zero, "with respect to specified points A and B": the standard leaves the points
  to the test specification. The defaults are the design's choice (from memory of IEC 60747-2
  practice); specifications that use 0.75 / 0.50 set ``fit_high`` / ``fit_low``. With
  ``trr_method="threshold"`` the end is the instant the current rises through
  ``-trr_threshold_fraction·Irrm``: alternative 3 of the same definition, "the reverse current
  reaches a specified low value IR(REC)".
- ``tb_s = trr - ta`` and ``softness = tb / ta``.
- ``rrsf``: reverse-recovery softness factor in the JEDEC (JESD24 / JESD282 style) sense,
  ``|di/dt at t0| / |steepest di/dt after the minimum|``; both slopes by least squares
  (:func:`benchrun.analysis.quality.rrsf_slopes`: at t0 over the samples between
  ``±0.5·min(IF, Irrm)``, after the minimum the largest slope over a sliding window).
- ``qrr_C``: ``-∫ i dt`` from t0 to t2, t2 being the first instant after the minimum at which
  the current rises through ``-integration_end_fraction·Irrm`` (2 % by default, the integration
  end used in IEC 60747-9 practice).
- ``err_J``: ``∫ v·i dt`` over the same interval (energy dissipated in the diode).
- ``didt_A_per_s``: ``(0.5·IF + 0.5·Irrm) / (t_b - t_a)``, t_a the falling crossing of
  ``+0.5·IF``, t_b that of ``-0.5·Irrm``.
- ``vrm_V``: peak reverse voltage ``max(-v)`` from t0 until the reverse voltage has settled:
  to the end of the VR window, ``t2 + trr + max(5·(t2 − t0), 32 samples)``.
- ``vr_V``: steady reverse voltage over ``t2 + trr`` … the end of that window (mean of ``-v``
  within 4σ of its median).
- Qrr / Err window conventions (``integration_window``): see
  :mod:`benchrun.analysis.conventions`. Offsets: :mod:`benchrun.analysis.baseline`; capture
  uncertainty ``u``: :mod:`benchrun.analysis.capture_uncertainty`; flags:
  :mod:`benchrun.analysis.quality`.

Measurement approach (see :mod:`benchrun.analysis.events`): the event is located on a coarse
strided pass over the whole record; the metrics are measured on a window around it. On noisy
data a light centred moving average (width ≈ 1/10 of the forward-current fall, ≤ 31 samples)
is used only to *locate* crossings and the minimum; values are measured on the raw samples by
least-squares lines / parabolas through the samples inside the noise band. On clean data the
estimators are plain interpolation and plain sample extrema.

Ringing after the peak: the trr crossings and t2 are the *first* rising crossings after the
minimum, so later ringing cycles never move them; VRM includes the ringing up to the end of
the VR window (as defined above). A non-uniform time array (a variable-step simulator's output) is
resampled onto a uniform grid for the event location and crossings; Qrr and Err are then the
exact trapezoidal integrals over the given points.

Sampling: when ta, tb or trr spans fewer than 10 sample intervals (for a non-uniform
record, steps of the grid it is measured on) the values are still reported, but the result
carries the flag ``undersampled_recovery: <interval> spans <n> samples (need >= 10); not
resolved: <metric keys>`` (the count and its sources in :mod:`benchrun.analysis.resolution`).
It only warns. ``few_samples_in_ta`` (same count, ta only) is kept as it was.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any

import numpy as np

from benchrun.analysis import baseline as bl
from benchrun.analysis import events as ev
from benchrun.analysis.flags import (  # noqa: F401  (names importable from here)
    FLAG_FEW_SAMPLES_TA,
    FLAG_INCOMPLETE,
    FLAG_LOW_SNR,
    FLAG_NEAR_END,
    FLAG_RRSF,
    FLAG_SHORT_PLATEAU,
    FLAG_TRR_LINE,
    FLAG_TRR_NOT_FOUND,
    FLAG_VR,
)
from benchrun.analysis.measure import MIN_SAMPLES_IN_TA, measure_plateau_end
from benchrun.analysis.resolution import FLAG_UNDERSAMPLED
from benchrun.analysis.timebase import (
    MAX_RESAMPLED,
    MIN_RESAMPLED,
    MIN_SAMPLES,
    UNIFORM_TOLERANCE,
    TimeBase,
    event_step,
    uniform_grid,
    validate_record,
)
from benchrun.errors import ConfigError, NoEventError

#: A record whose negated current holds a level with more than this many times the charge
#: (level × duration) of any positive level is taken as a reversed current probe: a freewheel
#: plateau carries far more charge than the recovery's reverse peak (common practice).
REVERSED_AREA_RATIO = 2.0

#: Fields of :class:`RecoveryMetrics` that are not metric values.
NON_METRIC_FIELDS = ("flags", "u", "corrections")
#: Qrr / Err window conventions (:class:`RecoveryOptions`).
INTEGRATION_WINDOWS = ("fraction", "trr_end", "triangle")

# Names importable from here (input limits live in timebase.py, the sampling check in
# resolution.py).
__all__ = [
    "FLAG_UNDERSAMPLED", "MAX_RESAMPLED", "MIN_RESAMPLED", "MIN_SAMPLES", "MIN_SAMPLES_IN_TA",
    "UNIFORM_TOLERANCE", "RecoveryMetrics", "RecoveryOptions", "analyze_recovery",
]


@dataclass(frozen=True)
class RecoveryOptions:
    """How the recovery is measured (every fraction is printed on the report).

    Attributes
    ----------
    fit_high, fit_low
        Fractions of Irrm defining the trr extrapolation line, points A and B of the JEDEC
        definition (JESD282-B, alternative 2; the values are the test specification's: 0.9
        and 0.25 by default, from memory of IEC 60747-2 practice).
    trr_method
        ``"extrapolate"`` (line through the two points) or ``"threshold"`` (current rises
        through ``-trr_threshold_fraction·Irrm``).
    trr_threshold_fraction
        End criterion of the threshold method, IR(REC) / Irrm of the JEDEC definition
        (JESD282-B, alternative 3: "a specified low value"; 0.25 by default, common practice
        — set it to the value of the test specification).
    integration_end_fraction
        Qrr / Err integration end, fraction of Irrm (0.02, IEC 60747-9 practice).
    commutation
        Which current reversal of the record to analyse (0 = first, -1 = last).
    lowpass_hz
        Optional zero-phase low-pass cut-off applied to the analysis window.
    integration_window
        Qrr / Err window convention: ``"fraction"`` (t0 to the return through
        ``integration_end_fraction·Irrm``, default), ``"trr_end"`` (t0 to the trr end) or
        ``"triangle"`` (``Qrr = ½·Irrm·trr``; Err to the trr end).
    current_rise_time_s, voltage_rise_time_s
        10-90 % rise time of each channel's measurement chain (probe and scope; about
        0.35 / bandwidth), recorded in ``corrections``; used for ``rise_time_limited``.
    deskew_tolerance_s
        How far the reverse voltage may reach VR before the current peak before the result is
        flagged ``deskew_suspect`` (1 ns by default, common practice).
    """

    fit_high: float = 0.9
    fit_low: float = 0.25
    trr_method: str = "extrapolate"
    trr_threshold_fraction: float = 0.25
    integration_end_fraction: float = 0.02
    commutation: int = -1
    lowpass_hz: float | None = None
    integration_window: str = "fraction"
    current_rise_time_s: float | None = None
    voltage_rise_time_s: float | None = None
    deskew_tolerance_s: float = 1e-9

    def __post_init__(self) -> None:
        if self.integration_window not in INTEGRATION_WINDOWS:
            raise ConfigError(
                f"integration_window must be one of {', '.join(INTEGRATION_WINDOWS)}, "
                f"got {self.integration_window!r}", field="integration_window")
        for name in ("current_rise_time_s", "voltage_rise_time_s", "deskew_tolerance_s"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value >= 0):
                raise ConfigError(f"must be a time >= 0, got {value!r}", field=name)
        if not 0.0 < self.fit_low < self.fit_high < 1.0:
            raise ConfigError(
                f"need 0 < fit_low < fit_high < 1, got {self.fit_low} and {self.fit_high}",
                field="fit_low/fit_high",
            )
        if self.trr_method not in ("extrapolate", "threshold"):
            raise ConfigError(
                f"trr_method must be 'extrapolate' or 'threshold', got {self.trr_method!r}",
                field="trr_method",
            )
        for name in ("trr_threshold_fraction", "integration_end_fraction"):
            value = getattr(self, name)
            if not 0.0 < value < 1.0:
                raise ConfigError(f"must be between 0 and 1, got {value!r}", field=name)
        if self.lowpass_hz is not None and not (
            math.isfinite(self.lowpass_hz) and self.lowpass_hz > 0
        ):
            raise ConfigError(f"must be a positive frequency, got {self.lowpass_hz!r}",
                              field="lowpass_hz")


@dataclass(frozen=True)
class RecoveryMetrics:
    """Result of :func:`analyze_recovery` (SI units; ``None`` where not found)."""

    if_A: float | None
    t0_s: float | None
    irrm_A: float | None
    ta_s: float | None
    tb_s: float | None
    trr_s: float | None
    softness: float | None
    rrsf: float | None
    qrr_C: float | None
    err_J: float | None
    didt_A_per_s: float | None
    vrm_V: float | None
    vr_V: float | None
    t_irrm_s: float | None
    t_trr_s: float | None
    t2_s: float | None
    flags: tuple[str, ...] = field(default=())
    u: Mapping[str, float | None] = field(default_factory=dict, compare=False)
    corrections: Mapping[str, Any] = field(default_factory=dict, compare=False)

    def to_dict(self) -> dict[str, Any]:
        """Numeric keys, ``flags`` as a list, ``u`` (metric key → standard uncertainty from
        the capture, SI) and ``corrections`` (offsets, deskew, conventions) (JSON-ready)."""
        data = asdict(self)
        data["flags"] = list(self.flags)
        data["u"] = dict(self.u)
        data["corrections"] = dict(self.corrections)
        return data

    @classmethod
    def metric_keys(cls) -> tuple[str, ...]:
        """The numeric keys, in field order."""
        return tuple(f.name for f in fields(cls) if f.name not in NON_METRIC_FIELDS)


def analyze_recovery(
    t: np.ndarray | float | None,
    v: np.ndarray,
    i: np.ndarray,
    options: RecoveryOptions | None = None,
    *,
    dt: float | None = None,
    t_start: float = 0.0,
) -> RecoveryMetrics:
    """Find the diode's reverse-recovery event in a record and measure it.

    Parameters
    ----------
    t
        Sample times [s], strictly increasing, uniform or not (variable-step simulator
        output is resampled, see the module docstring); or the sample interval [s] as a
        scalar, with ``t_start``; or ``None`` with ``dt`` and ``t_start``.
    v
        Anode-to-cathode voltage [V].
    i
        Forward current [A], anode → cathode positive.
    options
        :class:`RecoveryOptions`; defaults per IEC 60747-2 / IEC 60747-9 practice.
    dt, t_start
        Sample interval and time of the first sample when ``t`` is None.

    Returns
    -------
    RecoveryMetrics
        Definitions in the module docstring; ``flags`` say what makes a value untrustworthy.

    Raises
    ------
    InputDataError
        Arrays of the wrong shape, too short, non-finite, or time not increasing.
    NoEventError
        No forward-current plateau followed by a current reversal in the record, or a
        current that looks reversed (a negative level held far longer than any positive).
    """
    opts = options or RecoveryOptions()
    v, i, timebase = validate_record(t, v, i, dt, t_start)
    if not timebase.uniform:
        return _analyze_nonuniform(timebase.t, v, i, opts)
    return _analyze_record(v, i, timebase, opts)


def _analyze_nonuniform(t: np.ndarray, v: np.ndarray, i: np.ndarray,
                        opts: RecoveryOptions) -> RecoveryMetrics:
    """Variable-step record (a circuit simulator's output): resampled onto a uniform grid.

    Event location and the crossings work on the grid (linear interpolation between the
    given points, as a simulator's own measurements do); where the grid is coarse for the
    recovery found, the record is analysed again on a finer one
    (:func:`benchrun.analysis.timebase.event_step`). Qrr and Err are then the exact
    trapezoidal integrals over the given points between t0 and t2. ``few_samples_in_ta``
    counts the given points; ``undersampled_recovery`` counts the grid's steps: the record
    is the piecewise-linear waveform its points define (a variable-step simulator places
    them by its local-truncation-error control, Nagel's SPICE2 (1975), from memory), so only
    the grid it is measured on can under-sample it (when the point budget caps the grid).
    """

    def on_grid(step: float) -> RecoveryMetrics:
        grid = t[0] + step * np.arange(math.floor((t[-1] - t[0]) / step) + 1, dtype=np.float64)
        v_u = np.interp(grid, t, np.asarray(v, dtype=np.float64))
        i_u = np.interp(grid, t, np.asarray(i, dtype=np.float64))
        return _analyze_record(v_u, i_u, TimeBase(None, step, float(t[0])), opts)

    step, _ = uniform_grid(t)
    m = on_grid(step)
    end = m.t_trr_s if m.t_trr_s is not None else m.t2_s
    if m.t0_s is not None and m.t_irrm_s is not None and end is not None:
        shortest = min(m.t_irrm_s - m.t0_s, end - m.t_irrm_s)
        fine = event_step(t, m.t_irrm_s, end, max(shortest, 0.0), step)
        if fine is not None:
            m = on_grid(fine)
    changes: dict[str, Any] = {}
    flags = [f for f in m.flags if f != FLAG_FEW_SAMPLES_TA]
    if m.t0_s is not None and m.t_irrm_s is not None:
        a, b = np.searchsorted(t, [m.t0_s, m.t_irrm_s])
        if b - a < MIN_SAMPLES_IN_TA:
            flags.append(FLAG_FEW_SAMPLES_TA)
    if m.qrr_C is not None and m.t0_s is not None and m.t2_s is not None:
        a = max(0, int(np.searchsorted(t, m.t0_s)) - 1)
        b = min(t.size, int(np.searchsorted(t, m.t2_s)) + 1)
        tw = t[a : b + 1]
        iw = np.asarray(i[a : b + 1], dtype=np.float64)
        vw = np.asarray(v[a : b + 1], dtype=np.float64)
        changes["qrr_C"] = -ev.integrate(tw, iw, m.t0_s, m.t2_s)
        changes["err_J"] = ev.integrate(tw, vw * iw, m.t0_s, m.t2_s)
    return replace(m, flags=tuple(flags), **changes)


def _analyze_record(v: np.ndarray, i: np.ndarray, timebase: TimeBase,
                    opts: RecoveryOptions) -> RecoveryMetrics:
    """Locate the commutation asked for and measure it."""
    scan = ev.scan_plateaus(i)
    plateaus = scan.plateaus
    if scan.reverse_area > REVERSED_AREA_RATIO * scan.area:
        raise NoEventError(
            f"the current looks reversed: it holds about {-scan.reverse_level:.4g} A far longer "
            "than any positive level (check the current probe's direction: forward current "
            "anode → cathode must be positive; or remove a large negative offset)"
        )
    if not plateaus:
        raise NoEventError(
            "no forward-current plateau in the record (is the current anode → cathode positive?)"
        )
    first_start = plateaus[0].start
    zeros = bl.zeros(i, v, first_start)
    candidates = [p for p in plateaus if p.ends_in_record]
    if not candidates:
        raise NoEventError("the forward current never commutates before the record ends")
    wanted = opts.commutation if opts.commutation >= 0 else -opts.commutation - 1
    ordered = candidates if opts.commutation >= 0 else candidates[::-1]
    found = 0
    refused: NoEventError | None = None
    for plateau in ordered:
        try:
            values = measure_plateau_end(plateau, v, i, timebase, opts, zeros)
        except NoEventError as exc:  # not a diode commutation (or noise): try the others
            refused = refused or exc
            continue
        if values is None:
            continue
        if found == wanted:
            return RecoveryMetrics(**values)
        found += 1
    if found:
        raise NoEventError(
            f"commutation {opts.commutation} requested but the record holds only {found}"
        )
    if refused is not None:
        raise refused
    raise NoEventError("the forward current falls but never reverses: no recovery event")


