"""Pictures: ROI overlays and diagnostics (matplotlib, Agg backend, no screen needed).

Visual language: greyscale images, ROI outlines in one colour per ROI kind with a line style
that also tells them apart in greyscale print (solid spheres, dashed background, dotted
inserts), labels beside every sphere.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .bands import BandSet
    from .phantoms.base import FailureSketch
    from .metrics.resolution import ResolutionFit
    from .phantoms.base import Overlay
    from .results import Measurement
    from .volume import Volume


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _finish(fig, path: str | os.PathLike, dpi: int, margins: dict[str, float] | None = None) -> Path:
    """Add the caution line, lay out, save as PNG and close the figure.

    ``margins`` (``subplots_adjust`` keywords) fix the layout, much faster than
    ``tight_layout`` (used without them) for figures drawn on every measurement.
    """
    plt = _plt()
    fig.text(0.5, 0.01, "Supports, does not replace, a qualified medical physicist's review.", ha="center", fontsize=8, color="#444444")
    if margins:
        fig.subplots_adjust(**margins)
    else:
        fig.tight_layout(rect=(0, 0.03, 1, 0.95))
    out = Path(path)
    fig.savefig(out, dpi=dpi)
    plt.close(fig)
    return out


#: Public names of the figure helpers, for the kinds' own pictures (:mod:`phantometry.phantoms`).
def pyplot():
    """matplotlib.pyplot with the Agg backend (no screen needed)."""
    return _plt()


def finish_figure(fig, path: str | os.PathLike, dpi: int = 110, margins: dict[str, float] | None = None) -> Path:
    """Add the caution line, lay out, save as PNG and close (as every picture of phantometry)."""
    return _finish(fig, path, dpi, margins)


# ============================================================================ names in words
#: Metric names as people say them (axis labels, titles); others: the name with spaces.
METRIC_TITLES = {
    "rc_max": "RC max",
    "rc_mean": "RC mean (A50)",
    "rc_peak": "RC peak",
    "percent_contrast": "percent contrast Q",
    "background_variability_pct": "background variability N",
    "lung_residual_pct": "low-density insert residual",
    "mean_bq_ml": "mean concentration",
    "max_bq_ml": "maximum concentration",
    "min_bq_ml": "minimum concentration",
    "activity_recovery": "activity recovery (measured / true)",
    "effective_fwhm_mm": "effective FWHM",
    "uniformity_std_pct": "uniformity %STD",
    "rc_rod": "rod RC",
    "rc_rod_std_pct": "rod RC %STD",
    "spillover_ratio": "spill-over ratio",
    "spillover_ratio_std_pct": "spill-over ratio %STD",
    "contrast_confirmation": "contrast confirmation",
    "calibration_error_pct": "calibration error",
    "voxel_cv_pct": "voxel CV",
    "max_deviation_pct": "largest slice deviation",
    "slice_mean_cv_pct": "CV of the slice means",
    "radial_nonuniformity_pct": "radial non-uniformity",
    "sector_max_deviation_pct": "largest sector deviation",
    "diameter_mm": "diameter",
    "length_mm": "length",
    "mean_suv": "mean SUV",
}
#: Units in words for axis labels ("1": a ratio of two like quantities).
_UNIT_WORDS = {"1": "ratio", "%": "%", "mm": "mm", "Bq/mL": "Bq/mL"}


def metric_title(metric: str) -> str:
    """A metric's name in words (``rc_max`` -> ``RC max``)."""
    if metric in METRIC_TITLES:
        return METRIC_TITLES[metric]
    for suffix in ("_pct", "_mm", "_bq_ml"):
        if metric.endswith(suffix):
            metric = metric[: -len(suffix)]
    return metric.replace("_", " ")


def roi_title(roi: str) -> str:
    """An ROI's name in words (``sphere_10mm`` -> ``10 mm sphere``, ``rod_1mm`` -> ``1 mm rod``)."""
    import re

    m = re.fullmatch(r"(sphere|rod)_(\d+(?:\.\d+)?)mm", roi)
    if m:
        return f"{m.group(2)} mm {m.group(1)}"
    return roi.replace("_", " ")


def axis_label(metric: str, unit: str | None) -> str:
    """An axis label: the metric in words and its unit (``RC max (ratio)``, ``background
    variability N (%)``); a title that already says it is a ratio gets no unit."""
    title = metric_title(metric)
    words = _UNIT_WORDS.get(unit or "", unit or "")
    if not words or (words == "ratio" and "/" in title):
        return title
    return f"{title} ({words})"


# ============================================================================ text placement
#: Extra room (pixels) kept around a text box when checking it against others.
_TEXT_PAD_PX = 2.0


def _bbox_overlap(a, b, pad: float = 0.0) -> bool:
    """True when two display boxes (x0, y0, x1, y1) overlap, each grown by ``pad`` pixels."""
    return not (a[2] + pad <= b[0] - pad or b[2] + pad <= a[0] - pad or a[3] + pad <= b[1] - pad or b[3] + pad <= a[1] - pad)


def _extent(text, renderer) -> tuple[float, float, float, float]:
    """The display box of a text itself (an annotation's arrow left out)."""
    from matplotlib.text import Annotation, Text

    if isinstance(text, Annotation):
        text.update_positions(renderer)  # where its offset puts it now
    bb = Text.get_window_extent(text, renderer)
    return (float(bb.x0), float(bb.y0), float(bb.x1), float(bb.y1))


def _hidden_tick_labels(fig) -> set[int]:
    """Ids of tick labels matplotlib keeps but does not draw (ticks outside the view limits)."""
    out: set[int] = set()
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            tol = 1e-9 * max(1.0, abs(hi - lo))
            for ticks in (axis.get_major_ticks(), axis.get_minor_ticks()):
                for tick in ticks:
                    loc = tick.get_loc()
                    if loc is None or not (lo - tol <= loc <= hi + tol):
                        out.update({id(tick.label1), id(tick.label2)})
    return out


