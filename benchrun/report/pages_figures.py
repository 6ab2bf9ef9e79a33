"""The report's figures: recovery waveforms, metric distributions, temperature trends.

Every function takes plain numbers (SI units) and returns a matplotlib ``Figure`` built without
pyplot; :class:`benchrun.report.pages_vector.FigureFlowable` draws it into the PDF as vectors.
Markers follow the metric definitions of DESIGN §3 (IEC 60747-2 style trr extrapolation):
t0 the current zero crossing, Irrm the reverse peak, trr where the straight line through the
0.9·Irrm and 0.25·Irrm points crosses zero, t2 the integration end.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from matplotlib.figure import Figure

from benchrun.report.facts import WaveformMarks
from benchrun.report.pages_style import PLOT_CURRENT, PLOT_LIMIT, PLOT_MARK, PLOT_VOLTAGE
from benchrun.report.pages_vector import finite, new_figure, nice_unit_scale

_TEMPERATURE_COLOURS = ("#1f4e79", "#b8651b", "#2e7d32", "#6a3d9a", "#8c564b", "#d62728")
#: The names of those colours, in the same order, for captions.
COLOUR_NAMES = ("blue", "orange", "green", "purple", "brown", "red")
_MAX_POINTS = 4000  # a plotted trace never needs more points than this on an A4 page


def _decimate(t: np.ndarray, *ys: np.ndarray) -> tuple[np.ndarray, ...]:
    """Min/max decimation keeps peaks (Irrm, overshoot) visible with few points."""
    n = t.size
    if n <= _MAX_POINTS:
        return (t, *ys)
    step = int(np.ceil(n / (_MAX_POINTS / 2)))
    m = (n // step) * step
    t_out = np.repeat(t[:m].reshape(-1, step)[:, 0], 2)
    outs = []
    for y in ys:
        blocks = y[:m].reshape(-1, step)
        pair = np.empty((blocks.shape[0], 2))
        lo_first = np.argmin(blocks, axis=1) < np.argmax(blocks, axis=1)
        pair[:, 0] = np.where(lo_first, blocks.min(axis=1), blocks.max(axis=1))
        pair[:, 1] = np.where(lo_first, blocks.max(axis=1), blocks.min(axis=1))
        outs.append(pair.ravel())
    return (t_out, *outs)


def _rise_through(t: np.ndarray, i: np.ndarray, after: float, level: float) -> float | None:
    """First instant after ``after`` at which ``i`` rises through ``level`` (interpolated)."""
    idx = np.nonzero(t >= after)[0]
    if idx.size < 2:
        return None
    seg = i[idx]
    above = np.nonzero(seg >= level)[0]
    if above.size == 0 or above[0] == 0:
        return None
    k = idx[above[0]]
    i0, i1 = i[k - 1], i[k]
    frac = 0.0 if i1 == i0 else (level - i0) / (i1 - i0)
    return float(t[k - 1] + frac * (t[k] - t[k - 1]))


def recovery_window(marks: WaveformMarks, t: np.ndarray) -> tuple[float, float]:
    """Time window around the recovery: from before t0 to past t2 (whole record if unknown)."""
    if marks.t0_s is None:
        return float(t[0]), float(t[-1])
    end = marks.t2_s if marks.t2_s is not None else marks.t_trr_s
    span = (end - marks.t0_s) if end is not None and end > marks.t0_s else 200e-9
    return marks.t0_s - 1.2 * span, marks.t0_s + 2.6 * span


def waveform_figure(
    t: np.ndarray,
    v: np.ndarray,
    i: np.ndarray,
    marks: WaveformMarks,
    title: str,
    *,
    width_pt: float = 470,
    height_pt: float = 300,
) -> Figure:
    """Current (top) and voltage (bottom) through the recovery, with t0, Irrm, trr, t2 marked.

    Parameters
    ----------
    t, v, i
        Time (s), anode-cathode voltage (V), forward current (A), all the same length.
    marks
        From the analysis of this very shot.
    title
        Shown above the plots (device, temperature, shot).
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    i = np.asarray(i, dtype=float)
    lo, hi = recovery_window(marks, t)
    sel = (t >= lo) & (t <= hi)
    if np.count_nonzero(sel) < 2:
        sel = np.ones_like(t, dtype=bool)
    origin = marks.t0_s if marks.t0_s is not None else float(t[sel][0])
    tw, vw, iw = _decimate((t[sel] - origin), v[sel], i[sel])
    t_scale, t_unit = nice_unit_scale(np.array([tw[0], tw[-1]]), "s")

    fig = new_figure(width_pt, height_pt, left=46, right=10, bottom=30, top=22, hspace_pt=10)
    ax_i, ax_v = fig.subplots(2, 1, sharex=True, height_ratios=(1.25, 1))
    fig.suptitle(title, fontsize=9.5, fontweight="bold", y=1 - 4 / height_pt, va="top")
    ax_i.plot(tw * t_scale, iw, color=PLOT_CURRENT, lw=0.9, label="diode current i")
    ax_v.plot(tw * t_scale, vw, color=PLOT_VOLTAGE, lw=0.9, label="diode voltage v")
    for ax in (ax_i, ax_v):
        ax.grid(True, lw=0.3, color="#c8ccd0")
        ax.axhline(0.0, lw=0.5, color="#555555")
        ax.tick_params(labelsize=7)
    ax_i.set_ylabel("current (A)", fontsize=8)
    ax_v.set_ylabel("voltage (V)", fontsize=8)
    ax_v.set_xlabel(f"time from t0 ({t_unit})", fontsize=8)

    def rel(x: float | None) -> float | None:
        return None if x is None else (x - origin) * t_scale

    ymin = float(np.min(iw)) if iw.size else 0.0
    label_y = ymin * 0.35 if ymin < 0 else -1.0
    for name, when, style in (
        ("t0", rel(marks.t0_s), ":"),
        ("trr", rel(marks.t_trr_s), "--"),
        ("t2", rel(marks.t2_s), "-."),
    ):
        if when is None:
            continue
        for ax in (ax_i, ax_v):
            ax.axvline(when, color=PLOT_MARK, lw=0.8, ls=style)
        ax_i.annotate(name, (when, label_y), xytext=(3, 0), textcoords="offset points",
                      fontsize=7.5, color=PLOT_MARK)
    if marks.t_irrm_s is not None and marks.irrm_A is not None:
        x = rel(marks.t_irrm_s)
        ax_i.plot([x], [-marks.irrm_A], marker="v", color=PLOT_LIMIT, ms=5, ls="none")
        ax_i.annotate(f"Irrm = {marks.irrm_A:.3g} A", (x, -marks.irrm_A), xytext=(6, -2),
                      textcoords="offset points", fontsize=7.5, color=PLOT_LIMIT)
        # the trr extrapolation line: from the fit_high·Irrm point to the zero crossing at trr
        level = -marks.fit_high * marks.irrm_A
        t_hi = _rise_through(t, i, marks.t_irrm_s, level)
        if marks.t_trr_s is not None and t_hi is not None:
            ax_i.plot([rel(t_hi), rel(marks.t_trr_s)], [level, 0.0], color=PLOT_MARK, lw=0.7,
                      ls="--")
    if marks.vrm_V is not None:
        ax_v.axhline(-marks.vrm_V, color=PLOT_LIMIT, lw=0.6, ls=":")
        ax_v.annotate(f"VRM = {marks.vrm_V:.4g} V", (tw[0] * t_scale, -marks.vrm_V),
                      xytext=(2, 3), textcoords="offset points", fontsize=7, color=PLOT_LIMIT)
    ax_i.set_xlim(tw[0] * t_scale, tw[-1] * t_scale)
    return fig


