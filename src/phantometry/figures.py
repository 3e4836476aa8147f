"""Pictures: ROI overlays and diagnostics (matplotlib, Agg backend, no screen needed).

Visual language: greyscale images, ROI outlines in one colour per ROI kind with a line style
that also tells them apart in greyscale print (solid spheres, dashed background, dotted
inserts), labels beside every sphere.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .measure import BodyAnalysis
    from .volume import Volume


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _show_plane(ax, plane, vmax: float, title: str) -> None:
    nv, nu = plane.values.shape
    extent = (-0.5 * plane.pixel_mm, (nu - 0.5) * plane.pixel_mm, -0.5 * plane.pixel_mm, (nv - 0.5) * plane.pixel_mm)
    ax.imshow(np.nan_to_num(plane.values), cmap="gray_r", origin="lower", extent=extent, vmin=0, vmax=vmax, interpolation="nearest")
    ax.set_title(title, fontsize=9)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_aspect("equal")


def _circle(ax, uv, diameter, **kw) -> None:
    from matplotlib.patches import Circle

    ax.add_patch(Circle((float(uv[0]), float(uv[1])), diameter / 2, fill=False, **kw))


def overlay_picture(analysis: "BodyAnalysis", path: str | os.PathLike) -> Path:
    """Sphere plane and a longitudinal view with every ROI drawn and labelled (PNG)."""
    from .rois import sample_plane

    plt = _plt()
    pl = analysis.placement
    tpl = analysis.template
    vol = analysis.volume
    plane = analysis.planes[0.0] if 0.0 in analysis.planes else next(iter(analysis.planes.values()))
    vmax = float(np.nanpercentile(plane.values, 99.5)) or 1.0
    fig, axes = plt.subplots(1, 2, figsize=(12, 6.2), gridspec_kw={"width_ratios": [1.25, 1]})
    ax = axes[0]
    _show_plane(ax, plane, vmax, "Sphere plane: spheres (solid), 37 mm background ROIs (dashed), insert ROI (dotted)")
    for s in tpl.spheres:
        uv = plane.world_to_uv(pl.insert_centre(s.name))
        hot = not analysis.fill.is_cold(s.name)
        _circle(ax, uv, s.diameter_mm, color="#c03000" if hot else "#0050c0", lw=1.4)
        ax.annotate(s.name.replace("sphere_", ""), (uv[0], uv[1] + s.diameter_mm / 2 + 2), ha="center", va="bottom", fontsize=8, color="black",
                    bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none", alpha=0.8))
    bg = tpl.background
    if bg is not None:
        d = max(bg.diameters_mm)
        for i, (x, y) in enumerate(bg.centres_xy_mm):
            uv = plane.world_to_uv(pl.to_world([x, y, 0.0]))
            _circle(ax, uv, d, color="#207020", lw=1.0, ls="--")
            ax.text(uv[0], uv[1], str(i + 1), ha="center", va="center", fontsize=7, color="#207020")
    a = tpl.analysis
    if getattr(a, "lung_insert", None):
        lung = tpl.insert(a.lung_insert)
        uv = plane.world_to_uv(pl.to_world([lung.centre_mm[0], lung.centre_mm[1], 0.0]))
        _circle(ax, uv, a.lung_roi_diameter_mm, color="#7030a0", lw=1.2, ls=":")
        ax.annotate("insert", (uv[0], uv[1] - a.lung_roi_diameter_mm / 2 - 2), ha="center", va="top", fontsize=8)
    # longitudinal view through the phantom axis and the template x direction
    u = pl.rotation[:, 0]
    axis = pl.axis_world
    centre = pl.to_world([0.0, 0.0, 0.0])
    half = max(tpl.body_length_mm, 2 * tpl.body.half_extent_xy_mm) / 2 + 10
    lon = sample_plane(vol, centre, u, axis, half)
    ax2 = axes[1]
    _show_plane(ax2, lon, vmax, "Longitudinal view along the phantom axis: background slices (dashed)")
    for s in tpl.spheres:
        c = pl.insert_centre(s.name)
        dist = abs(float(lon.distance_to_plane(c)))
        r = s.diameter_mm / 2
        if dist < r:
            uv = lon.world_to_uv(c)
            _circle(ax2, uv, 2 * np.sqrt(r * r - dist * dist), color="#c03000", lw=1.2)
    if bg is not None:
        nu = lon.values.shape[1] * lon.pixel_mm
        for off in bg.slice_offsets_mm:
            uv = lon.world_to_uv(pl.to_world([0.0, 0.0, off]))
            ax2.plot([0, nu], [uv[1], uv[1]], color="#207020", lw=0.8, ls="--")
    tilt = pl.as_dict()["axis_tilt_deg"]
    fig.suptitle(
        f"{tpl.title} | series {vol.series_description or vol.series_uid or ''} | axis tilt {tilt:.1f} deg | ring match {pl.ring_score or 0:.2f}",
        fontsize=10,
    )
    fig.text(0.5, 0.01, "Supports, does not replace, a qualified medical physicist's review.", ha="center", fontsize=8, color="#444444")
    fig.tight_layout(rect=(0, 0.03, 1, 0.95))
    out = Path(path)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out


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