def text_overlaps(fig) -> list[tuple[str, str]]:
    """Pairs of visible texts of a figure whose boxes overlap (after drawing it).

    Every :class:`matplotlib.text.Text` drawn counts: titles, labels placed beside shapes,
    tick labels, legend entries, colour-bar labels. Used by the tests of every picture (a
    picture whose texts overlap is not readable at a glance).
    """
    from matplotlib.text import Text

    if not hasattr(fig.canvas, "get_renderer"):  # a bare Figure: give it an Agg canvas
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        FigureCanvasAgg(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    hidden = _hidden_tick_labels(fig)
    texts = []
    for t in fig.findobj(Text):
        if id(t) in hidden or not t.get_visible() or not t.get_text().strip():
            continue
        if t.axes is not None and not t.axes.get_visible():
            continue
        bb = _extent(t, renderer)
        if bb[2] - bb[0] <= 0 or bb[3] - bb[1] <= 0:
            continue
        texts.append((t.get_text(), bb))
    out = []
    for i in range(len(texts)):
        for j in range(i + 1, len(texts)):
            a, b = texts[i][1], texts[j][1]
            # a shared edge or a pixel of anti-aliasing is not an overlap
            if min(a[2], b[2]) - max(a[0], b[0]) > 0.5 and min(a[3], b[3]) - max(a[1], b[1]) > 0.5:
                out.append((texts[i][0], texts[j][0]))
    return out


def texts_outside(fig) -> list[str]:
    """Visible texts of a figure that reach beyond its edges (cut off in the picture)."""
    from matplotlib.text import Text

    if not hasattr(fig.canvas, "get_renderer"):
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        FigureCanvasAgg(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    hidden = _hidden_tick_labels(fig)
    w, h = fig.bbox.width, fig.bbox.height
    out = []
    for t in fig.findobj(Text):
        if id(t) in hidden or not t.get_visible() or not t.get_text().strip():
            continue
        b = _extent(t, renderer)
        if b[0] < -0.5 or b[1] < -0.5 or b[2] > w + 0.5 or b[3] > h + 0.5:
            out.append(t.get_text())
    return out


class _Placer:
    """Places labels beside anchors (display pixels) where they overlap no text placed before
    and cross as few drawn outlines as possible.

    ``taken`` holds the boxes of every text already on the axes (hard: never overlapped);
    ``points`` the display positions of drawn outlines, each with the id of its owner (soft:
    a label crosses as few of other owners' outlines as it can; its own are ignored).
    """

    def __init__(self, ax, renderer) -> None:
        self.ax = ax
        self.renderer = renderer
        self.taken: list[tuple[float, float, float, float]] = []
        self._points: list[np.ndarray] = []
        self._owners: list[np.ndarray] = []
        bb = ax.get_window_extent(renderer)
        self.area = (float(bb.x0), float(bb.y0), float(bb.x1), float(bb.y1))

    def take(self, text) -> None:
        """Reserve the box of a text drawn without placement (numbers, letters, scale label)."""
        self.taken.append(_extent(text, self.renderer))

    def outline(self, points_display: np.ndarray, owner: int) -> None:
        pts = np.asarray(points_display, float).reshape(-1, 2)
        self._points.append(pts)
        self._owners.append(np.full(len(pts), owner))

    def _crossings(self, box, owner: int) -> int:
        """How many other owners' outlines pass through ``box``."""
        if not self._points:
            return 0
        pts = np.concatenate(self._points)
        own = np.concatenate(self._owners)
        inside = (pts[:, 0] >= box[0]) & (pts[:, 0] <= box[2]) & (pts[:, 1] >= box[1]) & (pts[:, 1] <= box[3]) & (own != owner)
        return int(np.unique(own[inside]).size)

    def place(self, text, anchor_px, radius_px: float | tuple[float, float], owner: int, *, below_first: bool = False,
              within: bool = True, drop: bool = False) -> bool:
        """Move ``text`` (an annotation of the anchor, in offset pixels) to its best place.

        Candidates: above, below, right, left and the diagonals just outside a circle of
        ``radius_px`` about the anchor (or a box of half-sizes ``(rx, ry)``), then one, two and
        three and a half text heights further out. The first candidate
        overlapping no taken box (and inside the axes, when ``within``) with the fewest
        outline crossings wins. With none free, ``drop`` hides the text (returns False);
        otherwise the least-overlapping one is kept.
        """
        order = [270, 90, 0, 180, 315, 45, 225, 135] if below_first else [90, 270, 0, 180, 45, 135, 315, 225]
        align = {0: ("left", "center"), 45: ("left", "bottom"), 90: ("center", "bottom"), 135: ("right", "bottom"),
                 180: ("right", "center"), 225: ("right", "top"), 270: ("center", "top"), 315: ("left", "top")}
        text.set_visible(True)
        h = _extent(text, self.renderer)
        height = max(4.0, h[3] - h[1])
        best = None
        for ring in (0.0, 1.0, 2.0, 3.5):
            for angle in order:
                ca, sa = math.cos(math.radians(angle)), math.sin(math.radians(angle))
                if isinstance(radius_px, tuple):  # the box's edge in this direction
                    rx, ry = radius_px
                    edge = min(rx / abs(ca) if abs(ca) > 1e-9 else math.inf, ry / abs(sa) if abs(sa) > 1e-9 else math.inf)
                else:
                    edge = radius_px
                r = edge + 3.0 + ring * height
                dx, dy = r * ca, r * sa
                text.set_horizontalalignment(align[angle][0])
                text.set_verticalalignment(align[angle][1])
                text.set_position((dx, dy))
                box = _extent(text, self.renderer)
                hard = sum(_bbox_overlap(box, t, _TEXT_PAD_PX) for t in self.taken)
                a = self.area
                outside = within and (box[0] < a[0] + 1 or box[1] < a[1] + 1 or box[2] > a[2] - 1 or box[3] > a[3] - 1)
                # a text box over another never; crossing another shape's outline costs more
                # than moving one text height further out, less than two
                cost = (hard + (1 if outside else 0), 4 * self._crossings(box, owner) + 3 * ring)
                if best is None or cost < best[0]:
                    best = (cost, angle, (dx, dy), box)
            if best is not None and best[0] == (0, 3 * ring):
                break
        assert best is not None
        (hard_best, _), angle, pos, box = best
        if hard_best and drop:
            text.set_visible(False)
            return False
        text.set_horizontalalignment(align[angle][0])
        text.set_verticalalignment(align[angle][1])
        text.set_position(pos)
        self.taken.append(box)
        return True


def _wrap(text: str, width_px: float, fontsize: float, renderer, *, weight: str = "normal") -> str:
    """``text`` broken at spaces into lines no wider than ``width_px``: each word measured once
    with the renderer, the line widths summed (2 % kept spare for kerning and hinting)."""
    from matplotlib.font_manager import FontProperties

    prop = FontProperties(size=fontsize, weight=weight)
    cache: dict[str, float] = {}

    def width(word: str) -> float:
        if word not in cache:
            cache[word] = renderer.get_text_width_height_descent(word or " ", prop, ismath=False)[0]
        return cache[word]

    space = width("a a") - 2 * width("a")
    limit = 0.98 * width_px
    out: list[str] = []
    for para in text.split("\n"):
        line: list[str] = []
        used = 0.0
        for word in para.split(" "):
            w = width(word)
            if line and used + space + w > limit:
                out.append(" ".join(line))
                line, used = [word], w
            else:
                used += (space if line else 0.0) + w
                line.append(word)
        out.append(" ".join(line))
    return "\n".join(out)


# ============================================================================ orientation
#: Letters of the world axes' directions (+x, -x, +y, -y, +z, -z) in each frame: DICOM
#: patient coordinates (LPS: +x towards the patient's left, +y posterior, +z superior; DICOM
#: PS3.3 C.7.6.2.1.1) and NIfTI scanner coordinates (RAS: +x right, +y anterior, +z superior).
#: S and I (superior, inferior) stand for DICOM's H and F (common practice in viewers).
_FRAME_LETTERS = {"LPS": ("L", "R", "P", "A", "S", "I"), "RAS": ("R", "L", "A", "P", "S", "I")}
#: A world axis whose share of a direction is at least this (cosine) adds its letter (an
#: oblique direction reads e.g. "LA"); the largest share comes first.
OBLIQUE_LETTER_COSINE = 0.25


def orientation_letters(direction, frame: str) -> str:
    """The anatomical letters of a world direction in ``frame`` (``LPS`` or ``RAS``).

    ``orientation_letters([1, 0, 0], "LPS") == "L"``; an oblique direction gets a letter for
    every world axis contributing at least :data:`OBLIQUE_LETTER_COSINE`, largest first.
    """
    letters = _FRAME_LETTERS[frame]
    d = np.asarray(direction, float)
    d = d / np.linalg.norm(d)
    order = np.argsort(-np.abs(d))
    out = [letters[2 * int(a) + (0 if d[a] > 0 else 1)] for a in order if abs(d[a]) >= OBLIQUE_LETTER_COSINE]
    return "".join(out) or letters[2 * int(order[0]) + (0 if d[order[0]] > 0 else 1)]


def view_letters(view, frame: str) -> dict[str, str]:
    """Letters at the four edges of a drawn view: ``left``, ``right``, ``top``, ``bottom``."""
    u, v = view.plane.u_dir, view.plane.v_dir
    up = -v if view.rows_down else v
    return {"right": orientation_letters(u, frame), "left": orientation_letters(-u, frame),
            "top": orientation_letters(up, frame), "bottom": orientation_letters(-up, frame)}


# ============================================================================ overlays
#: Outline colour and line style of each shape role. Colours from the palette of Okabe & Ito,
#: "Color Universal Design: how to make figures and presentations that are friendly to
#: colorblind people" (J*Fly, 2008), told apart by people with any common colour-vision
#: deficiency; the line styles tell the roles apart in greyscale print too.
_ROLE_STYLE = {
    "hot": dict(color="#D55E00", lw=1.5, ls="-"),
    "cold": dict(color="#0072B2", lw=1.5, ls="-"),
    "background": dict(color="#009E73", lw=1.0, ls="--"),
    "slice": dict(color="#009E73", lw=0.9, ls="--"),
    "insert": dict(color="#CC79A7", lw=1.4, ls=":"),
    "voi": dict(color="#009E73", lw=1.3, ls="-"),
    "reference": dict(color="#009E73", lw=1.4, ls="-."),
    "search": dict(color="#D55E00", lw=1.0, ls="--"),
    "peak": dict(color="#56B4E9", lw=1.5, ls="-."),
    "isocontour": dict(color="#F0E442", lw=1.2, ls="-", stroke="#000000"),
    "guide": dict(color="#808080", lw=0.8, ls="--"),
    "outline": dict(color="#000000", lw=1.1, ls="--"),
    "axis": dict(color="#0072B2", lw=1.4, ls="-."),
}
#: Order of the roles in an overlay's legend (what is measured first, guides last).
_LEGEND_ORDER = ("hot", "cold", "isocontour", "peak", "search", "voi", "reference", "background", "slice", "insert", "guide", "outline",
                 "axis")
#: Roles whose outlines labels may cross freely (guides across the whole view).
_CROSSABLE = {"guide", "slice", "outline"}
#: Words of the legend for each role (a kind's :attr:`Overlay.legend` may say more).
_ROLE_WORDS = {
    "hot": "hot insert ROI",
    "cold": "cold insert ROI",
    "background": "background ROI",
    "slice": "ROI planes",
    "insert": "insert ROI",
    "voi": "VOI",
    "reference": "reference VOI",
    "search": "search region",
    "peak": "peak",
    "isocontour": "isocontour VOI (the voxels it holds)",
    "guide": "guide",
    "outline": "outline measured in the image",
    "axis": "axis found",
}
_LABEL_BOX = dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.85)
#: Image height (inches) of an overlay's views; the views share it, widths follow their planes.
_VIEW_HEIGHT_IN = 4.6
_MAX_FIGURE_WIDTH_IN = 16.0


@dataclass
class DrawnView:
    """What :func:`draw_overlay` drew for one view (for tests and callers; no image analysis needed).

    Attributes
    ----------
    axes, colorbar_axes : the image's axes and its colour bar's (None without one).
    letters : edge (``left``, ``right``, ``top``, ``bottom``) -> orientation letters drawn.
    vmax : the top of the display window (Bq/mL); ``clipped`` when the plane holds more.
    labels : shape label texts (placed; hidden ones left out).
    masks : shape name -> the closed polygons drawn for a ``mask`` shape (:func:`mask_outline`), plane mm.
    artists : (shape, artist) of every shape drawn.
    """

    view: Any
    axes: Any
    colorbar_axes: Any
    letters: dict[str, str]
    vmax: float
    clipped: bool
    labels: list = field(default_factory=list)
    masks: dict[str, list[np.ndarray]] = field(default_factory=dict)
    artists: list = field(default_factory=list)


@dataclass
class DrawnOverlay:
    """The figure of an overlay and what was drawn on it (:func:`draw_overlay`)."""

    figure: Any
    views: list[DrawnView]
    legend: list[str]
    caption: str


#: Subdivision of a pixel when a mask's outline is traced: the outline runs on the pixel edges
#: and cuts each convex corner by this fraction of a pixel (never past a pixel centre).
_MASK_SUBDIVISION = 4


def mask_outline(mask: np.ndarray, pixel_mm: float) -> list[np.ndarray]:
    """The outline of a pixel mask as closed polygons (each (n, 2), plane mm).

    Pixel ``(r, c)`` covers ``[(c - 1/2) p, (c + 1/2) p] x [(r - 1/2) p, (r + 1/2) p]``
    (:class:`phantometry.rois.PlaneImage`). The outline follows the pixel edges between pixels
    inside and outside (traced by contourpy at half level on the mask subdivided
    :data:`_MASK_SUBDIVISION` times, so each corner is bevelled by a quarter pixel): a pixel
    centre lies inside the polygons (even-odd rule) exactly when the pixel is in the mask.
    """
    import contourpy

    m = np.asarray(mask, bool)
    if not m.any():
        return []
    rows, cols = np.nonzero(m)
    r0, r1 = max(int(rows.min()) - 1, 0), min(int(rows.max()) + 2, m.shape[0])
    c0, c1 = max(int(cols.min()) - 1, 0), min(int(cols.max()) + 2, m.shape[1])
    f = _MASK_SUBDIVISION
    sub = np.pad(np.kron(m[r0:r1, c0:c1], np.ones((f, f))), 1)  # zeros around: every outline closes
    p = float(pixel_mm)
    # sub-pixel centres in plane mm (the padding adds one sub-pixel on every side)
    x = (c0 - 0.5 + (np.arange(sub.shape[1]) - 1 + 0.5) / f) * p
    y = (r0 - 0.5 + (np.arange(sub.shape[0]) - 1 + 0.5) / f) * p
    gen = contourpy.contour_generator(x, y, sub, line_type=contourpy.LineType.Separate)
    return [np.asarray(line, float) for line in gen.lines(0.5) if len(line) >= 3]


def _nice_length(span_mm: float) -> float:
    """A round scale-bar length near a fifth of ``span_mm``."""
    target = span_mm / 5
    for n in (1, 2, 5, 10, 20, 25, 50, 100, 200):
        if n >= target * 0.7:
            return float(n)
    return 200.0


def _shape_outline(shape, width_mm: float) -> np.ndarray:
    """Points (n, 2) along a shape's outline in plane mm (labels keep clear of them)."""
    if shape.kind == "circle":
        t = np.linspace(0, 2 * np.pi, 48, endpoint=False)
        r = float(shape.size_mm) / 2
        return np.asarray(shape.centre_uv, float) + r * np.c_[np.cos(t), np.sin(t)]
    if shape.kind == "rect":
        (u, v), (w, h) = np.asarray(shape.centre_uv, float), shape.size_mm
        s = np.linspace(-0.5, 0.5, 9)
        return np.concatenate([np.c_[u + s * w, np.full(9, v - h / 2)], np.c_[u + s * w, np.full(9, v + h / 2)],
                               np.c_[np.full(9, u - w / 2), v + s * h], np.c_[np.full(9, u + w / 2), v + s * h]])
    if shape.kind in ("contour", "line"):
        pts = np.asarray(shape.points_uv, float).reshape(-1, 2)
        if len(pts) < 2:
            return pts
        closed = np.vstack([pts, pts[:1]]) if shape.kind == "contour" else pts
        f = np.linspace(0, 1, 4, endpoint=False)
        return (closed[:-1, None, :] + f[None, :, None] * (closed[1:] - closed[:-1])[:, None, :]).reshape(-1, 2)
    if shape.kind == "hline":
        return np.c_[np.linspace(0, width_mm, 40), np.full(40, float(shape.centre_uv[1]))]
    if shape.kind == "marker":
        return np.asarray(shape.centre_uv, float).reshape(1, 2)
    return np.zeros((0, 2))


def _label_anchor(shape) -> tuple[np.ndarray, float | tuple[float, float]] | None:
    """Where a shape's label goes about (plane mm) and the shape's radius there (mm; a
    rectangle: its half width and half height)."""
    if shape.kind == "circle":
        return np.asarray(shape.centre_uv, float), float(shape.size_mm) / 2
    if shape.kind == "rect":
        w, h = shape.size_mm
        return np.asarray(shape.centre_uv, float), (0.5 * float(w), 0.5 * float(h))
    if shape.kind in ("contour", "line") and shape.points_uv is not None and len(shape.points_uv):
        pts = np.asarray(shape.points_uv, float)
        c = pts.mean(axis=0)
        return c, float(np.max(np.linalg.norm(pts - c, axis=1)))
    if shape.kind == "mask" and shape.mask is not None and shape.mask.any():
        return None
    if shape.kind == "marker":
        return np.asarray(shape.centre_uv, float), 2.0
    return None


def _draw_shape(ax, shape, width_mm: float, pixel_mm: float):
    """One :class:`~phantometry.phantoms.base.Shape` on a view (plane mm); returns its artist
    and, for a mask, its segments."""
    from matplotlib.collections import LineCollection
    from matplotlib.patches import Circle, Polygon, Rectangle

    st = _ROLE_STYLE[shape.role]
    common = dict(color=st["color"], lw=st["lw"], ls=st["ls"], path_effects=_strokes(st))
    if shape.kind == "circle":
        u, v = (float(x) for x in shape.centre_uv)
        return ax.add_patch(Circle((u, v), float(shape.size_mm) / 2, fill=False, **common)), None
    if shape.kind == "rect":
        u, v = (float(x) for x in shape.centre_uv)
        w, h = shape.size_mm
        return ax.add_patch(Rectangle((u - w / 2, v - h / 2), w, h, fill=False, **common)), None
    if shape.kind == "marker":
        u, v = (float(x) for x in shape.centre_uv)
        return ax.plot([u], [v], marker="+", color=st["color"], ms=9, mew=max(1.2, st["lw"]), ls="none")[0], None
    if shape.kind == "hline":
        v = float(shape.centre_uv[1])
        return ax.plot([0, width_mm], [v, v], **common)[0], None
    if shape.kind == "contour":
        return ax.add_patch(Polygon(np.asarray(shape.points_uv, float), closed=True, fill=False, **common)), None
    if shape.kind == "line":
        pts = np.asarray(shape.points_uv, float)
        return ax.plot(pts[:, 0], pts[:, 1], **common)[0], None
    if shape.kind == "mask":
        polygons = mask_outline(shape.mask, pixel_mm)
        lc = LineCollection(polygons, colors=st["color"], linewidths=st["lw"], path_effects=_strokes(st))
        ax.add_collection(lc)
        return lc, polygons
    raise ValueError(f"unknown shape kind {shape.kind!r}")


def _window(view) -> tuple[float, bool]:
    """The top of a view's display window and whether the plane holds more than it."""
    vals = view.plane.values
    finite = vals[np.isfinite(vals)]
    top = float(view.vmax) if view.vmax else (float(np.percentile(finite, 99.5)) if finite.size else 1.0)
    if not (top > 0):
        top = 1.0
    clipped = bool(finite.size and float(finite.max()) > top * 1.001)
    return top, clipped


def _strokes(style: dict) -> list:
    """A dark edge under a light line (a yellow outline shows on white and on black alike)."""
    if "stroke" not in style:
        return []
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=style["lw"] + 1.6, foreground=style["stroke"])]


