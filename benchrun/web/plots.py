"""PNG figures of the web pages, drawn with matplotlib as the report's figures are.

Markers follow the metric definitions (DESIGN §3): t0 the current zero crossing, Irrm the
reverse peak (plotted at ``-Irrm``: the diode current is positive anode → cathode), the trr
line through the ``fit_high·Irrm`` point of the falling tail extrapolated to zero at trr
(JESD282-B extrapolation), and t2 the integration end.
"""

from __future__ import annotations

import io
import math
import threading
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from benchrun.web.control import Limits, Signal

_LOCK = threading.Lock()  # matplotlib's font cache and text layout are not thread-safe
CURRENT = "#0b5d7a"
VOLTAGE = "#a4471c"
MARK = "#3b3b3b"
PEAK = "#b3261e"
LIMIT = "#b3261e"
ZONE = "#e9eef2"
_MAX_POINTS = 3000


def _png(fig: Figure) -> bytes:
    out = io.BytesIO()
    fig.savefig(out, format="png", dpi=110)
    return out.getvalue()


def _finite(x: Any) -> float | None:
    try:
        value = float(x)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def _time_unit(span: float) -> tuple[float, str]:
    for scale, unit in ((1e9, "ns"), (1e6, "µs"), (1e3, "ms")):
        if span * scale < 5000:
            return scale, unit
    return 1.0, "s"


def _crossing_after(t: np.ndarray, i: np.ndarray, after: float, level: float) -> float | None:
    """First instant after ``after`` where ``i`` rises through ``level`` (interpolated)."""
    idx = np.nonzero((t >= after) & (i >= level))[0]
    if idx.size == 0 or idx[0] == 0:
        return None
    k = int(idx[0])
    i0, i1 = i[k - 1], i[k]
    frac = 0.0 if i1 == i0 else (level - i0) / (i1 - i0)
    return float(t[k - 1] + frac * (t[k] - t[k - 1]))