def distribution_figure(
    label: str,
    unit: str,
    groups: Mapping[str, Sequence[float | None]],
    limits: Mapping[str, tuple[float | None, float | None]],
    *,
    width_pt: float = 230,
    height_pt: float = 150,
) -> Figure:
    """Histogram of one metric, one colour per test condition, with its limits drawn.

    Parameters
    ----------
    label, unit
        Metric name and SI unit (values are scaled to a readable prefix).
    groups
        Condition label (e.g. ``"25 °C"``) → values.
    limits
        Condition label → (min, max) limit, ``None`` where there is none.
    """
    # the legend sits in its own band above the axes: it never covers bars or limit labels
    fig = new_figure(width_pt, height_pt, left=38, right=8, bottom=28, top=34)
    ax = fig.add_subplot(1, 1, 1)
    every = [finite(vals) for vals in groups.values()]
    extra = [x for pair in limits.values() for x in pair if x is not None]
    all_values = np.concatenate([*every, np.array(extra, dtype=float)]) if every else np.array([])
    scale, shown = nice_unit_scale(all_values, unit)
    data_values = np.concatenate(every) if every else np.array([])
    if data_values.size:
        lo = float(np.min(all_values)) * scale
        hi = float(np.max(all_values)) * scale
        if hi <= lo:
            lo, hi = lo - 1.0, hi + 1.0
        bins = np.linspace(lo, hi, 26)
        for k, (name, vals) in enumerate(zip(groups, every, strict=True)):
            if vals.size:
                ax.hist(vals * scale, bins=bins, histtype="stepfilled", alpha=0.45,
                        color=_TEMPERATURE_COLOURS[k % len(_TEMPERATURE_COLOURS)],
                        edgecolor=_TEMPERATURE_COLOURS[k % len(_TEMPERATURE_COLOURS)],
                        lw=0.8, label=f"{name} (n={vals.size})")
    else:
        ax.text(0.5, 0.5, "no values", ha="center", va="center", transform=ax.transAxes,
                fontsize=8)
    names = list(groups) or list(limits)
    top = ax.get_ylim()[1]
    ax.set_ylim(0, top * 1.18 + 0.5)  # headroom above the bars for the limit labels
    for name, (lo_lim, hi_lim) in limits.items():
        k = names.index(name) if name in names else 0
        colour = _TEMPERATURE_COLOURS[k % len(_TEMPERATURE_COLOURS)]
        for value, word in ((lo_lim, "min"), (hi_lim, "max")):
            if value is None:
                continue
            ax.axvline(value * scale, color=PLOT_LIMIT, lw=1.0, ls="--")
            # the label goes on the side of the line that has room inside the axes
            right = value * scale > sum(ax.get_xlim()) / 2
            ax.annotate(f"{word} {name}", (value * scale, 1.0), xycoords=("data", "axes fraction"),
                        xytext=(-2 if right else 2, -8 - 8 * k), textcoords="offset points",
                        fontsize=6, color=colour, ha="right" if right else "left", va="top",
                        bbox={"boxstyle": "square,pad=0.1", "fc": "white", "ec": "none"})
    ax.set_xlabel(shown, fontsize=7.5)
    ax.set_ylabel("devices", fontsize=7.5)
    ax.tick_params(labelsize=6.5)
    ax.grid(True, lw=0.3, color="#dddddd")
    if any(v.size for v in every):
        ax.legend(fontsize=6, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0),
                  ncols=max(len(groups), 1), borderaxespad=0.2, handlelength=1.2)
    fig.text(1 - 8 / width_pt, 1 - 3 / height_pt, label, fontsize=8.5, ha="right", va="top")
    return fig