def _legend_handles(roles: list[str], markers_only: set[str]) -> list:
    """Legend samples of the roles: a line in the role's style, or its marker where the role
    is drawn as markers only."""
    from matplotlib.lines import Line2D

    out = []
    for role in roles:
        st = _ROLE_STYLE[role]
        if role in markers_only:
            out.append(Line2D([], [], color=st["color"], marker="+", ms=9, mew=1.5, ls="none"))
        else:
            out.append(Line2D([], [], color=st["color"], lw=max(1.3, st["lw"]), ls=st["ls"], path_effects=_strokes(st)))
    return out


def draw_overlay(overlay: "Overlay") -> DrawnOverlay:
    """Build the figure of an overlay (not saved): its views side by side at one height, in mm
    to scale, each with a colour bar, a scale bar and orientation letters; every shape drawn in
    its role's style with its label where it overlaps no other text; the title, a legend of the
    roles in words and the caption. Returns the figure and a record of what was drawn.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    views = overlay.views
    n = len(views)
    extents = [(v.plane.values.shape[1] * v.plane.pixel_mm, v.plane.values.shape[0] * v.plane.pixel_mm) for v in views]
    bar_w = [1.05 if v.colorbar else 0.1 for v in views]
    height = _VIEW_HEIGHT_IN
    widths = [height * w / h for w, h in extents]
    gap, left, right = 0.3, 0.25, 0.15
    total = left + right + sum(widths) + sum(bar_w) + gap * (n - 1)
    if total > _MAX_FIGURE_WIDTH_IN:
        scale = (_MAX_FIGURE_WIDTH_IN - left - right - sum(bar_w) - gap * (n - 1)) / sum(widths)
        widths = [w * scale for w in widths]
        height *= scale
        total = _MAX_FIGURE_WIDTH_IN
    fig_w = max(total, 6.0)
    dpi = 110
    fig = Figure(figsize=(fig_w, 6.0), dpi=dpi)
    canvas = FigureCanvasAgg(fig)
    renderer = canvas.get_renderer()
    px = fig_w * dpi
    # ---- text blocks, wrapped to the widths they have (measured)
    title = _wrap(overlay.title, px - 20, 10, renderer)
    view_titles = [_wrap(v.title, w * dpi, 9, renderer) for v, w in zip(views, widths)]
    present = {sh.role for v in views for sh in v.shapes}
    roles = [r for r in _LEGEND_ORDER if r in present and overlay.legend.get(r, _ROLE_WORDS.get(r)) != ""]
    words = [overlay.legend.get(r) or _ROLE_WORDS[r] for r in roles]
    caption = _wrap(" ".join(overlay.caption), px - 30, 8, renderer) if overlay.caption else ""
    # legend columns: as many as fit the width
    from matplotlib.font_manager import FontProperties

    prop = FontProperties(size=8)
    widest = max((renderer.get_text_width_height_descent(w, prop, ismath=False)[0] for w in words), default=0.0)
    ncol = max(1, min(len(words), int((px - 40) // (widest + 60)))) if words else 1
    legend_rows = int(math.ceil(len(words) / ncol)) if words else 0
    line_in = 8 * 1.35 / 72
    top_in = 0.15 + (title.count("\n") + 1) * 10 * 1.3 / 72 + 0.1 + (max(t.count("\n") for t in view_titles) + 1) * 9 * 1.3 / 72 + 0.1
    legend_in = (legend_rows * 0.2 + 0.15) if words else 0.0
    caption_in = (caption.count("\n") + 1) * line_in + 0.05 if caption else 0.0
    bottom_in = 0.3 + caption_in + legend_in + 0.1
    fig_h = top_in + height + bottom_in
    fig.set_size_inches(fig_w, fig_h)
    fig.suptitle(title, fontsize=10, y=1 - 0.1 / fig_h, va="top")
    x = left + (fig_w - total) / 2 if fig_w > total else left
    drawn: list[DrawnView] = []
    for view, w, bw, vt in zip(views, widths, bar_w, view_titles):
        rect = (x / fig_w, bottom_in / fig_h, w / fig_w, height / fig_h)
        ax = fig.add_axes(rect)
        cax = fig.add_axes(((x + w + 0.08) / fig_w, bottom_in / fig_h, 0.14 / fig_w, height / fig_h)) if view.colorbar else None
        x += w + bw + gap
        drawn.append(_draw_view(fig, ax, cax, view, vt, overlay.frame, renderer))
    if words:
        markers_only = {r for r in roles if all(sh.kind == "marker" for v in views for sh in v.shapes if sh.role == r)}
        fig.legend(_legend_handles(roles, markers_only), words, loc="upper center", bbox_to_anchor=(0.5, (bottom_in - 0.08) / fig_h), ncol=ncol,
                   fontsize=8, frameon=False, handlelength=2.6, columnspacing=1.6)
    if caption:
        fig.text(0.5, (0.3 + caption_in) / fig_h, caption, ha="center", va="top", fontsize=8, color="#222222")
    return DrawnOverlay(fig, drawn, words, caption)


def _draw_view(fig, ax, cax, view, title: str, frame: str | None, renderer) -> DrawnView:
    """One view of :func:`draw_overlay`: image, colour bar, shapes, scale bar, letters, labels."""
    plane = view.plane
    nv, nu = plane.values.shape
    p = plane.pixel_mm
    u_edges = (np.arange(nu + 1) - 0.5) * p
    v_edges = (np.arange(nv + 1) - 0.5) * p
    vmax, clipped = _window(view)
    # a mesh of pixel squares: Agg fills them directly, no canvas-sized floating-point copy of
    # the image (an imshow resamples the image in floating point first)
    mesh = ax.pcolormesh(u_edges, v_edges, np.nan_to_num(plane.values), cmap="gray_r", vmin=0, vmax=vmax, shading="flat",
                         antialiased=False, edgecolors="none", linewidth=0)
    ax.set_xlim(u_edges[0], u_edges[-1])
    ax.set_ylim((v_edges[-1], v_edges[0]) if view.rows_down else (v_edges[0], v_edges[-1]))
    ax.set_aspect("equal", adjustable="box")
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(title, fontsize=9)
    if cax is not None:
        bar = fig.colorbar(mesh, cax=cax, extend="max" if clipped else "neither")
        label = view.colorbar + (f"; top: {view.window_note}" if view.window_note else "")
        bar.set_label(label, fontsize=8)
        bar.ax.tick_params(labelsize=7)
    ax.apply_aspect()
    width = nu * p
    record = DrawnView(view, ax, cax, {}, vmax, clipped)
    placer = _Placer(ax, renderer)
    to_px = ax.transData.transform
    labelled = []
    for i, shape in enumerate(view.shapes):
        artist, seg = _draw_shape(ax, shape, width, p)
        record.artists.append((shape, artist))
        if seg is not None:
            record.masks[shape.name or f"mask {i}"] = seg
            pts = np.concatenate(seg) if seg else np.zeros((0, 2))
        else:
            pts = _shape_outline(shape, width)
        if len(pts) and shape.role not in _CROSSABLE:
            placer.outline(to_px(pts), i)
        if shape.label and shape.role == "background" and shape.kind == "circle":
            # a number in the middle of its circle
            t = ax.text(float(shape.centre_uv[0]), float(shape.centre_uv[1]), shape.label, ha="center", va="center", fontsize=7,
                        color=_ROLE_STYLE["background"]["color"])
            placer.take(t)
            record.labels.append(t)
        elif shape.label:
            labelled.append((i, shape))
    # scale bar, lower left of the view as shown
    length = view.scale_bar_mm if view.scale_bar_mm is not None else _nice_length(width)
    if length:
        u0 = u_edges[0] + 0.04 * width
        span_v = nv * p
        v0 = (v_edges[-1] - 0.05 * span_v) if view.rows_down else (v_edges[0] + 0.05 * span_v)
        ax.plot([u0, u0 + length], [v0, v0], color="black", lw=3, solid_capstyle="butt")
        ax.plot([u0, u0 + length], [v0, v0], color="white", lw=1, solid_capstyle="butt")
        t = ax.annotate(f"{length:g} mm", (u0 + length / 2, v0), xytext=(0, 4), textcoords="offset points", ha="center", va="bottom",
                        fontsize=8, bbox=_LABEL_BOX)
        placer.take(t)
    # orientation letters, inside each edge
    if frame in _FRAME_LETTERS:
        record.letters = view_letters(view, frame)
        spots = {"left": (0.012, 0.5, "left", "center"), "right": (0.988, 0.5, "right", "center"),
                 "top": (0.5, 0.988, "center", "top"), "bottom": (0.5, 0.012, "center", "bottom")}
        for edge, (fx, fy, ha, va) in spots.items():
            t = ax.text(fx, fy, record.letters[edge], transform=ax.transAxes, ha=ha, va=va, fontsize=10, fontweight="bold",
                        color="#1a1a1a", bbox=dict(boxstyle="square,pad=0.2", fc="white", ec="#999999", lw=0.5, alpha=0.9))
            t.set_gid(f"letter_{edge}")
            placer.take(t)
    # labels beside their shapes, largest shapes first (they have the fewest free places)
    def size(shape) -> float:
        anchor = _label_anchor(shape)
        return 0.0 if anchor is None else float(np.max(anchor[1]))

    labelled.sort(key=lambda item: -size(item[1]))
    scale_px = abs(float(ax.transData.transform((1.0, 0.0))[0] - ax.transData.transform((0.0, 0.0))[0]))
    for i, shape in labelled:
        anchor = _label_anchor(shape)
        if anchor is None:
            continue
        c, r = anchor
        t = ax.annotate(shape.label, (float(c[0]), float(c[1])), xytext=(0, 0), textcoords="offset pixels", fontsize=8, color="black",
                        bbox=_LABEL_BOX, annotation_clip=False)
        radius = (r[0] * scale_px, r[1] * scale_px) if isinstance(r, tuple) else r * scale_px
        placer.place(t, to_px(c), radius, i, below_first=shape.label_below)
        record.labels.append(t)
    return record


def overlay_picture(overlay: "Overlay", path: str | os.PathLike) -> Path:
    """Draw an analysis's overlay (:meth:`phantometry.phantoms.base.Analysis.overlay`) as a PNG
    (:func:`draw_overlay`)."""
    drawn = draw_overlay(overlay)
    return _save(drawn.figure, path)


def _save(fig, path: str | os.PathLike, dpi: int | None = None) -> Path:
    """Add the caution line at the bottom and save a figure laid out by hand, at the
    resolution it was laid out at (text widths were measured at it)."""
    dpi = fig.dpi if dpi is None else dpi
    fig.text(0.5, 0.06 / fig.get_figheight(), "Supports, does not replace, a qualified medical physicist's review.", ha="center",
             va="bottom", fontsize=8, color="#444444")
    out = Path(path)
    fig.savefig(out, dpi=dpi)
    if hasattr(fig, "number"):
        _plt().close(fig)
    return out


# ============================================================================ a failed run
def diagnostic_picture(volume: "Volume", path: str | os.PathLike, *, message: str | None = None,
                       sketch: "FailureSketch | None" = None) -> Path:
    """The picture of a failed localisation (PNG): the error message, and the image where the
    tool looked, in a window that shows the phantom (:func:`draw_diagnostic`).

    The picture is a courtesy: when drawing the views fails for any reason, a picture of the
    message alone is written instead.
    """
    try:
        drawn = draw_diagnostic(volume, message=message, sketch=sketch)
        return _save(drawn.figure, path)
    except Exception:  # noqa: BLE001  (never let the courtesy hide the real error)
        fig, renderer = _new_figure(9.0, 2.5)
        text = _wrap("Phantom not found: " + (message or "localisation failed"), 9.0 * fig.dpi - 40, 10, renderer)
        fig.text(0.5, 0.6, text, ha="center", va="center", fontsize=10, color="#8a0000")
        return _save(fig, path)


def _plane_trace(view, point: np.ndarray, normal: np.ndarray) -> np.ndarray | None:
    """Where a plane (through ``point``, perpendicular to ``normal``) crosses a view: two
    points (plane mm) at the view's left and right edges, or None when parallel to it."""
    n = np.asarray(normal, float)
    vn = float(view.v_dir @ n)
    if abs(vn) < 1e-6:
        return None
    width = view.values.shape[1] * view.pixel_mm
    us = np.array([0.0, width])
    vs = (float((np.asarray(point, float) - view.origin_mm) @ n) - us * float(view.u_dir @ n)) / vn
    return np.c_[us, vs]