def waveform_png(t: np.ndarray, v: np.ndarray, i: np.ndarray, markers: Mapping[str, Any],
                 title: str, *, fit_high: float = 0.9, width_in: float = 8.0,
                 height_in: float = 4.6) -> bytes:
    """Diode current (top) and voltage (bottom) through the recovery with its markers.

    ``markers`` holds absolute instants and levels: ``t0_s, t_irrm_s, irrm_A, t_trr_s,
    t2_s`` (any may be missing). Plots the window from before t0 to past t2, or the whole
    record when t0 is unknown.
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    i = np.asarray(i, dtype=float)
    t0, t2, ttrr = (_finite(markers.get(k)) for k in ("t0_s", "t2_s", "t_trr_s"))
    tirrm, irrm = _finite(markers.get("t_irrm_s")), _finite(markers.get("irrm_A"))
    if t0 is not None:
        end = t2 if t2 is not None else ttrr
        span = (end - t0) if end is not None and end > t0 else 200e-9
        sel = (t >= t0 - 1.2 * span) & (t <= t0 + 2.6 * span)
    else:
        sel = np.ones(t.size, dtype=bool)
    if np.count_nonzero(sel) < 2:
        sel = np.ones(t.size, dtype=bool)
    origin = t0 if t0 is not None else float(t[sel][0])
    tw, vw, iw = t[sel] - origin, v[sel], i[sel]
    if tw.size > _MAX_POINTS:
        step = int(np.ceil(tw.size / _MAX_POINTS))
        tw, vw, iw = tw[::step], vw[::step], iw[::step]
    scale, unit = _time_unit(float(tw[-1] - tw[0]) if tw.size else 1.0)
    with _LOCK:
        fig = Figure(figsize=(width_in, height_in), layout="constrained")
        ax_i, ax_v = fig.subplots(2, 1, sharex=True, height_ratios=(1.3, 1))
        fig.suptitle(title, fontsize=10, fontweight="bold")
        ax_i.plot(tw * scale, iw, color=CURRENT, lw=1.0)
        ax_v.plot(tw * scale, vw, color=VOLTAGE, lw=1.0)
        for ax in (ax_i, ax_v):
            ax.grid(True, lw=0.3, color="#c9ced3")
            ax.axhline(0.0, lw=0.5, color="#666666")
            ax.tick_params(labelsize=8)
        ax_i.set_ylabel("diode current (A)", fontsize=9)
        ax_v.set_ylabel("diode voltage (V)", fontsize=9)
        ax_v.set_xlabel(f"time from t0 ({unit})" if t0 is not None else f"time ({unit})",
                        fontsize=9)

        def rel(x: float | None) -> float | None:
            return None if x is None else (x - origin) * scale

        low = float(np.min(iw)) if iw.size else 0.0
        label_y = low * 0.3 if low < 0 else -1.0
        for name, when, style in (("t0", t0, ":"), ("trr", ttrr, "--"), ("t2", t2, "-.")):
            x = rel(when)
            if x is None:
                continue
            for ax in (ax_i, ax_v):
                ax.axvline(x, color=MARK, lw=0.8, ls=style)
            ax_i.annotate(name, (x, label_y), xytext=(3, 0), textcoords="offset points",
                          fontsize=8, color=MARK)
        if tirrm is not None and irrm is not None:
            x = rel(tirrm)
            ax_i.plot([x], [-irrm], marker="v", color=PEAK, ms=6, ls="none")
            ax_i.annotate(f"Irrm {irrm:.3g} A", (x, -irrm), xytext=(7, -3),
                          textcoords="offset points", fontsize=8, color=PEAK)
            level = -fit_high * irrm
            t_hi = _crossing_after(t, i, tirrm, level)
            if ttrr is not None and t_hi is not None:
                ax_i.plot([rel(t_hi), rel(ttrr)], [level, 0.0], color=PEAK, lw=0.9, ls="--",
                          label="trr line")
        if tw.size:
            ax_i.set_xlim(tw[0] * scale, tw[-1] * scale)
        return _png(fig)


def control_png(labels: Sequence[str], values: Sequence[float], limits: Limits | None,
                signals: Sequence[Signal], title: str, unit_scale: float, unit: str, *,
                width_in: float = 8.0, height_in: float = 2.8) -> bytes:
    """An individuals control chart: the values in time order, the centre line, the 1, 2
    and 3 sigma zones, the baseline span, and each point breaking a Nelson rule in red."""
    xs = np.arange(len(values))
    ys = np.asarray(values, dtype=float) * unit_scale
    with _LOCK:
        fig = Figure(figsize=(width_in, height_in), layout="constrained")
        ax = fig.add_subplot(1, 1, 1)
        ax.set_title(title, fontsize=9.5, loc="left")
        if limits is not None:
            c, s = limits.centre * unit_scale, limits.sigma * unit_scale
            ax.axhspan(c - s, c + s, color=ZONE, lw=0)
            ax.axhline(c, color=MARK, lw=0.9)
            for k, style in ((2, ":"), (3, "--")):
                ax.axhline(c + k * s, color=LIMIT if k == 3 else MARK, lw=0.8, ls=style)
                ax.axhline(c - k * s, color=LIMIT if k == 3 else MARK, lw=0.8, ls=style)
            ax.axvspan(-0.5, limits.baseline - 0.5, color="#f6f1df", lw=0, zorder=0)
        ax.plot(xs, ys, color=CURRENT, lw=0.9, marker="o", ms=3)
        flagged = sorted({sig.index for sig in signals})
        if flagged:
            ax.plot(xs[flagged], ys[flagged], ls="none", marker="o", ms=6, mfc="none",
                    mec=PEAK, mew=1.5)
        ax.set_ylabel(unit, fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, lw=0.3, color="#c9ced3")
        if len(labels) <= 30:
            ax.set_xticks(xs, list(labels), rotation=45, ha="right", fontsize=6.5)
        else:
            ax.set_xlabel("lot, in time order", fontsize=8)
        return _png(fig)


def live_png(last: Mapping[str, Any]) -> bytes:
    """The live page's last waveform, from the thinned copy the runner published."""
    return waveform_png(np.asarray(last.get("t", [])), np.asarray(last.get("v", [])),
                        np.asarray(last.get("i", [])), last.get("markers") or {},
                        f"{last.get('serial', '')}  {last.get('label', '')}",
                        width_in=7.0, height_in=4.0)
