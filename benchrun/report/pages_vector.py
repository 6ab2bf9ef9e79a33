"""Draw matplotlib figures straight onto a reportlab canvas, as vector graphics.

:class:`FigureFlowable` is a platypus flowable; when reportlab lays it out on a page it hands
the figure a small matplotlib renderer (:class:`CanvasRenderer`) that turns every path into
PDF path operators and every text into PDF text in the report's own embedded font. Nothing is
rasterised, nothing passes through an intermediate file, and the plot's lettering matches the
body text. Figures must not use images (``imshow``) or mathtext; plain Unicode labels work.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib.backend_bases import GraphicsContextBase, RendererBase
from matplotlib.figure import Figure
from matplotlib.path import Path as MplPath
from reportlab.pdfbase import pdfmetrics
from reportlab.platypus import Flowable

from benchrun.report.pages_style import FONT_BOLD, FONT_REGULAR, register_fonts

_CAPS = {"butt": 0, "round": 1, "projecting": 2}
_JOINS = {"miter": 0, "round": 1, "bevel": 2}


def _font_for(prop: Any) -> str:
    weight = prop.get_weight()
    bold = weight in ("bold", "heavy", "extra bold", "black", "semibold", "demibold") or (
        isinstance(weight, int | float) and weight >= 600
    )
    return FONT_BOLD if bold else FONT_REGULAR


def _plain(text: str) -> str:
    """Text without mathtext dollar signs (figures here use plain Unicode)."""
    return text.replace("$", "")


class CanvasRenderer(RendererBase):
    """A matplotlib renderer writing to a reportlab canvas (72 dpi: 1 pixel = 1 point)."""

    def __init__(self, canvas: Any, width: float, height: float) -> None:
        super().__init__()
        self.canvas = canvas
        self.width = width
        self.height = height

    # --- geometry and metrics -------------------------------------------------------------
    def flipy(self) -> bool:
        return False

    def get_canvas_width_height(self) -> tuple[float, float]:
        return self.width, self.height

    def points_to_pixels(self, points: float) -> float:
        return points

    def get_text_width_height_descent(self, s: str, prop: Any, ismath: Any) -> tuple:
        font = _font_for(prop)
        size = prop.get_size_in_points()
        text = _plain(s)
        width = pdfmetrics.stringWidth(text, font, size)
        face = pdfmetrics.getFont(font).face
        ascent = face.ascent * size / 1000.0
        descent = -face.descent * size / 1000.0
        return width, ascent + descent, descent

    def new_gc(self) -> GraphicsContextBase:
        return GraphicsContextBase()

    # --- state helpers --------------------------------------------------------------------
    def _apply_clip(self, gc: GraphicsContextBase) -> None:
        canvas = self.canvas
        rect = gc.get_clip_rectangle()
        if rect is not None:
            x0, y0, w, h = rect.bounds
            path = canvas.beginPath()
            path.rect(x0, y0, w, h)
            canvas.clipPath(path, stroke=0, fill=0)
        clip_path, clip_transform = gc.get_clip_path()
        if clip_path is not None:
            path = canvas.beginPath()
            self._trace(path, clip_path, clip_transform)
            canvas.clipPath(path, stroke=0, fill=0)

    def _stroke_style(self, gc: GraphicsContextBase) -> bool:
        canvas = self.canvas
        width = gc.get_linewidth()
        rgba = gc.get_rgb()
        alpha = gc.get_alpha() if gc.get_forced_alpha() else rgba[3]
        if width <= 0 or alpha <= 0:
            return False
        canvas.setLineWidth(width)
        canvas.setStrokeColorRGB(*rgba[:3], alpha=alpha)
        canvas.setLineCap(_CAPS.get(gc.get_capstyle(), 0))
        canvas.setLineJoin(_JOINS.get(gc.get_joinstyle(), 0))
        offset, dashes = gc.get_dashes()
        if dashes is not None and len(dashes):
            canvas.setDash([max(float(d), 0.01) for d in dashes], float(offset or 0.0))
        else:
            canvas.setDash([], 0)
        return True

    @staticmethod
    def _trace(pdf_path: Any, path: MplPath, transform: Any, *, simplify: bool = False,
               clip: tuple | None = None) -> None:
        last = (0.0, 0.0)
        start = (0.0, 0.0)
        for vertices, code in path.iter_segments(
            transform, simplify=simplify, clip=clip, curves=True
        ):
            if code == MplPath.MOVETO:
                last = start = (vertices[0], vertices[1])
                pdf_path.moveTo(*last)
            elif code == MplPath.LINETO:
                last = (vertices[0], vertices[1])
                pdf_path.lineTo(*last)
            elif code == MplPath.CURVE3:
                # quadratic → cubic: control points at 2/3 towards the quadratic control point
                cx, cy, x, y = vertices
                c1 = (last[0] + 2 / 3 * (cx - last[0]), last[1] + 2 / 3 * (cy - last[1]))
                c2 = (x + 2 / 3 * (cx - x), y + 2 / 3 * (cy - y))
                pdf_path.curveTo(*c1, *c2, x, y)
                last = (x, y)
            elif code == MplPath.CURVE4:
                pdf_path.curveTo(*vertices[:6])
                last = (vertices[4], vertices[5])
            elif code == MplPath.CLOSEPOLY:
                pdf_path.close()
                last = start

    # --- drawing ----------------------------------------------------------------------------
    def _begin_drawing(self, gc: GraphicsContextBase, rgbFace: Any) -> tuple[bool, bool]:
        """Save the canvas state, apply clip, stroke and fill; returns (stroke, fill)."""
        canvas = self.canvas
        canvas.saveState()
        self._apply_clip(gc)
        stroke = self._stroke_style(gc)
        fill = False
        if rgbFace is not None:
            face = tuple(rgbFace)
            alpha = gc.get_alpha() if gc.get_forced_alpha() else (face[3] if len(face) > 3 else 1)
            if alpha > 0:
                canvas.setFillColorRGB(*face[:3], alpha=alpha)
                fill = True
        return bool(stroke), fill

    def draw_path(self, gc: GraphicsContextBase, path: MplPath, transform: Any,
                  rgbFace: Any = None) -> None:
        canvas = self.canvas
        stroke, fill = self._begin_drawing(gc, rgbFace)
        if stroke or fill:
            pdf_path = canvas.beginPath()
            # long open polylines (waveforms) are simplified and clipped by matplotlib itself
            clip = (0.0, 0.0, self.width, self.height) if rgbFace is None else None
            simplify = bool(path.should_simplify and rgbFace is None)
            self._trace(pdf_path, path, transform, simplify=simplify, clip=clip)
            canvas.drawPath(pdf_path, stroke=int(stroke), fill=int(fill))
        canvas.restoreState()

    def draw_markers(self, gc: GraphicsContextBase, marker_path: MplPath, marker_trans: Any,
                     path: MplPath, trans: Any, rgbFace: Any = None) -> None:
        """All markers of a line as one PDF path (one fill/stroke operation)."""
        canvas = self.canvas
        marker = [(code, np.asarray(v, dtype=float)) for v, code in
                  marker_path.iter_segments(marker_trans, simplify=False, curves=True)]
        points = [tuple(v[-2:]) for v, code in path.iter_segments(trans, simplify=False)
                  if code != MplPath.CLOSEPOLY]
        if not points or not marker:
            return
        stroke, fill = self._begin_drawing(gc, rgbFace)
        if stroke or fill:
            pdf_path = canvas.beginPath()
            for x, y in points:
                if not (np.isfinite(x) and np.isfinite(y)):
                    continue
                if not (-5 <= x <= self.width + 5 and -5 <= y <= self.height + 5):
                    continue
                last = (x, y)
                for code, v in marker:
                    if code == MplPath.MOVETO:
                        last = (x + v[0], y + v[1])
                        pdf_path.moveTo(*last)
                    elif code == MplPath.LINETO:
                        last = (x + v[0], y + v[1])
                        pdf_path.lineTo(*last)
                    elif code == MplPath.CURVE3:
                        cx, cy, ex, ey = x + v[0], y + v[1], x + v[2], y + v[3]
                        pdf_path.curveTo(last[0] + 2 / 3 * (cx - last[0]),
                                         last[1] + 2 / 3 * (cy - last[1]),
                                         ex + 2 / 3 * (cx - ex), ey + 2 / 3 * (cy - ey), ex, ey)
                        last = (ex, ey)
                    elif code == MplPath.CURVE4:
                        pdf_path.curveTo(x + v[0], y + v[1], x + v[2], y + v[3],
                                         x + v[4], y + v[5])
                        last = (x + v[4], y + v[5])
                    elif code == MplPath.CLOSEPOLY:
                        pdf_path.close()
            canvas.drawPath(pdf_path, stroke=int(stroke), fill=int(fill))
        canvas.restoreState()

    def draw_text(self, gc: GraphicsContextBase, x: float, y: float, s: str, prop: Any,
                  angle: float, ismath: Any = False, mtext: Any = None) -> None:
        text = _plain(s)
        if not text.strip():
            return
        canvas = self.canvas
        canvas.saveState()
        self._apply_clip(gc)
        rgba = gc.get_rgb()
        alpha = gc.get_alpha() if gc.get_forced_alpha() else rgba[3]
        canvas.setFillColorRGB(*rgba[:3], alpha=alpha)
        canvas.setFont(_font_for(prop), prop.get_size_in_points())
        canvas.translate(x, y)
        if angle:
            canvas.rotate(angle)
        canvas.drawString(0, 0, text)
        canvas.restoreState()

    def draw_image(self, gc: GraphicsContextBase, x: float, y: float, im: Any) -> None:
        # Report figures are vector only; an image artist is a programming error.
        raise TypeError("report figures must not contain raster images")


class FigureFlowable(Flowable):
    """A matplotlib :class:`~matplotlib.figure.Figure` as a vector platypus flowable.

    Parameters
    ----------
    figure
        Built with ``matplotlib.figure.Figure`` (no pyplot state); its size in inches times
        72 gives the flowable's size in points.
    """

    def __init__(self, figure: Figure) -> None:
        super().__init__()
        register_fonts()
        self.figure = figure
        figure.set_dpi(72)
        w_in, h_in = figure.get_size_inches()
        self.width = float(w_in) * 72.0
        self.height = float(h_in) * 72.0

    def wrap(self, availWidth: float, availHeight: float) -> tuple[float, float]:
        return self.width, self.height

    def draw(self) -> None:
        renderer = CanvasRenderer(self.canv, self.width, self.height)
        self.canv.saveState()
        self.figure.draw(renderer)
        self.canv.restoreState()


def new_figure(width_pt: float, height_pt: float, *, left: float = 44, right: float = 10,
               bottom: float = 30, top: float = 18, hspace_pt: float = 0) -> Figure:
    """A figure of the given size in points with fixed margins (points), for the report.

    Fixed margins instead of an automatic layout engine keep figure drawing fast
    (hundreds of figures in a large lot report).
    """
    register_fonts()
    fig = Figure(figsize=(width_pt / 72.0, height_pt / 72.0), dpi=72)
    fig.subplots_adjust(left=left / width_pt, right=1 - right / width_pt,
                        bottom=bottom / height_pt, top=1 - top / height_pt,
                        hspace=hspace_pt / max(height_pt - top - bottom, 1.0))
    return fig


def finite(values: Any) -> np.ndarray:
    """Finite floats of ``values`` (None and NaN dropped)."""
    out = np.array([v for v in values if v is not None], dtype=float)
    return out[np.isfinite(out)] if out.size else out


def nice_unit_scale(values: np.ndarray, unit: str) -> tuple[float, str]:
    """Scale factor and prefixed unit so the largest magnitude of ``values`` reads 1…999."""
    from benchrun.units import format_si

    peak = float(np.max(np.abs(values))) if values.size else 0.0
    if peak == 0 or not math.isfinite(peak):
        return 1.0, unit
    label = format_si(peak, unit).split(" ", 1)[1] if " " in format_si(peak, unit) else unit
    prefix = label[: len(label) - len(unit)] if label.endswith(unit) else ""
    scales = {"T": 1e12, "G": 1e9, "M": 1e6, "k": 1e3, "": 1.0, "m": 1e-3, "µ": 1e-6,
              "n": 1e-9, "p": 1e-12, "f": 1e-15}
    return 1.0 / scales.get(prefix, 1.0), label