def draw_diagnostic(volume: "Volume", *, message: str | None = None, sketch: "FailureSketch | None" = None) -> DrawnOverlay:
    """The figure of a failed localisation (not saved): the transverse slice through the sphere
    plane searched (or the body's centre, or the image's) as stored, and the two image planes
    along the slice axis through the same point, each over the whole field of view; the body
    found, the axis and the plane searched drawn on them; the message as the title."""
    from .phantoms.base import Overlay, Shape, View
    from .rois import sample_plane, slice_as_acquired

    sk = sketch
    point = None
    if sk is not None:
        point = sk.plane_point_mm if sk.plane_point_mm is not None else sk.body_centre_mm
    if point is None:
        point = volume.centre_world
    sp = volume.spacing_mm
    n = np.array(volume.shape)
    centre = volume.centre_world
    cols, rows, along = volume.axes_world[2], volume.axes_world[1], volume.axes_world[0]
    # the transverse slice, centred on the field of view
    k_centre = centre + float((np.asarray(point) - centre) @ along) * along
    tra, k = slice_as_acquired(volume, k_centre, 0.5 * max(n[2] * sp[2], n[1] * sp[1]) + 2)
    half_long = 0.5 * max(n[2] * sp[2], n[1] * sp[1], n[0] * sp[0]) + 2
    pix = float(min(sp))
    views_planes = []
    for u_dir, other, name in ((cols, rows, "columns"), (rows, cols, "rows")):
        c = centre + float((np.asarray(point) - centre) @ other) * other
        u = u_dir - float(u_dir @ along) * along
        views_planes.append((sample_plane(volume, c, u / np.linalg.norm(u), along, half_long, pixel_mm=pix), name))
    finite = volume.data[np.isfinite(volume.data) & (volume.data > 0)]
    if sk is not None and sk.level_bq_ml:
        vmax, note = 2.5 * sk.level_bq_ml, "2.5 x the body's level"
    else:
        vmax = float(np.percentile(finite, 99.0)) if finite.size else 1.0
        note = "the 99th percentile of the voxels"
    def shapes_for(view, transverse: bool) -> list:
        out = []
        if sk is None:
            return out
        if sk.inside_body is not None:
            nv, nu = view.values.shape
            cc, rr = np.meshgrid(np.arange(nu) * view.pixel_mm, np.arange(nv) * view.pixel_mm)
            mask = sk.inside_body(view.uv_to_world(np.stack([cc, rr], axis=-1)))
            if mask.any():
                out.append(Shape("mask", "guide", mask=mask, name="body found"))
        if sk.axis_point_mm is not None and sk.axis_direction is not None:
            d = np.asarray(sk.axis_direction, float)
            ends = np.asarray(sk.axis_point_mm, float) + np.array([-1.0, 1.0])[:, None] * 2 * half_long * d
            out.append(Shape("line", "axis", points_uv=view.world_to_uv(ends), name="axis"))
        if not transverse and sk.plane_point_mm is not None and sk.axis_direction is not None:
            trace = _plane_trace(view, sk.plane_point_mm, sk.axis_direction)
            if trace is not None:
                out.append(Shape("line", "slice", points_uv=trace, name="sphere plane searched"))
        return out

    what = "the sphere plane searched" if (sk is not None and sk.plane_point_mm is not None) else (
        "the body's centre" if (sk is not None and sk.body_centre_mm is not None) else "the image's centre")
    views = [View(tra, f"Transverse slice {k + 1} of {volume.shape[0]} as stored, through {what}", shapes_for(tra, True), vmax,
                  rows_down=True, window_note=note)]
    for plane, name in views_planes:
        views.append(View(plane, f"Along the slice axis and the image {name}, through {what}", shapes_for(plane, False), vmax,
                          window_note=note))
    notes = list(sk.notes) if sk is not None else []
    caption = ["What the search found: " + "; ".join(notes) + "." if notes else "Nothing of the phantom could be found.",
               f"Grey scale: white 0, black {vmax:,.0f} Bq/mL and above ({note}). Check that the whole phantom is in the field of "
               "view and filled as the fill record says, or give the insert centres (--centre NAME=x,y,z) to skip the search."]
    overlay = Overlay(views, "Phantom not found: " + (message or "localisation failed"), frame=volume.frame,
                      legend={"guide": "body found in the image (above half its level)", "axis": "phantom axis found (the cold insert)",
                              "slice": "sphere plane searched"}, caption=caption)
    drawn = draw_overlay(overlay)
    if drawn.figure._suptitle is not None:
        drawn.figure._suptitle.set_color("#8a0000")
    return drawn


