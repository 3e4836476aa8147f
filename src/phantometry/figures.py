"""Pictures: ROI overlays and diagnostics (matplotlib, Agg backend, no screen needed).

Visual language: greyscale images, ROI outlines in one colour per ROI kind with a line style
that also tells them apart in greyscale print (solid spheres, dashed background, dotted
inserts), labels beside every sphere.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Sequence

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .bands import BandSet
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


def _show_plane(ax, plane, vmax: float, title: str):
    """A resampled plane in inverted greyscale (0 white, ``vmax`` black), in plane mm.

    Drawn as a mesh of pixel squares: Agg fills the squares directly, so no canvas-sized
    floating-point copy of the image is made (an ``imshow`` resamples the image to the
    canvas in floating point first, which costs more memory than a small volume).
    Returns the mesh (for a colour bar).
    """
    nv, nu = plane.values.shape
    p = plane.pixel_mm
    u_edges = (np.arange(nu + 1) - 0.5) * p
    v_edges = (np.arange(nv + 1) - 0.5) * p
    mesh = ax.pcolormesh(u_edges, v_edges, np.nan_to_num(plane.values), cmap="gray_r", vmin=0, vmax=vmax, shading="flat", antialiased=False,
                  edgecolors="none", linewidth=0)
    ax.set_xlim(u_edges[0], u_edges[-1])
    ax.set_ylim(v_edges[0], v_edges[-1])
    ax.set_title(title, fontsize=9)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_aspect("equal")
    return mesh


def _scale_bar(ax, plane, length_mm: float) -> None:
    """A scale bar of ``length_mm`` in the lower left corner of a plane view, labelled in mm."""
    nv, nu = plane.values.shape
    p = plane.pixel_mm
    u0, v0 = 0.05 * nu * p, 0.05 * nv * p
    ax.plot([u0, u0 + length_mm], [v0, v0], color="black", lw=3, solid_capstyle="butt")
    ax.text(u0 + length_mm / 2, v0 + 0.015 * nv * p, f"{length_mm:g} mm", ha="center", va="bottom", fontsize=8, bbox=_LABEL_BOX)


def _circle(ax, uv, diameter, **kw) -> None:
    from matplotlib.patches import Circle

    ax.add_patch(Circle((float(uv[0]), float(uv[1])), diameter / 2, fill=False, **kw))


#: Outline colour and line style of each shape role (colour tells hot from cold; the line style
#: tells the ROI kinds apart in greyscale print too).
_ROLE_STYLE = {
    "hot": dict(color="#c03000", lw=1.4, ls="-"),
    "cold": dict(color="#0050c0", lw=1.4, ls="-"),
    "background": dict(color="#207020", lw=1.0, ls="--"),
    "insert": dict(color="#7030a0", lw=1.2, ls=":"),
    "voi": dict(color="#207020", lw=1.2, ls="-"),
    "search": dict(color="#c03000", lw=1.0, ls="--"),
    "peak": dict(color="#0050c0", lw=1.5, ls="-"),
    "guide": dict(color="#808080", lw=0.8, ls="--"),
    "outline": dict(color="#e07000", lw=1.2, ls="--"),  # an object's measured outline (e.g. a cylinder's wall)
}
_LABEL_BOX = dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8)


def _draw_shape(ax, shape, view_width_mm: float) -> None:
    """One :class:`~phantometry.phantoms.base.Shape` on a view (plane mm)."""
    from matplotlib.patches import Circle, Polygon, Rectangle

    st = _ROLE_STYLE[shape.role]
    if shape.kind == "circle":
        u, v = (float(x) for x in shape.centre_uv)
        r = float(shape.size_mm) / 2
        ax.add_patch(Circle((u, v), r, fill=False, color=st["color"], lw=st["lw"], ls=st["ls"]))
        if shape.label is not None:
            if shape.role == "background":  # a number in the middle of the circle
                ax.text(u, v, shape.label, ha="center", va="center", fontsize=7, color=st["color"])
            elif shape.label_below:
                ax.annotate(shape.label, (u, v - r - 2), ha="center", va="top", fontsize=8)
            else:
                ax.annotate(shape.label, (u, v + r + 0.06 * r + 0.6), ha="center", va="bottom", fontsize=8, color="black", bbox=_LABEL_BOX)
    elif shape.kind == "rect":
        u, v = (float(x) for x in shape.centre_uv)
        w, h = shape.size_mm
        ax.add_patch(Rectangle((u - w / 2, v - h / 2), w, h, fill=False, color=st["color"], lw=st["lw"], ls=st["ls"]))
    elif shape.kind == "marker":
        u, v = (float(x) for x in shape.centre_uv)
        ax.plot([u], [v], marker="+", color=st["color"], ms=9, mew=st["lw"])
    elif shape.kind == "hline":
        v = float(shape.centre_uv[1])
        ax.plot([0, view_width_mm], [v, v], color=st["color"], lw=0.8, ls=st["ls"])
    elif shape.kind == "contour":
        ax.add_patch(Polygon(np.asarray(shape.points_uv, float), closed=True, fill=False, color=st["color"], lw=st["lw"], ls=st["ls"]))


def overlay_picture(overlay: "Overlay", path: str | os.PathLike) -> Path:
    """Draw an analysis's overlay (:meth:`phantometry.phantoms.base.Analysis.overlay`): its
    views side by side, every ROI outlined (PNG)."""
    plt = _plt()
    n = len(overlay.views)
    ratios = overlay.width_ratios or [1.0] * n
    fig, axes = plt.subplots(1, n, figsize=(5.4 * sum(ratios), 5.8), gridspec_kw={"width_ratios": ratios}, squeeze=False)
    for ax, view in zip(axes[0], overlay.views):
        vmax = view.vmax if view.vmax else (float(np.nanpercentile(view.plane.values, 99.5)) or 1.0)
        mesh = _show_plane(ax, view.plane, vmax, view.title)
        width = view.plane.values.shape[1] * view.plane.pixel_mm
        for shape in view.shapes:
            _draw_shape(ax, shape, width)
        if view.scale_bar_mm:
            _scale_bar(ax, view.plane, view.scale_bar_mm)
        if view.colorbar:
            bar = fig.colorbar(mesh, ax=ax, fraction=0.046, pad=0.02)
            bar.set_label(view.colorbar, fontsize=8)
            bar.ax.tick_params(labelsize=7)
    fig.suptitle(overlay.title, fontsize=10)
    bars = any(view.colorbar for view in overlay.views)  # colour bars need room for their ticks and label
    return _finish(fig, path, dpi=110, margins=dict(left=0.01, right=0.93 if bars else 0.99, bottom=0.05, top=0.9, wspace=0.3 if bars else 0.04))


def diagnostic_picture(volume: "Volume", path: str | os.PathLike) -> Path:
    """Three orthogonal maximum-intensity projections, for a failed localisation (PNG)."""
    plt = _plt()
    fig, axes = plt.subplots(1, 3, figsize=(12, 4.2))
    data = np.nan_to_num(volume.data)
    vmax = float(np.percentile(data, 99.9)) or 1.0
    for ax, axis, title in zip(axes, (0, 1, 2), ("transverse MIP", "coronal MIP", "sagittal MIP")):
        ax.imshow(data.max(axis=axis), cmap="gray_r", vmin=0, vmax=vmax, origin="lower", aspect="auto")
        ax.set_title(title, fontsize=9)
        ax.set_xticks([])
        ax.set_yticks([])
    fig.suptitle("Phantom not found: maximum-intensity projections of the image as loaded", fontsize=10)
    fig.tight_layout()
    out = Path(path)
    fig.savefig(out, dpi=90)
    plt.close(fig)
    return out


# ----------------------------------------------------------------------------- comparison charts
# Settings are drawn in black with one marker shape per setting and their number beside each
# point; colour is kept for meaning only: a value outside its acceptance band is drawn as a red
# open marker (still told apart in greyscale by being open), the bands as light grey boxes.
_SETTING_MARKERS = "osD^vP*Xhp<>"
_FAIL_COLOUR = "#b00020"


def _by_key(rows) -> dict:
    """(roi, metric) -> list of rows (several when several band sets judged the same value)."""
    out: dict = {}
    for r in rows:
        out.setdefault((r.roi, r.metric), []).append(r)
    return out


def _finite(v) -> bool:
    return v is not None and np.isfinite(v)


def _legend_axis(fig, ax, settings) -> None:
    ax.axis("off")
    lines = [f"{number}: {label}" for number, label, _ in settings]
    ncol = 1 if len(lines) <= 6 else 2
    per = int(np.ceil(len(lines) / ncol))
    for c in range(ncol):
        ax.text(0.01 + 0.5 * c, 1.0, "\n".join(lines[c * per:(c + 1) * per]), va="top", ha="left", fontsize=7.5,
                family="monospace", transform=ax.transAxes)


def contrast_noise_chart(settings, sphere_diameters_mm: dict[str, float], path: str | os.PathLike, *, title: str | None = None) -> Path:
    """Percent contrast against background variability, one panel per sphere (PNG).

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

    Returns
    -------
    Path
    """
    plt = _plt()
    spheres = sorted(sphere_diameters_mm, key=lambda n: sphere_diameters_mm[n])
    ncols = 3
    nrows = int(np.ceil(len(spheres) / ncols))
    legend_h = 0.22 * int(np.ceil(len(settings) / (1 if len(settings) <= 6 else 2))) + 0.4
    fig = plt.figure(figsize=(11, 3.4 * nrows + legend_h))
    gs = fig.add_gridspec(nrows + 1, ncols, height_ratios=[3.4] * nrows + [legend_h])
    keyed = [(number, _by_key(rows)) for number, _, rows in settings]
    for n, name in enumerate(spheres):
        ax = fig.add_subplot(gs[n // ncols, n % ncols])
        pts = []  # (x, y, x unc, y unc, failed, number)
        for number, d in keyed:
            pc = (d.get((name, "percent_contrast")) or [None])[0]
            bv = (d.get((name, "background_variability_pct")) or [None])[0]
            if pc is None or bv is None or not (_finite(pc.value) and _finite(bv.value)):
                continue
            failed = any(r.verdict == "fail" for r in d.get((name, "percent_contrast"), []) + d.get((name, "background_variability_pct"), []))
            pts.append((bv.value, pc.value, bv.uncertainty if _finite(bv.uncertainty) else 0.0,
                        pc.uncertainty if _finite(pc.uncertainty) else 0.0, failed, number))
        if pts:
            x, y, ex, ey = (np.array([p[i] for p in pts], float) for i in range(4))
            # every error bar of the panel in one call, then the markers grouped by shape and verdict
            ax.errorbar(x, y, xerr=ex, yerr=ey, fmt="none", ecolor="#777777", elinewidth=0.8, capsize=2, zorder=2)
            groups: dict = {}
            for i, p in enumerate(pts):
                groups.setdefault((_SETTING_MARKERS[(p[5] - 1) % len(_SETTING_MARKERS)], p[4]), []).append(i)
            for (marker, failed), idx in groups.items():
                colour = _FAIL_COLOUR if failed else "black"
                ax.plot(x[idx], y[idx], marker, ms=5, color=colour, mfc="white" if failed else colour, ls="none", zorder=3)
            for p in pts:
                ax.annotate(str(p[5]), (p[0], p[1]), xytext=(4, 3), textcoords="offset points", fontsize=7)
        ax.margins(0.15)
        ax.set_title(f"{name.replace('sphere_', '')} sphere", fontsize=9)
        ax.set_xlabel("background variability N (%)", fontsize=8)
        ax.set_ylabel("percent contrast Q (%)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
    _legend_axis(fig, fig.add_subplot(gs[nrows, :]), settings)
    fig.suptitle(title or "Contrast against noise, one point per reconstruction setting (bars: standard uncertainty)", fontsize=10)
    height = fig.get_figheight()  # fixed margins in inches (a tight layout costs a second drawing)
    fig.subplots_adjust(left=0.06, right=0.99, bottom=0.1 / height, top=1 - 0.7 / height, wspace=0.25, hspace=0.8 / 3.4)
    out = Path(path)
    fig.savefig(out, dpi=100)
    plt.close(fig)
    return out


def recovery_curves_chart(
    settings,
    sphere_diameters_mm: dict[str, float],
    path: str | os.PathLike,
    *,
    hot: dict[str, bool] | None = None,
    metrics: tuple[str, ...] = ("rc_max", "rc_mean", "rc_peak"),
    title: str | None = None,
) -> Path:
    """Recovery coefficients against sphere diameter, every setting over the bands (PNG).

    Parameters
    ----------
    settings : list of (number, label, rows)
        Rows with ``rc_max``, ``rc_mean``, ``rc_peak`` per hot sphere, and band limits
        (``band_low``/``band_high``) where bands were applied.
    sphere_diameters_mm : dict
        Sphere ROI name -> diameter (mm).
    hot : dict, optional
        Sphere name -> hot; cold spheres are left out.
    metrics : tuple of str
        Panels, those present in the rows.

    Returns
    -------
    Path
    """
    plt = _plt()
    from matplotlib.patches import Rectangle

    spheres = sorted((n for n in sphere_diameters_mm if (hot or {}).get(n, True)), key=lambda n: sphere_diameters_mm[n])
    keyed = [(number, label, _by_key(rows)) for number, label, rows in settings]
    present = [m for m in metrics if any((s, m) in d for _, _, d in keyed for s in spheres)]
    if not present:
        present = [metrics[0]]
    legend_h = 0.22 * int(np.ceil(len(settings) / (1 if len(settings) <= 6 else 2))) + 0.4
    fig = plt.figure(figsize=(4.0 * len(present) + 1, 4.2 + legend_h))
    gs = fig.add_gridspec(2, len(present), height_ratios=[4.2, legend_h])
    jitter = np.linspace(-0.35, 0.35, max(1, len(settings))) if len(settings) > 1 else np.zeros(1)
    for p, metric in enumerate(present):
        ax = fig.add_subplot(gs[0, p])
        # bands: one grey box per (sphere, band), drawn once
        seen = set()
        for _, _, d in keyed:
            for s in spheres:
                for r in d.get((s, metric), []):
                    if _finite(r.band_low) and _finite(r.band_high) and (s, r.band, r.band_low, r.band_high) not in seen:
                        seen.add((s, r.band, r.band_low, r.band_high))
                        x = sphere_diameters_mm[s]
                        ax.add_patch(Rectangle((x - 1.2, r.band_low), 2.4, r.band_high - r.band_low, fc="#e4e4e4", ec="#999999", lw=0.6, hatch="///", zorder=0))
        bars: tuple[list, list, list] = ([], [], [])  # every setting's error bars, drawn in one call
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
            marker = _SETTING_MARKERS[(number - 1) % len(_SETTING_MARKERS)]
            ax.plot(xs, ys, color="#555555", lw=0.8, zorder=1)
            bars[0].extend(xs)
            bars[1].extend(ys)
            bars[2].extend(es)
            ok = [i for i, f in enumerate(fails) if not f]
            bad = [i for i, f in enumerate(fails) if f]
            ax.plot([xs[i] for i in ok], [ys[i] for i in ok], marker, color="black", ms=4.5, ls="none", zorder=3)
            ax.plot([xs[i] for i in bad], [ys[i] for i in bad], marker, color=_FAIL_COLOUR, mfc="white", mew=1.3, ms=6, ls="none", zorder=4)
            ax.annotate(str(number), (xs[-1], ys[-1]), xytext=(5, 0), textcoords="offset points", fontsize=7, va="center")
        if bars[0]:
            ax.errorbar(bars[0], bars[1], yerr=bars[2], fmt="none", ecolor="#888888", elinewidth=0.7, capsize=1.5, zorder=2)
        ax.set_title("RC " + metric.removeprefix("rc_"), fontsize=9)
        ax.set_xlabel("sphere diameter (mm)", fontsize=8)
        ax.set_ylabel("recovery coefficient", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
    _legend_axis(fig, fig.add_subplot(gs[1, :]), settings)
    fig.suptitle(title or "Recovery coefficients; grey boxes: acceptance bands; red open markers: outside the band", fontsize=10)
    height = fig.get_figheight()  # fixed margins in inches (a tight layout costs a second drawing)
    fig.subplots_adjust(left=0.7 / fig.get_figwidth(), right=0.99, bottom=0.1 / height, top=1 - 0.5 / height, wspace=0.28, hspace=0.7 / 4.2)
    out = Path(path)
    fig.savefig(out, dpi=100)
    plt.close(fig)
    return out


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
    """Measured recovery coefficients with the fitted blurred-sphere curves and the bands (PNG).

    One panel per metric (RC max, RC mean, RC peak): the hot spheres' values with their
    standard uncertainties (bars), the model curve of the effective-resolution fit
    (:mod:`phantometry.metrics.resolution`, continuous in diameter, at the fitted FWHM, sphere
    scale and background), and the active acceptance bands as grey hatched boxes; values
    outside a band are red open markers.

    Parameters
    ----------
    rows : the measurement rows.
    hot_spheres : (roi, inner diameter mm, wall mm, true concentration Bq/mL) of each hot sphere.
    diameters_mm : every sphere's diameter (the axis range).
    fit : the effective-resolution fit, or None (no model curves).
    band_sets : the band sets applied.
    """
    from matplotlib.patches import Rectangle

    from .metrics.resolution import model_rc_max, model_rc_mean, model_rc_peak

    plt = _plt()
    rows_by = _by_key(rows)
    metrics = ("rc_max", "rc_mean", "rc_peak")
    fig, axes = plt.subplots(1, 3, figsize=(13, 4.6))
    d_all = list(diameters_mm)
    d_grid = np.linspace(max(2.0, min(d_all) * 0.6), max(d_all) * 1.12, 60)
    band_sets = list(band_sets)
    labelled: set = set()
    hatches = ("///", "\\\\\\", "...", "xxx")
    for ax, metric in zip(axes, metrics):
        n_sets = max(1, len(band_sets))
        for j, bs in enumerate(band_sets):
            for name, diameter, _, _ in hot_spheres:
                e = bs.entry(name, metric)
                if e is None:
                    continue
                lo = e.low if e.low is not None else 0.0
                hi = e.high if e.high is not None else 1.5
                width = 2.4 / n_sets
                label = None
                if bs.name not in labelled:
                    labelled.add(bs.name)
                    label = f"band {bs.name}"
                ax.add_patch(Rectangle((diameter - 1.2 + j * width, lo), width, hi - lo, fc="#e4e4e4", ec="#999999", lw=0.6,
                                       hatch=hatches[j % len(hatches)], zorder=0, label=label))
        if fit is not None and hot_spheres:
            wall = float(np.mean([h[2] for h in hot_spheres]))
            true = float(np.mean([h[3] for h in hot_spheres]))
            k = fit.sphere_scale
            ratio = k * true / fit.background_bq_ml if fit.background_bq_ml > 0 else 1e9
            kw = dict(activity_ratio=ratio, wall_mm=wall, voxel_mm=fit.voxel_mm)
            if metric == "rc_max":
                curve = model_rc_max(d_grid, fit.fwhm_mm, **kw)
            elif metric == "rc_mean":
                curve = model_rc_mean(d_grid, fit.fwhm_mm, fraction=isocontour_fraction, **kw)
            else:
                curve = model_rc_peak(d_grid, fit.fwhm_mm, peak_diameter_mm=peak_diameter_mm, **kw)
            ax.plot(d_grid, k * np.asarray(curve), color="#1f5fa0", lw=1.3, zorder=1, label=f"model (noise-free), FWHM {fit.fwhm_mm:.2f} mm")
        xs, ys, es, fails = [], [], [], []
        for name, diameter, _, _ in hot_spheres:
            rs = rows_by.get((name, metric))
            if not rs or not _finite(rs[0].value):
                continue
            xs.append(diameter)
            ys.append(rs[0].value)
            es.append(rs[0].uncertainty if _finite(rs[0].uncertainty) else 0.0)
            fails.append(any(r.verdict == "fail" for r in rs))
        if xs:
            ax.errorbar(xs, ys, yerr=es, fmt="none", ecolor="#666666", elinewidth=0.8, capsize=2, zorder=2)
            ok = [i for i, f in enumerate(fails) if not f]
            bad = [i for i, f in enumerate(fails) if f]
            ax.plot([xs[i] for i in ok], [ys[i] for i in ok], "o", color="black", ms=5, ls="none", zorder=3, label="measured")
            if bad:
                ax.plot([xs[i] for i in bad], [ys[i] for i in bad], "o", color=_FAIL_COLOUR, mfc="white", mew=1.3, ms=6.5, ls="none", zorder=4, label="outside a band")
        ax.set_title("RC " + metric.removeprefix("rc_"), fontsize=9)
        ax.set_xlabel("sphere inner diameter (mm)", fontsize=8)
        ax.set_ylabel("recovery coefficient", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#dddddd", lw=0.5)
        ax.set_ylim(bottom=0)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7, loc="lower right")
    if fit is not None:
        lo, hi = fit.ci95_mm
        head = f"Effective FWHM {fit.fwhm_mm:.2f} mm (95 % interval {lo:.2f}-{hi:.2f} mm), blurred-sphere fit"
    else:
        head = "Recovery coefficients (no resolution fit)"
    bands = ", ".join(b.name for b in band_sets) or "none"
    fig.suptitle(f"{head} | bands: {bands} | bars: standard uncertainty; grey boxes: acceptance bands", fontsize=9.5)
    return _finish(fig, path, dpi=100, margins=dict(left=0.05, right=0.99, bottom=0.15, top=0.87, wspace=0.2))