def trend_figure(
    label: str,
    unit: str,
    per_device: Mapping[str, Sequence[tuple[float, float]]],
    *,
    width_pt: float = 230,
    height_pt: float = 150,
) -> Figure:
    """A metric against test temperature: one thin line per device, the lot mean in bold.

    Parameters
    ----------
    per_device
        Serial → list of (temperature in K, value in SI units).
    """
    fig = new_figure(width_pt, height_pt, left=38, right=8, bottom=28, top=30)
    ax = fig.add_subplot(1, 1, 1)
    values = finite(v for pts in per_device.values() for _, v in pts)
    scale, shown = nice_unit_scale(values, unit)
    by_temp: dict[float, list[float]] = {}
    xs: list[float] = []
    ys: list[float] = []
    for points in per_device.values():
        pts = sorted((t, v) for t, v in points if v is not None and np.isfinite(v))
        if not pts:
            continue
        # every device's line in one polyline, separated by NaN: one artist for the whole lot
        xs += [t - 273.15 for t, _ in pts] + [np.nan]
        ys += [v * scale for _, v in pts] + [np.nan]
        for t, v in pts:
            by_temp.setdefault(round(t, 1), []).append(v)
    if xs:
        few = len(per_device) <= 60
        ax.plot(xs, ys, color="#9aa3ad", lw=0.4, marker="." if few else None, ms=2,
                label=f"devices (n={len(per_device)})")
    if by_temp:
        temps = sorted(by_temp)
        ax.plot([t - 273.15 for t in temps], [np.mean(by_temp[t]) * scale for t in temps],
                color=PLOT_CURRENT, lw=1.6, marker="o", ms=3.5, label="lot mean")
        ax.legend(fontsize=6, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0),
                  ncols=2, borderaxespad=0.2, handlelength=1.5)
    fig.text(1 - 8 / width_pt, 1 - 3 / height_pt, f"{label} against temperature",
             fontsize=8.5, ha="right", va="top")
    ax.set_xlabel("temperature (°C)", fontsize=7.5)
    ax.set_ylabel(shown, fontsize=7.5)
    ax.tick_params(labelsize=6.5)
    ax.grid(True, lw=0.3, color="#dddddd")
    return fig


def temperature_log_figure(
    shots: Sequence[tuple[int, float | None, float]],
    *,
    width_pt: float = 470,
    height_pt: float = 140,
) -> Figure:
    """Measured device temperature for every shot in firing order, against the set point.

    Parameters
    ----------
    shots
        (shot number, measured temperature K or None, requested temperature K).
    """
    fig = new_figure(width_pt, height_pt, left=44, right=10, bottom=28, top=20)
    ax = fig.add_subplot(1, 1, 1)
    order = [n for n, _, _ in shots]
    measured = [np.nan if m is None else m - 273.15 for _, m, _ in shots]
    requested = [r - 273.15 for _, _, r in shots]
    ax.step(order, requested, where="mid", color=PLOT_LIMIT, lw=0.8, ls="--", label="set point")
    ax.plot(order, measured, ls="none", marker=".", ms=2.5, color=PLOT_CURRENT,
            label="measured")
    ax.set_xlabel("shot (firing order)", fontsize=7.5)
    ax.set_ylabel("temperature (°C)", fontsize=7.5)
    ax.tick_params(labelsize=6.5)
    ax.grid(True, lw=0.3, color="#dddddd")
    ax.legend(fontsize=6.5, frameon=False, ncols=2, loc="lower left", bbox_to_anchor=(0.0, 1.0),
              borderaxespad=0.2)
    return fig