# ============================================================================ comparison charts
#: One colour per setting, from the palette of Okabe & Ito, "Color Universal Design: how to make
#: figures and presentations that are friendly to colorblind people" (J*Fly, 2008); yellow last
#: (it is weak on white, so every marker also has a dark edge).
SETTING_COLOURS = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#0072B2", "#D55E00", "#CC79A7", "#F0E442")
#: One marker shape per setting: twelve different shapes, none repeated before the thirteenth
#: setting; with the eight colours no (colour, shape) pair repeats before the 25th.
SETTING_MARKERS = ("o", "s", "D", "^", "v", "P", "X", "*", "h", "p", "<", ">")
_MARKER_EDGE = "#222222"


def setting_style(number: int) -> dict[str, Any]:
    """Colour and marker of setting ``number`` (1-based) in every comparison chart."""
    i = int(number) - 1
    return {"color": SETTING_COLOURS[i % len(SETTING_COLOURS)], "marker": SETTING_MARKERS[i % len(SETTING_MARKERS)]}


def _by_key(rows) -> dict:
    """(roi, metric) -> list of rows (several when several band sets judged the same value)."""
    out: dict = {}
    for r in rows:
        out.setdefault((r.roi, r.metric), []).append(r)
    return out


def _finite(v) -> bool:
    return v is not None and np.isfinite(v)


def _new_figure(width_in: float, height_in: float, dpi: int = 100):
    """A figure on an Agg canvas of its own (no pyplot state) and its renderer."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=dpi)
    canvas = FigureCanvasAgg(fig)
    return fig, canvas.get_renderer()


def _short(text: str, limit: int = 140) -> str:
    text = " ".join(str(text).split())
    return text if len(text) <= limit else text[: limit - 3].rstrip() + "..."


class SettingsKey:
    """The key under a comparison chart: every setting with its marker and colour, and the
    settings that could not be measured (listed with their reason), laid out to the figure's
    width (measured text, so nothing overlaps)."""

    def __init__(self, settings, failed, width_in: float, renderer, dpi: int, extra: Sequence[tuple[Any, str]] = ()) -> None:
        from matplotlib.font_manager import FontProperties
        from matplotlib.lines import Line2D

        self.handles = [Line2D([], [], ls="none", ms=6.5, mec=_MARKER_EDGE, mew=0.6, **setting_style(n)) for n, _, _ in settings]
        self.labels = [f"{n}: {label}" for n, label, _ in settings]
        for handle, text in extra:
            self.handles.append(handle)
            self.labels.append(text)
        prop = FontProperties(size=8)
        widest = max((renderer.get_text_width_height_descent(t, prop, ismath=False)[0] for t in self.labels), default=0.0)
        px = width_in * dpi
        self.ncol = max(1, min(len(self.labels) or 1, int((px - 30) // (widest + 45))))
        self.rows = int(math.ceil(len(self.labels) / self.ncol)) if self.labels else 0
        lines = [f"{n}: {label} - not measured: {_short(err)}" for n, label, err in failed]
        self.failed = _wrap("Could not be measured (no points): " + "; ".join(lines), px - 40, 8, renderer) if lines else ""
        self.height_in = 0.2 * self.rows + 0.15 + ((self.failed.count("\n") + 1) * 8 * 1.35 / 72 + 0.1 if self.failed else 0.0)

    def draw(self, fig, top_in: float) -> None:
        """Draw the key with its top ``top_in`` inches above the bottom of the figure."""
        h = fig.get_figheight()
        if self.labels:
            leg = fig.legend(self.handles, self.labels, loc="upper center", bbox_to_anchor=(0.5, top_in / h), ncol=self.ncol, fontsize=8,
                             frameon=False, handletextpad=0.4, columnspacing=1.4)
            leg.set_gid("settings_key")
        if self.failed:
            t = fig.text(0.5, (top_in - 0.2 * self.rows - 0.15) / h, self.failed, ha="center", va="top", fontsize=8, color="#8a0000")
            t.set_gid("failed_settings")


def _panel_grid(fig, n_panels: int, ncols: int, panel_w: float, panel_h: float, top_in: float, bottom_in: float,
                left_in: float = 0.75, col_gap_in: float = 0.75, row_gap_in: float = 0.95) -> list:
    """Axes of a grid of panels placed in inches: ``row_gap_in`` between rows holds a row's
    tick labels and axis label and the next row's title, so they never meet."""
    axes = []
    W, H = fig.get_figwidth(), fig.get_figheight()
    for i in range(n_panels):
        r, c = divmod(i, ncols)
        x = left_in + c * (panel_w + col_gap_in)
        y = H - top_in - (r + 1) * panel_h - r * row_gap_in
        axes.append(fig.add_axes((x / W, y / H, panel_w / W, panel_h / H)))
    return axes


def _number_labels(ax, renderer, points: list[tuple[float, float, int]], bars: list[tuple[float, float, float, float]] | None = None) -> list:
    """The setting numbers beside their points, where they overlap no other text and no other
    point (a number without room is left out: the marker and colour still tell the setting)."""
    ax.get_xlim(), ax.get_ylim()  # the final limits (autoscaled to everything plotted); the numbers stay inside the axes
    placer = _Placer(ax, renderer)
    to_px = ax.transData.transform
    for i, (x, y, _) in enumerate(points):
        placer.outline(to_px(np.array([[x, y]])) + np.array([[-4, -4], [4, 4], [-4, 4], [4, -4], [0, 0]]), i)
    for j, (x, y, ex, ey) in enumerate(bars or []):  # error bars: no number sits on one, its own included
        t = np.linspace(-1, 1, 21)[:, None]
        placer.outline(to_px(np.c_[x + t[:, 0] * ex, np.full(21, y)]), -1 - j)
        placer.outline(to_px(np.c_[np.full(21, x), y + t[:, 0] * ey]), -1 - j)
    out = []
    for i, (x, y, number) in enumerate(points):
        t = ax.annotate(str(number), (x, y), xytext=(0, 0), textcoords="offset pixels", fontsize=7, color="#111111")
        if placer.place(t, to_px(np.array([x, y])), 5.0, i, drop=True):
            out.append(t)
    return out


def _split_settings(settings, failed) -> tuple[list, list]:
    """Settings with rows, and (number, label, reason) of those without (failed ones)."""
    ok = [(n, label, rows) for n, label, rows in settings if rows]
    gone = list(failed or []) + [(n, label, "no rows") for n, label, rows in settings if not rows]
    return ok, sorted(gone, key=lambda t: t[0])


def contrast_noise_chart(settings, sphere_diameters_mm: dict[str, float], path: str | os.PathLike, *, title: str | None = None,
                         failed: Sequence[tuple[int, str, str]] = ()) -> Path:
    """Percent contrast against background variability, one panel per sphere (PNG).

    Every setting has its own colour and marker (:func:`setting_style`) and its number beside
    its points where there is room; a value outside an acceptance band is a hollow marker.
    The key lists every setting, and the settings that could not be measured with the reason.

    Parameters
    ----------
    settings : list of (number, label, rows)
        Each setting's :class:`~phantometry.results.Measurement` rows; ``percent_contrast``
        and ``background_variability_pct`` per sphere (NEMA NU 2 Q_H or Q_C, and N), with their
        standard uncertainties drawn as error bars where present.
    sphere_diameters_mm : dict
        Sphere ROI name -> diameter (mm); panels in order of diameter.
    path : path
        Output PNG.
    failed : list of (number, label, reason)
        Settings that could not be measured.

    Returns
    -------
    Path
    """
    return _save_chart(draw_contrast_noise(settings, sphere_diameters_mm, title=title, failed=failed), path)


def draw_contrast_noise(settings, sphere_diameters_mm: dict[str, float], *, title: str | None = None,
                        failed: Sequence[tuple[int, str, str]] = ()):
    """The figure of :func:`contrast_noise_chart` (not saved)."""
    from matplotlib.lines import Line2D

    settings, failed = _split_settings(settings, failed)
    spheres = sorted(sphere_diameters_mm, key=lambda n: sphere_diameters_mm[n])
    ncols = 3
    nrows = max(1, int(np.ceil(len(spheres) / ncols)))
    panel_w, panel_h, col_gap, row_gap, left = 2.9, 2.45, 0.75, 0.95, 0.75
    width = left + ncols * panel_w + (ncols - 1) * col_gap + 0.25
    fig, renderer = _new_figure(width, 6.0)
    any_fail = any(r.verdict == "fail" for _, _, rows in settings for r in rows
                   if r.metric in ("percent_contrast", "background_variability_pct"))
    extra = [(Line2D([], [], ls="none", marker="o", ms=6.5, mfc="white", mec=_MARKER_EDGE, mew=1.2), "hollow: outside an acceptance band")] if any_fail else []
    key = SettingsKey(settings, failed, width, renderer, fig.dpi, extra)
    head = title or "Contrast against noise, one point per reconstruction setting (bars: standard uncertainty)"
    head = _wrap(head, width * fig.dpi - 20, 10, renderer)
    top = 0.2 + (head.count("\n") + 1) * 0.2 + 0.35
    grid_h = nrows * panel_h + (nrows - 1) * row_gap
    bottom = 0.3 + key.height_in + 0.7
    fig.set_size_inches(width, top + grid_h + bottom)
    fig.suptitle(head, fontsize=10, y=1 - 0.12 / fig.get_figheight(), va="top")
    axes = _panel_grid(fig, len(spheres), ncols, panel_w, panel_h, top, bottom, left, col_gap, row_gap)
    keyed = [(number, _by_key(rows)) for number, _, rows in settings]
    for ax, name in zip(axes, spheres):
        pts: list[tuple[float, float, int]] = []
        bars: list[tuple[float, float, float, float]] = []
        for number, d in keyed:
            pc = (d.get((name, "percent_contrast")) or [None])[0]
            bv = (d.get((name, "background_variability_pct")) or [None])[0]
            if pc is None or bv is None or not (_finite(pc.value) and _finite(bv.value)):
                continue
            bad = any(r.verdict == "fail" for r in d.get((name, "percent_contrast"), []) + d.get((name, "background_variability_pct"), []))
            st = setting_style(number)
            ax.errorbar([bv.value], [pc.value], xerr=[bv.uncertainty if _finite(bv.uncertainty) else 0.0],
                        yerr=[pc.uncertainty if _finite(pc.uncertainty) else 0.0], fmt="none", ecolor=st["color"], alpha=0.55,
                        elinewidth=0.9, capsize=2, zorder=2)
            ax.plot([bv.value], [pc.value], ls="none", ms=6.5, mec=_MARKER_EDGE, mew=1.2 if bad else 0.6,
                    mfc="white" if bad else st["color"], marker=st["marker"], color=st["color"], zorder=3, gid=f"setting_{number}")
            pts.append((bv.value, pc.value, number))
            bars.append((bv.value, pc.value, bv.uncertainty if _finite(bv.uncertainty) else 0.0,
                         pc.uncertainty if _finite(pc.uncertainty) else 0.0))
        ax.margins(0.18)
        ax.set_title(f"{sphere_diameters_mm[name]:g} mm sphere", fontsize=9)
        ax.set_xlabel("background variability N (%)", fontsize=8)
        ax.set_ylabel("percent contrast Q (%)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
        if pts:
            _number_labels(ax, renderer, pts, bars)
    key.draw(fig, bottom - 0.7)
    return fig


def _save_chart(fig, path: str | os.PathLike) -> Path:
    return _save(fig, path)


def _spread(desired: np.ndarray, gap: float, lo: float, hi: float) -> np.ndarray:
    """Positions as close as possible to ``desired`` (display pixels), at least ``gap`` apart,
    within [lo, hi] where room allows (labels at the ends of lines, in order)."""
    order = np.argsort(desired)
    y = np.asarray(desired, float)[order].copy()
    for i in range(1, len(y)):  # push up
        y[i] = max(y[i], y[i - 1] + gap)
    if len(y) and y[-1] > hi:  # then down from the top, keeping the gaps
        y[-1] = hi
        for i in range(len(y) - 2, -1, -1):
            y[i] = min(y[i], y[i + 1] - gap)
    if len(y) and y[0] < lo:
        y += lo - y[0]
    out = np.empty_like(y)
    out[order] = y
    return out


def recovery_curves_chart(
    settings,
    sphere_diameters_mm: dict[str, float],
    path: str | os.PathLike,
    *,
    hot: dict[str, bool] | None = None,
    metrics: tuple[str, ...] = ("rc_max", "rc_mean", "rc_peak"),
    title: str | None = None,
    failed: Sequence[tuple[int, str, str]] = (),
) -> Path:
    """Recovery coefficients against sphere diameter, one line per setting (PNG).

    Parameters
    ----------
    settings : list of (number, label, rows)
        Rows with ``rc_max``, ``rc_mean``, ``rc_peak`` per hot sphere, and band limits
        (``band_low``/``band_high``) where bands were applied (grey boxes, drawn only then).
    sphere_diameters_mm : dict
        Sphere ROI name -> diameter (mm).
    hot : dict, optional
        Sphere name -> hot; cold spheres are left out.
    metrics : tuple of str
        Panels, those present in the rows.
    failed : list of (number, label, reason)
        Settings that could not be measured (listed under the chart).

    Returns
    -------
    Path
    """
    return _save_chart(draw_recovery_curves(settings, sphere_diameters_mm, hot=hot, metrics=metrics, title=title, failed=failed), path)


def draw_recovery_curves(settings, sphere_diameters_mm: dict[str, float], *, hot: dict[str, bool] | None = None,
                         metrics: tuple[str, ...] = ("rc_max", "rc_mean", "rc_peak"), title: str | None = None,
                         failed: Sequence[tuple[int, str, str]] = ()):
    """The figure of :func:`recovery_curves_chart` (not saved)."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Rectangle

    settings, failed = _split_settings(settings, failed)
    spheres = sorted((n for n in sphere_diameters_mm if (hot or {}).get(n, True)), key=lambda n: sphere_diameters_mm[n])
    keyed = [(number, label, _by_key(rows)) for number, label, rows in settings]
    present = [m for m in metrics if any((s, m) in d for _, _, d in keyed for s in spheres)] or [metrics[0]]
    has_bands = any(_finite(r.band_low) or _finite(r.band_high) for _, _, d in keyed for s in spheres for m in present for r in d.get((s, m), []))
    any_fail = any(r.verdict == "fail" for _, _, d in keyed for s in spheres for m in present for r in d.get((s, m), []))
    panel_w, panel_h, col_gap, left = 3.4, 3.1, 0.95, 0.75
    width = left + len(present) * panel_w + (len(present) - 1) * col_gap + 0.6
    fig, renderer = _new_figure(width, 6.0)
    extra = []
    if has_bands:
        extra.append((Rectangle((0, 0), 1, 1, fc="#e4e4e4", ec="#999999", hatch="///"), "acceptance band"))
    if any_fail:
        extra.append((Line2D([], [], ls="none", marker="o", ms=6.5, mfc="white", mec=_MARKER_EDGE, mew=1.2), "hollow: outside the band"))
    key = SettingsKey(settings, failed, width, renderer, fig.dpi, extra)
    head = title or ("Recovery coefficients of every setting (bars: standard uncertainty; numbers at the right end of each line)")
    head = _wrap(head, width * fig.dpi - 20, 10, renderer)
    top = 0.2 + (head.count("\n") + 1) * 0.2 + 0.35
    bottom = 0.3 + key.height_in + 0.7
    fig.set_size_inches(width, top + panel_h + bottom)
    fig.suptitle(head, fontsize=10, y=1 - 0.12 / fig.get_figheight(), va="top")
    axes = _panel_grid(fig, len(present), len(present), panel_w, panel_h, top, bottom, left, col_gap)
    n_set = len(keyed)
    jitter = np.linspace(-0.35, 0.35, n_set) if n_set > 1 else np.zeros(1)
    d_max = max((sphere_diameters_mm[s] for s in spheres), default=1.0)
    for ax, metric in zip(axes, present):
        seen = set()
        for _, _, d in keyed:  # bands: one grey box per (sphere, band), drawn once
            for s in spheres:
                for r in d.get((s, metric), []):
                    if (_finite(r.band_low) or _finite(r.band_high)) and (s, r.band, r.band_low, r.band_high) not in seen:
                        seen.add((s, r.band, r.band_low, r.band_high))
                        lo = r.band_low if _finite(r.band_low) else 0.0
                        hi = r.band_high if _finite(r.band_high) else lo + 0.5
                        x = sphere_diameters_mm[s]
                        ax.add_patch(Rectangle((x - 1.2, lo), 2.4, hi - lo, fc="#e4e4e4", ec="#999999", lw=0.6, hatch="///", zorder=0))
        ends = []  # (x, y, number) of each line's last point
        for (number, label, d), dx in zip(keyed, jitter):
            xs, ys, es, fails = [], [], [], []
            for s in spheres:
                rs = d.get((s, metric))
                if not rs or not _finite(rs[0].value):
                    continue
                xs.append(sphere_diameters_mm[s] + dx)
                ys.append(rs[0].value)
                es.append(rs[0].uncertainty if _finite(rs[0].uncertainty) else 0.0)
                fails.append(any(r.verdict == "fail" for r in rs))
            if not xs:
                continue
            st = setting_style(number)
            ax.plot(xs, ys, color=st["color"], lw=1.1, zorder=1, gid=f"setting_{number}")
            ax.errorbar(xs, ys, yerr=es, fmt="none", ecolor=st["color"], alpha=0.5, elinewidth=0.8, capsize=1.5, zorder=2)
            for x, y, bad in zip(xs, ys, fails):
                ax.plot([x], [y], ls="none", marker=st["marker"], ms=5.5, mec=_MARKER_EDGE, mew=1.2 if bad else 0.5,
                        mfc="white" if bad else st["color"], zorder=3)
            ends.append((xs[-1], ys[-1], number))
        ax.set_title("RC " + metric.removeprefix("rc_"), fontsize=9)
        ax.set_xlabel("sphere diameter (mm)", fontsize=8)
        ax.set_ylabel("recovery coefficient", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
        ax.set_ylim(bottom=0)
        ax.set_xlim(right=d_max + 5.5)
        _end_labels(ax, renderer, ends)
    key.draw(fig, bottom - 0.7)
    return fig


def _end_labels(ax, renderer, ends: list[tuple[float, float, int]]) -> None:
    """Each line's number at its right end, spread vertically so no two overlap (a thin leader
    line joins a moved number to its point)."""
    if not ends:
        return
    ax.get_xlim(), ax.get_ylim()  # the final limits
    to_px = ax.transData.transform
    pts = np.array([to_px((x, y)) for x, y, _ in ends])
    probe = ax.text(0, 0, "88", fontsize=7)
    h = _extent(probe, renderer)
    probe.remove()
    gap = (h[3] - h[1]) + 1.5
    bb = ax.get_window_extent(renderer)
    ys = _spread(pts[:, 1], gap, bb.y0 + gap / 2, bb.y1 - gap / 2)
    x_text = float(np.max(pts[:, 0])) + 10
    for (x, y, number), p, yt in zip(ends, pts, ys):
        t = ax.annotate(str(number), (x, y), xytext=(x_text - p[0], yt - p[1]), textcoords="offset pixels", fontsize=7, va="center",
                        ha="left", arrowprops=dict(arrowstyle="-", lw=0.5, color="#777777", shrinkA=0, shrinkB=2))
        t.set_gid(f"end_label_{number}")


def recovery_curve_picture(
    rows: "Sequence[Measurement]",
    hot_spheres: Sequence[tuple[str, float, float, float]],
    diameters_mm: Sequence[float],
    fit: "ResolutionFit | None",
    band_sets: "Sequence[BandSet]",
    path: str | os.PathLike,
    *,
    isocontour_fraction: float = 0.5,
    peak_diameter_mm: float = 12.41,
) -> Path:
    """Measured recovery coefficients with the fitted blurred-sphere curves and the bands (PNG);
    see :func:`draw_recovery_curve`."""
    fig = draw_recovery_curve(rows, hot_spheres, diameters_mm, fit, band_sets, isocontour_fraction=isocontour_fraction,
                              peak_diameter_mm=peak_diameter_mm)
    return _save(fig, path)


def draw_recovery_curve(
    rows: "Sequence[Measurement]",
    hot_spheres: Sequence[tuple[str, float, float, float]],
    diameters_mm: Sequence[float],
    fit: "ResolutionFit | None",
    band_sets: "Sequence[BandSet]",
    *,
    isocontour_fraction: float = 0.5,
    peak_diameter_mm: float = 12.41,
):
    """The figure of :func:`recovery_curve_picture` (not saved).

    One panel per metric (RC max, RC mean, RC peak), y from 0: the hot spheres' values with
    their standard uncertainties (bars), the model curve of the effective-resolution fit
    (:mod:`phantometry.metrics.resolution`, continuous in diameter, at the fitted FWHM, sphere
    scale and background), and, when band sets were applied, their boxes (values outside a
    band: hollow red markers). One key under the panels says what each mark is; when RC max
    lies above the noise-free model, a line says why (the maximum of a noisy image is biased up).

    Parameters
    ----------
    rows : the measurement rows.
    hot_spheres : (roi, inner diameter mm, wall mm, true concentration Bq/mL) of each hot sphere.
    diameters_mm : every sphere's diameter (the axis range).
    fit : the effective-resolution fit, or None (no model curves).
    band_sets : the band sets applied.
    """
    from matplotlib.lines import Line2D
    from matplotlib.patches import Rectangle

    from .metrics.resolution import model_rc_max, model_rc_mean, model_rc_peak

    rows_by = _by_key(rows)
    metrics = ("rc_max", "rc_mean", "rc_peak")
    width = 13.0
    fig, renderer = _new_figure(width, 5.4)
    d_all = list(diameters_mm)
    d_grid = np.linspace(max(2.0, min(d_all) * 0.6), max(d_all) * 1.12, 60)
    band_sets = list(band_sets)
    hatches = ("///", "\\\\\\", "...", "xxx")
    handles: dict[str, Any] = {}
    above_model = False
    if fit is not None:
        lo, hi = fit.ci95_mm
        head = f"Effective FWHM {fit.fwhm_mm:.2f} mm (95 % interval {lo:.2f}-{hi:.2f} mm), blurred-sphere fit"
    else:
        head = "Recovery coefficients of the hot spheres (no resolution fit)"
    head += f" | bands: {', '.join(b.name for b in band_sets)}" if band_sets else " | no acceptance bands applied"
    panel_w, panel_h, gap, left = 3.55, 3.2, 0.75, 0.7
    axes = _panel_grid(fig, 3, 3, panel_w, panel_h, 0.75, 1.4, left, gap)
    for ax, metric in zip(axes, metrics):
        n_sets = max(1, len(band_sets))
        for j, bs in enumerate(band_sets):
            for name, diameter, _, _ in hot_spheres:
                e = bs.entry(name, metric)
                if e is None:
                    continue
                lo_b = e.low if e.low is not None else 0.0
                hi_b = e.high if e.high is not None else 1.5
                w = 2.4 / n_sets
                ax.add_patch(Rectangle((diameter - 1.2 + j * w, lo_b), w, hi_b - lo_b, fc="#e4e4e4", ec="#999999", lw=0.6,
                                       hatch=hatches[j % len(hatches)], zorder=0))
                handles.setdefault(f"band {bs.name}", Rectangle((0, 0), 1, 1, fc="#e4e4e4", ec="#999999", hatch=hatches[j % len(hatches)]))
        model_at = {}
        if fit is not None and hot_spheres:
            wall = float(np.mean([h[2] for h in hot_spheres]))
            true = float(np.mean([h[3] for h in hot_spheres]))
            k = fit.sphere_scale
            ratio = k * true / fit.background_bq_ml if fit.background_bq_ml > 0 else 1e9
            kw = dict(activity_ratio=ratio, wall_mm=wall, voxel_mm=fit.voxel_mm)
            if metric == "rc_max":
                model = lambda d: model_rc_max(d, fit.fwhm_mm, **kw)  # noqa: E731
            elif metric == "rc_mean":
                model = lambda d: model_rc_mean(d, fit.fwhm_mm, fraction=isocontour_fraction, **kw)  # noqa: E731
            else:
                model = lambda d: model_rc_peak(d, fit.fwhm_mm, peak_diameter_mm=peak_diameter_mm, **kw)  # noqa: E731
            ax.plot(d_grid, k * np.asarray(model(d_grid)), color="#0072B2", lw=1.3, zorder=1, gid=f"model_{metric}")
            handles.setdefault(f"model (noise-free), FWHM {fit.fwhm_mm:.2f} mm", Line2D([], [], color="#0072B2", lw=1.3))
            model_at = {name: float(k * np.asarray(model(np.array([d])))[0]) for name, d, _, _ in hot_spheres}
        xs, ys, es, fails = [], [], [], []
        for name, diameter, _, _ in hot_spheres:
            rs = rows_by.get((name, metric))
            if not rs or not _finite(rs[0].value):
                continue
            xs.append(diameter)
            ys.append(rs[0].value)
            u = rs[0].uncertainty if _finite(rs[0].uncertainty) else 0.0
            es.append(u)
            fails.append(any(r.verdict == "fail" for r in rs))
            if metric == "rc_max" and name in model_at and rs[0].value > model_at[name] + max(2 * u, 0.01):
                above_model = True
        if xs:
            ax.errorbar(xs, ys, yerr=es, fmt="none", ecolor="#666666", elinewidth=0.8, capsize=2, zorder=2)
            ok = [i for i, f in enumerate(fails) if not f]
            bad = [i for i, f in enumerate(fails) if f]
            ax.plot([xs[i] for i in ok], [ys[i] for i in ok], "o", color="black", ms=5, ls="none", zorder=3, gid=f"measured_{metric}")
            handles.setdefault("measured (bars: standard uncertainty)", Line2D([], [], marker="o", color="black", ls="none", ms=5))
            if bad:
                ax.plot([xs[i] for i in bad], [ys[i] for i in bad], "o", color=_FAIL_COLOUR, mfc="white", mew=1.3, ms=6.5, ls="none", zorder=4)
                handles.setdefault("outside a band", Line2D([], [], marker="o", color=_FAIL_COLOUR, mfc="white", mew=1.3, ls="none"))
        ax.set_title("RC " + metric.removeprefix("rc_"), fontsize=9)
        ax.set_xlabel("sphere inner diameter (mm)", fontsize=8)
        ax.set_ylabel("recovery coefficient", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
        ax.set_ylim(bottom=0)
    fig.suptitle(_wrap(head, width * fig.dpi - 20, 9.5, renderer), fontsize=9.5, y=1 - 0.1 / fig.get_figheight(), va="top")
    if handles:
        leg = fig.legend(list(handles.values()), list(handles), loc="upper center", bbox_to_anchor=(0.5, 1.02 / fig.get_figheight()),
                         ncol=len(handles), fontsize=8, frameon=False)
        leg.set_gid("key")
    if above_model:
        fig.text(0.5, 0.55 / fig.get_figheight(), "RC max above the noise-free model (larger spheres): expected, the hottest of many noisy "
                 "voxels lies above their true level (noise bias of a maximum).", ha="center", va="bottom", fontsize=8, color="#333333")
    return fig


_FAIL_COLOUR = "#b00020"


# ---------------------------------------------------------------------------- for the kinds' charts
#: Public names of the layout helpers, for the kinds' own comparison charts.
new_figure = _new_figure
panel_grid = _panel_grid
wrap_text = _wrap
save_chart = _save_chart
