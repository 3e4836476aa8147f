"""Body phantom image quality (analysis kind ``body_image_quality``): the NEMA NU 2 / IEC
body phantom with six spheres, background ROIs and a low-density insert.

Metrics
-------
* NEMA NU 2 image quality (:mod:`phantometry.metrics.nu2`): percent contrast of hot and cold
  spheres, background variability over the 60 background ROIs of each size, and the
  low-density insert's residual.
* Recovery coefficients (:mod:`phantometry.metrics.recovery`): RC max, RC mean (A50) and
  RC peak of every hot sphere.
* Calibration check: the background level against the fill record.
* Effective resolution: the blurred-sphere fit (:mod:`phantometry.metrics.resolution`).

Placement on the image (README "How the numbers are made")
----------------------------------------------------------
The spheres are placed by the ring fit (:func:`phantometry.locate.locate`); the body's own
frame comes from its outline (:func:`phantometry.locate.find_body_frame`), independently of
the ring, and the template's background positions are carried into the image by it, then
kept, moved or dropped to keep their clearances from the body edge found on each plane, the
spheres and the insert (:mod:`phantometry.background_rois`). Every ROI set is checked on the
image (:func:`placement_checks`). The planes are the original slices nearest the sphere plane
and +-10, +-20 mm, or interpolated for a tilted phantom (:mod:`phantometry.sampling`); the
uncertainties use the same discs.

Uncertainties (standard, image noise only; README "Uncertainties")
------------------------------------------------------------------
The noise model is estimated from the image (:func:`phantometry.noise.estimate_noise`). Disc
ROI means get their variance from the autocovariance (:func:`phantometry.noise.discs_variance`):
the K background ROIs of one size are combined into one weight field, so their overlaps and
correlations, within a plane and across the 10 mm slices, are included. In the cold
low-density insert the level changes by orders of magnitude within a few voxels, so there the
noise-free spill-in of the blurred cold cylinder at the fitted effective resolution,
``b (1 - g(rho))`` (:func:`_cylinder_level`), is the level. Percent contrast, insert residual
and activity recovery follow by first-order propagation (:mod:`phantometry.metrics.nu2`);
background variability by the standard error of a sample SD; RC max / mean / peak by Monte
Carlo (:class:`phantometry.metrics.recovery.SearchSimulation`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
from pydantic import Field
from scipy import ndimage

from ..errors import FillRecordError, InputError, PhantomNotFound, PhantomNotPlaced, PhantometryError
from ..background_rois import EDGE_TOLERANCE_MM, BackgroundPlacement, Obstacle, PlaneGeometry, check_size
from ..background_rois import place as place_background
from ..fill import FillRecord
from ..locate import BodyFrame, Placement, as_found_template, body_frame_placement, explain_not_found, locate
from ..metrics.nu2 import (
    background_variability,
    lung_residual,
    percent_contrast_cold,
    percent_contrast_hot,
    u_background_variability,
    u_percent_contrast_cold,
    u_percent_contrast_hot,
)
from ..metrics.recovery import BOOTSTRAP_DRAWS, SearchSimulation, recovery_coefficients
from ..metrics.resolution import FWHM_PER_SIGMA, ResolutionFit, SphereObservation, blurred_disc_profile, fit_sphere_profiles
from ..noise import NoiseModel, discs_variance, estimate_noise, plane_voxel_weights, u_ratio
from ..outline import Outline, combine_outlines, find_outline
from ..results import Measurement
from ..rois import (
    PlaneImage,
    centres_in_sphere,
    cylinder_weights,
    disc_means,
    disc_weights,
    isocontour_voi,
    peak_search,
    sample_plane,
    slice_as_acquired,
    sphere_weights,
)
from ..sampling import PlaneSampler
from ..templates import Template
from ..threads import fft_workers, threads
from ..volume import Volume
from .base import (
    Analysis,
    AnalysisSettings,
    Chart,
    ComparedSetting,
    KindOptions,
    Overlay,
    PhantomKind,
    Reread,
    ResultGrid,
    RoiKindMask,
    RoiSetCheck,
    RowBuilder,
    Shape,
    SummaryTable,
    View,
    series_phrase,
    calibration_warning,
    check_scan_time,
    FailureSketch,
    body_sketch,
    display_window,
    fill_error_hint,
    fmt_number,
    voi_on_slice,
)


class Options(KindOptions):
    """Analysis options of a body image-quality template (the ``analysis:`` block)."""

    axis_insert: str
    lung_insert: str | None = None
    lung_roi_diameter_mm: float = Field(default=30.0, gt=0)
    lung_slice_offsets_mm: list[float] | None = None
    reference_background_diameter_mm: float = Field(default=37.0, gt=0)
    peak_diameter_mm: float = Field(default=12.41, gt=0)
    isocontour_fraction: float = Field(default=0.5, gt=0, lt=1)


#: Metrics of every sphere, of the low-density insert, the background and the phantom.
SPHERE_METRICS = (
    "percent_contrast",
    "background_variability_pct",
    "rc_max",
    "rc_mean",
    "rc_peak",
    "centre_x_mm",
    "centre_y_mm",
    "centre_z_mm",
)
LUNG_METRICS = ("lung_residual_pct",)
BACKGROUND_METRICS = ("mean_bq_ml", "activity_recovery")
PHANTOM_METRICS = ("effective_fwhm_mm",)


# ============================================================================== the result
@dataclass
class BodyAnalysis(Analysis):
    """Everything measured on one body-phantom scan."""

    kind = "body_image_quality"

    #: background ROI planes by offset from the sphere plane (mm)
    planes: dict[float, PlaneImage] = field(default_factory=dict)
    #: background ROI means by diameter (mm): (K,) Bq/mL
    background_roi_means: dict[float, np.ndarray] = field(default_factory=dict)
    #: blurred-sphere fit behind effective_fwhm_mm, if made
    resolution: ResolutionFit | None = None
    #: the body frame the background ROIs were placed in (found from the outline)
    frame: BodyFrame | None = None
    #: how the planes were read (nearest original slice or interpolated)
    sampler: PlaneSampler | None = None
    #: where the background ROIs went (kept, moved, dropped)
    background_placement: BackgroundPlacement | None = None
    #: background ROI centres by offset: (plane, (K_pos, 2) in-plane mm)
    background_discs: dict[float, tuple[PlaneImage, np.ndarray]] = field(default_factory=dict)
    #: sphere ROI by name: (plane, (2,) in-plane mm)
    sphere_discs: dict[str, tuple[PlaneImage, np.ndarray]] = field(default_factory=dict)
    #: low-density insert ROIs: (offset, plane, (2,) in-plane mm)
    lung_discs: list[tuple[float, PlaneImage, np.ndarray]] = field(default_factory=list)
    #: body outline found on each background plane (None where not found)
    outlines: dict[float, Outline | None] = field(default_factory=dict)
    #: what the background ROIs keep their clearance from
    obstacles: list[Obstacle] = field(default_factory=list)
    #: the background planes' geometry (how body-frame points reach them, outlines)
    plane_geometries: list[PlaneGeometry] = field(default_factory=list)

    @property
    def options(self) -> Options:
        return KIND.options(self.template)

    def sphere_rows(self) -> list[dict[str, Any]]:
        """One dict per sphere (metric -> value, plus ``roi``, ``diameter_mm``, ``hot``, ``fit_residual_mm``)."""
        out = []
        for s in self.template.spheres:
            d: dict[str, Any] = {"roi": s.name, "diameter_mm": s.diameter_mm, "hot": not self.fill.is_cold(s.name)}
            for r in self.rows:
                if r.roi == s.name:
                    d[r.metric] = r.value
            fit = self.placement.fits.get(s.name)
            d["fit_residual_mm"] = fit.residual_mm if fit else None
            out.append(d)
        return out

    # ---------------------------------------------------------------- outputs
    def summary_table(self) -> SummaryTable:
        cols = ["ROI", "fill", "contrast %", "BV %", "RC max", "RC mean", "RC peak", "resid mm"]
        body = []
        for row in self.sphere_rows():
            body.append([
                row["roi"],
                "hot" if row["hot"] else "cold",
                fmt_number(row.get("percent_contrast"), digits=1),
                fmt_number(row.get("background_variability_pct"), digits=2),
                fmt_number(row.get("rc_max"), digits=3),
                fmt_number(row.get("rc_mean"), digits=3),
                fmt_number(row.get("rc_peak"), digits=3),
                fmt_number(row.get("fit_residual_mm"), digits=2),
            ])
        lines = []
        if any(not row["hot"] for row in self.sphere_rows()):
            lines.append("  (-: recovery coefficients are not defined for cold spheres)")
        for r in self.rows:
            if r.roi == "background" or r.metric == "lung_residual_pct":
                unit = "" if r.unit in ("1", "", None) else f" {r.unit}"
                lines.append(f"  {r.roi:<12} {r.metric:<20} {fmt_number(r.value, r.unit):>8}{unit}")
        return SummaryTable(self.template.title, cols, body, lines)

    def result_grids(self) -> list[ResultGrid]:
        rois = [(s.name, [f"{s.diameter_mm:g}", "cold" if self.fill.is_cold(s.name) else "hot"]) for s in self.template.spheres]
        metrics = [("percent_contrast", "contrast Q (%)"), ("background_variability_pct", "BV N (%)"), ("rc_max", "RC max"),
                   ("rc_mean", "RC mean"), ("rc_peak", "RC peak")]
        grids = [ResultGrid("spheres", "One row per sphere (NEMA NU 2 contrast and background variability; recovery coefficients of hot "
                            "spheres); values &plusmn; standard uncertainty.", rois, ["diameter (mm)", "fill"], metrics)]
        return grids

    def overlay(self) -> Overlay:
        """The sphere plane as the scanner stored it (the original slice nearest it) and a
        longitudinal image plane through the phantom axis, with every ROI where it was
        measured: sphere discs, the A50 isocontour VOI of each hot sphere on its voxels, the
        1 mL peak spheres, the background ROIs as used, the insert ROI and the body outline
        found; on a tilted phantom also the interpolated plane the ROIs were measured on."""
        pl, tpl, vol = self.placement, self.template, self.volume
        off0 = 0.0 if 0.0 in self.planes else next(iter(self.planes))
        half = tpl.body.half_extent_xy_mm + 12
        tra, k = slice_as_acquired(vol, pl.to_world([0.0, 0.0, 0.0]), half)
        c_b = self.value("background", "mean_bq_ml") or self.true_background_bq_ml
        hot_levels = [self.true_insert_bq_ml[s.name] for s in tpl.spheres if not self.fill.is_cold(s.name)]
        vmax, note = display_window(c_b, max(hot_levels) if hot_levels else None)
        shapes = self._roi_shapes(tra, off0, c_b, on_slice=k)
        views = [View(tra, f"Transverse slice {k + 1} of {vol.shape[0]} as stored, nearest the sphere plane", shapes, vmax,
                      rows_down=True, window_note=note)]
        lon, lshapes = self._longitudinal()
        views.append(View(lon, "Longitudinal image plane through the phantom axis, as stored", lshapes, vmax, window_note=note))
        interpolated = self.sampler is not None and not self.sampler.nearest_slice
        if interpolated:  # the plane the ROIs were measured on differs from every slice
            plane = self.planes[off0]
            views.insert(1, View(plane, "Sphere plane as measured (interpolated, perpendicular to the phantom axis)",
                                 self._roi_shapes(plane, off0, c_b, on_slice=None), vmax, window_note=note))
        tilt = pl.as_dict()["axis_tilt_deg"]
        title = (f"{tpl.title} | {series_phrase(vol)} | axis tilt {tilt:.1f} deg | "
                 f"ring match {pl.ring_score or 0:.2f}")
        return Overlay(views, title, frame=vol.frame, legend=self._legend_words(), caption=self._caption(vmax, c_b, hot_levels, interpolated))

    def _roi_shapes(self, view: PlaneImage, off0: float, c_b: float, on_slice: int | None) -> list[Shape]:
        """Every ROI of the sphere plane mapped onto ``view`` (world points projected onto it);
        ``on_slice``: the view is that original slice, and the A50 VOIs are drawn on its voxels."""
        pl, tpl, vol, opts = self.placement, self.template, self.volume, self.options
        shapes: list[Shape] = []
        outline = self.outlines.get(off0)
        if outline is not None:
            shapes.append(Shape("contour", "guide", points_uv=view.world_to_uv(outline.points_world()[::4]), name="body outline"))
        bg = tpl.background
        if bg is not None and off0 in self.background_discs and self.background_placement is not None:
            d = max(bg.diameters_mm)
            bplane, uvs = self.background_discs[off0]
            status = self.background_placement.status
            for i, uv in zip(self.background_placement.index, uvs):
                label = str(int(i) + 1) + ("*" if status[int(i)] == "moved" else "")
                shapes.append(Shape("circle", "background", view.world_to_uv(bplane.uv_to_world(uv)), d, label=label,
                                    name=f"background {int(i) + 1}"))
        for off, lplane, luv in self.lung_discs:
            if off == off0:
                shapes.append(Shape("circle", "insert", view.world_to_uv(lplane.uv_to_world(luv)), opts.lung_roi_diameter_mm,
                                    label="insert", label_below=True, name="insert"))
        for s in tpl.spheres:
            centre = pl.insert_centre(s.name)
            if s.name in self.sphere_discs:
                sp, uv = self.sphere_discs[s.name]
                disc_centre = sp.uv_to_world(uv)
            else:
                disc_centre = centre
            hot = not self.fill.is_cold(s.name)
            shapes.append(Shape("circle", "hot" if hot else "cold", view.world_to_uv(disc_centre), s.diameter_mm,
                                label=s.name.replace("sphere_", "").replace("mm", " mm"), name=s.name))
            if not hot:
                continue
            try:
                if on_slice is not None:
                    box, voi, _ = isocontour_voi(vol, centre, s.diameter_mm, c_b, opts.isocontour_fraction)
                    shapes.append(Shape("mask", "isocontour", mask=voi_on_slice(vol, box, voi, view, on_slice), name=f"{s.name} A50"))
                _, peak_centre = peak_search(vol, centre, s.diameter_mm, opts.peak_diameter_mm)
            except PhantometryError:  # the measurement itself succeeded; a picture never fails on it
                continue
            shapes.append(Shape("circle", "peak", view.world_to_uv(peak_centre), opts.peak_diameter_mm, name=f"{s.name} peak"))
        return shapes

    def _longitudinal(self) -> tuple[PlaneImage, list[Shape]]:
        """The image plane through the sphere-plane centre spanned by the slice axis and the
        image's column or row direction (the one whose plane cuts more of the spheres), with
        the spheres' sections and the background planes' traces."""
        pl, tpl, vol = self.placement, self.template, self.volume
        centre = pl.to_world([0.0, 0.0, 0.0])
        along = vol.axes_world[0]
        half = max(tpl.body_length_mm, 2 * tpl.body.half_extent_xy_mm) / 2 + 10

        def cut(direction: np.ndarray) -> float:
            normal = np.cross(direction, along)
            normal = normal / np.linalg.norm(normal)
            return sum(max(0.0, s.diameter_mm / 2 - abs(float((pl.insert_centre(s.name) - centre) @ normal))) for s in tpl.spheres)

        cols, rows = vol.axes_world[2], vol.axes_world[1]
        u = cols if cut(cols) >= cut(rows) else rows
        u = u - float(u @ along) * along
        lon = sample_plane(vol, centre, u / np.linalg.norm(u), along, half)
        shapes: list[Shape] = []
        for s in tpl.spheres:
            c = pl.insert_centre(s.name)
            dist = abs(float(lon.distance_to_plane(c)))
            r = s.diameter_mm / 2
            if dist < r:
                shapes.append(Shape("circle", "cold" if self.fill.is_cold(s.name) else "hot", lon.world_to_uv(c), 2 * math.sqrt(r * r - dist * dist),
                                    name=s.name))
        width = lon.values.shape[1] * lon.pixel_mm
        for off, bplane in self.planes.items():
            p0 = pl.to_world([0.0, 0.0, off])
            if self.sampler is not None:
                p0 = self.sampler.onto(bplane, p0)
            n = bplane.normal
            vn = float(lon.v_dir @ n)
            if abs(vn) < 1e-6:
                continue
            us = np.array([0.0, width])
            vs = (float((p0 - lon.origin_mm) @ n) - us * float(lon.u_dir @ n)) / vn
            shapes.append(Shape("line", "slice", points_uv=np.c_[us, vs], name=f"background plane {off:+g} mm"))
        return lon, shapes

    def _legend_words(self) -> dict[str, str]:
        opts, bg = self.options, self.template.background
        d = max(bg.diameters_mm) if bg is not None else 37.0
        offsets = ", ".join(f"{o:+g}" for o in (bg.slice_offsets_mm if bg is not None else []))
        return {
            "hot": "hot sphere ROI (contrast): disc of its inner diameter, centred where it was placed",
            "cold": "cold sphere ROI (contrast)",
            "isocontour": f"A{100 * opts.isocontour_fraction:.0f} isocontour VOI (RC mean): its voxels on this slice",
            "peak": f"peak sphere, {opts.peak_diameter_mm:g} mm ({math.pi / 6 * opts.peak_diameter_mm ** 3 / 1000:.1f} mL), where its mean is highest (RC peak)",
            "background": f"{d:g} mm background ROI as used (number: template position; *: moved)",
            "insert": f"low-density insert ROI, {opts.lung_roi_diameter_mm:g} mm",
            "guide": "body outline found in the image",
            "slice": f"background ROI planes ({offsets} mm from the sphere plane)",
        }

    def _caption(self, vmax: float, c_b: float, hot_levels: list[float], interpolated: bool) -> list[str]:
        pl = self.placement
        out = [f"Ring match {pl.ring_score or 0:.2f}: how closely the ring of spheres in the image follows the profile the template and "
               "fill record predict (normalised correlation: 1 = identical; placements below 0.30 are refused)."]
        out.append(f"Grey scale: white 0, black {vmax:,.0f} Bq/mL and above ({vmax / c_b:.1f} x the measured background), so the "
                   "background's texture shows.")
        out.append("Orange-red: hot, blue: cold. The transverse view is the stored slice nearest the sphere plane with rows downwards, as viewers "
                   "show it; letters name the patient directions (" + ("DICOM LPS" if self.volume.frame == "LPS" else "NIfTI RAS") + " frame).")
        bp = self.background_placement
        if bp is not None and (bp.n_moved or bp.n_dropped):
            out.append(f"Background ROI positions: {bp.summary()}.")
        if interpolated:
            out.append(f"The phantom axis is {self.sampler.tilt_deg:.1f} deg from the slice axis: the ROIs were measured on planes "
                       "interpolated perpendicular to it (middle view) and are projected onto the stored slice.")
        return out

    def pictures(self) -> dict[str, Callable[[Path], Path]]:
        from ..figures import recovery_curve_picture

        opts = self.options
        hot = [(s.name, float(s.diameter_mm), float(s.wall_mm), float(self.true_insert_bq_ml[s.name]))
               for s in self.template.spheres if not self.fill.is_cold(s.name)]
        diameters = [float(s.diameter_mm) for s in self.template.spheres]

        def draw(path: Path) -> Path:
            return recovery_curve_picture(self.rows, hot, diameters, self.resolution, self.band_sets, path,
                                          isocontour_fraction=opts.isocontour_fraction, peak_diameter_mm=opts.peak_diameter_mm)

        return {"recovery_curve.png": draw}

    def picture_captions(self) -> dict[str, str]:
        bands = " Grey boxes: the acceptance bands applied; hollow red markers: outside a band." if self.band_sets else ""
        return {"recovery_curve.png": "RC max, RC mean (A50) and RC peak of the hot spheres with the noise-free blurred-sphere model at the "
                                      "fitted effective FWHM; bars: standard uncertainty." + bands}

    def json_extras(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "noise": self.noise.as_dict() if self.noise is not None else None,
            "effective_resolution": self.resolution.as_dict() if self.resolution is not None else None,
        }
        if self.sampler is not None:
            out["sampling"] = self.sampler.as_dict()
        bp = self.background_placement
        if bp is not None:
            out["background_rois"] = {
                "diameter_placed_mm": bp.diameter_mm,
                "min_clearance_mm": bp.clearance_required_mm,
                "edge_tolerance_mm": round(bp.tolerance_mm, 3),
                "k_per_size": len(bp.xy) * len(self.plane_geometries),
                "k_planned": self.template.background.n_rois,
                "positions": [
                    {"number": i + 1, "status": st, "template_xy_mm": [round(float(v), 2) for v in bp.template_xy[i]],
                     "nominal_clearance_mm": None if not np.isfinite(bp.clearance_mm[i]) else round(float(bp.clearance_mm[i]), 2),
                     "moved_mm": None if not np.isfinite(bp.moved_mm[i]) else round(float(bp.moved_mm[i]), 2),
                     "xy_mm": ([round(float(v), 2) for v in bp.xy[list(bp.index).index(i)]] if i in set(bp.index.tolist()) else None)}
                    for i, st in enumerate(bp.status)
                ],
                "frame": "body frame found in the image (x, y in mm; +y away from the flat side)",
            }
        return out

    def roi_masks(self) -> list[RoiKindMask]:
        """Binary masks of every ROI kind placed: hot spheres, cold spheres, background ROIs (the
        largest circles on every background slice), low-density insert (its ROI circles). A voxel
        is in a mask when at least half of it lies inside an ROI (weight >= 0.5); a circle is one
        slice thick. Kinds without any ROI (e.g. no cold spheres) are left out."""
        volume, tpl, pl = self.volume, self.template, self.placement
        shape = volume.shape
        kinds: list[RoiKindMask] = []
        hot = RoiKindMask("hot_spheres", "hot spheres", np.zeros(shape, bool), [], "Sphere")
        cold = RoiKindMask("cold_spheres", "cold spheres", np.zeros(shape, bool), [], "Sphere")
        for s in tpl.spheres:
            target = cold if self.fill.is_cold(s.name) else hot
            _add_mask(target.mask, sphere_weights(volume, pl.insert_centre(s.name), s.diameter_mm))
            target.roi_names.append(s.name)
        kinds += [k for k in (hot, cold) if k.roi_names]
        bg = tpl.background
        if bg is not None and self.background_discs:
            d = max(bg.diameters_mm)
            kind = RoiKindMask("background_rois", "background ROIs", np.zeros(shape, bool), [], "Background")
            for off, (plane, uvs) in self.background_discs.items():
                thickness = _slice_thickness_along(volume, plane.normal)
                for n, uv in zip(self.background_placement.index, uvs):
                    _add_mask(kind.mask, cylinder_weights(volume, plane.uv_to_world(uv), plane.normal, d, thickness))
                    kind.roi_names.append(f"background_{d:g}mm_{off:+g}mm_{int(n) + 1:02d}")
            kinds.append(kind)
        opts = self.options
        if opts.lung_insert and self.lung_discs:
            kind = RoiKindMask("low_density_insert", "low-density insert", np.zeros(shape, bool), [], "Phantom")
            for off, plane, uv in self.lung_discs:
                thickness = _slice_thickness_along(volume, plane.normal)
                _add_mask(kind.mask, cylinder_weights(volume, plane.uv_to_world(uv), plane.normal, opts.lung_roi_diameter_mm, thickness))
                kind.roi_names.append(f"{opts.lung_insert}_{off:+g}mm")
            kinds.append(kind)
        return kinds

    def key_metrics(self) -> list[tuple[str, str]]:
        """RC max, mean and peak of every hot sphere; contrast and background variability of
        the smallest sphere; the insert residual, the activity recovery and the effective FWHM."""
        spheres = list(self.template.spheres)
        out = [(s.name, m) for m in ("rc_max", "rc_mean", "rc_peak") for s in spheres if not self.fill.is_cold(s.name)]
        if spheres:
            smallest = min(spheres, key=lambda s: s.diameter_mm)
            out += [(smallest.name, "percent_contrast"), (smallest.name, "background_variability_pct")]
        opts = self.options
        if opts.lung_insert:
            out.append((opts.lung_insert, "lung_residual_pct"))
        return out + [("background", "activity_recovery"), ("phantom", "effective_fwhm_mm")]

    def metric_titles(self) -> dict[str, str]:
        return {**super().metric_titles(), "lung_residual_pct": "insert residual (%)", "activity_recovery": "activity recovery",
                "effective_fwhm_mm": "effective FWHM (mm)"}

    def reread(self, keys: Sequence[tuple[str, str]]) -> "BodyReread":
        """Read ``keys`` again on filtered copies of the image, ROIs kept (:class:`BodyReread`)."""
        return BodyReread(self, keys)


#: A voxel belongs to a SEG segment when at least this fraction of it lies inside an ROI.
MASK_WEIGHT_THRESHOLD = 0.5


def _add_mask(mask: np.ndarray, roi) -> None:
    mask[roi.box] |= roi.weights >= MASK_WEIGHT_THRESHOLD


def _slice_thickness_along(volume: Volume, axis_world: np.ndarray) -> float:
    """Spacing (mm) of the array axis most parallel to ``axis_world``."""
    cosines = np.abs(volume.axes_world @ np.asarray(axis_world, float))
    return float(volume.spacing_mm[int(np.argmax(cosines))])


def _plane_basis(placement) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rot = placement.rotation
    return rot[:, 0].copy(), rot[:, 1].copy(), rot[:, 2].copy()


# ============================================================================== the kind
class BodyKind(PhantomKind):
    """NEMA NU 2 image quality on the IEC / NEMA body phantom."""

    name = "body_image_quality"
    summary = "NEMA NU 2 contrast, background variability, insert residual; RC max/mean/peak; effective FWHM"
    Options = Options
    supports_seg = True
    supports_reread = True

    def insert_references(self, options: Any) -> tuple[str, ...]:
        return ("axis_insert", "lung_insert")

    def check_template(self, template: Template) -> list[str]:
        self.options(template)
        bg = template.background
        if bg is None:
            raise _template_error(template, "analysis kind body_image_quality needs a background ROI set")
        if not template.spheres:
            raise _template_error(template, "analysis kind body_image_quality needs inserts with role: sphere")
        opts = self.options(template)
        problems = []
        if opts.reference_background_diameter_mm not in bg.diameters_mm:
            problems.append(
                f"analysis.reference_background_diameter_mm: {opts.reference_background_diameter_mm:g} is not one of background.diameters_mm"
            )
        for s in template.spheres:
            if s.diameter_mm not in bg.diameters_mm:
                problems.append(f"background.diameters_mm: no {s.diameter_mm:g} mm size for {s.name} (NEMA NU 2 needs one per sphere)")
        return problems

    def known_metrics(self, template: Template) -> dict[str, tuple[str, ...]]:
        out: dict[str, tuple[str, ...]] = {s.name: SPHERE_METRICS for s in template.spheres}
        lung = self.options(template).lung_insert
        if lung:
            out[lung] = LUNG_METRICS
        out["background"] = BACKGROUND_METRICS
        out["phantom"] = PHANTOM_METRICS
        return out

    def failure_sketch(self, volume: Volume, template: Template, where: str) -> FailureSketch:
        """The body found, then the phantom axis (the cold axis insert) and the sphere plane
        searched along it, as far as each can be found (:func:`phantometry.locate.locate`'s
        first steps, repeated for the picture of a failed run)."""
        from ..locate import _sphere_plane_offset, find_axis, find_body

        sketch = body_sketch(volume, where)
        if sketch.inside_body is None:
            return sketch
        opts = self.options(template)
        axis_ins = template.insert(opts.axis_insert)
        try:
            body = find_body(volume, where)
            a0, d = find_axis(volume, body, axis_ins, where)
        except PhantometryError as exc:
            sketch.notes.append(f"no phantom axis found ({exc})")
            return sketch
        sketch.axis_point_mm, sketch.axis_direction = a0, d
        sketch.notes.append(f"phantom axis found along the {axis_ins.name}")
        ring_r = float(np.median([math.hypot(s.centre_mm[0] - axis_ins.centre_mm[0], s.centre_mm[1] - axis_ins.centre_mm[1])
                                  for s in template.spheres]))
        try:
            off, _, _ = _sphere_plane_offset(volume, template, body, a0, d, body.background, ring_r, where)
        except PhantometryError as exc:
            sketch.notes.append(f"no sphere plane found ({exc})")
            return sketch
        sketch.plane_point_mm = a0 + off * d
        sketch.notes.append(f"sphere plane searched at {off:+.0f} mm along the axis from the insert's centre")
        return sketch

    def comparison_charts(self, template: Template, fill: FillRecord, settings: Sequence[ComparedSetting]) -> list[Chart]:
        from ..figures import contrast_noise_chart, recovery_curves_chart

        diameters = {s.name: float(s.diameter_mm) for s in template.spheres}
        hot = {s.name: not fill.is_cold(s.name) for s in template.spheres}
        triples = [(s.number, s.label, list(s.rows)) for s in settings if s.error is None]
        failed = [(s.number, s.label, s.error) for s in settings if s.error is not None]
        bands = any(r.band is not None for _, _, rows in triples for r in rows)
        judged = any(r.verdict == "fail" for _, _, rows in triples for r in rows)
        marks = ("; hollow markers: outside an acceptance band" if judged else "")
        return [
            Chart("contrast_noise.png", "Percent contrast against background variability per sphere: one colour and marker per setting, "
                  f"its number beside the point where there is room; bars: standard uncertainty{marks}.", contrast_noise_chart,
                  (triples, diameters), {"failed": failed}),
            Chart("recovery_curves.png", "Recovery coefficients (max, A50 mean, 1 mL peak) of every setting against sphere diameter, one "
                  "colour and marker per setting, its number at the right end of its line"
                  + ("; grey boxes: acceptance bands" if bands else "") + marks + ".",
                  recovery_curves_chart, (triples, diameters), {"hot": hot, "failed": failed}),
        ]

    def analyse(
        self,
        volume: Volume,
        template: Template,
        fill: FillRecord,
        *,
        overrides: dict[str, np.ndarray] | None = None,
        where: str,
        settings: AnalysisSettings,
    ) -> BodyAnalysis:
        """Locate the phantom and compute every NEMA NU 2 and recovery metric, then the noise
        model, the effective resolution and the standard uncertainties (``settings``).

        A phantom found but not measurable (an ROI outside the image, no sphere above the
        background) is reported with the likely cause the image shows
        (:func:`phantometry.locate.explain_not_found`), as a failed placement is.
        """
        try:
            return self._analyse(volume, template, fill, overrides=overrides, where=where, settings=settings)
        except PhantomNotPlaced:
            raise
        except PhantomNotFound as exc:
            try:
                hot = {s.name: not fill.is_cold(s.name) for s in template.spheres}
                ratio = {s.name: fill.activity_ratio(s.name) for s in template.spheres if hot[s.name]}
            except FillRecordError:  # a fill record of another phantom: the error already says what was found
                raise exc from None
            raise explain_not_found(exc, volume, template, hot=hot, activity_ratio=ratio, overrides=overrides) from None

    def _analyse(
        self,
        volume: Volume,
        template: Template,
        fill: FillRecord,
        *,
        overrides: dict[str, np.ndarray] | None,
        where: str,
        settings: AnalysisSettings,
    ) -> BodyAnalysis:
        """:meth:`analyse` without the explanation of a failure."""
        check_scan_time(volume, fill, where)
        opts = self.options(template)
        at = volume.acquired_at
        spheres = template.spheres
        try:
            true_bg = fill.background_bq_ml(at)
            true_ins = {s.name: fill.insert_bq_ml(s.name, at) for s in spheres}
            hot = {s.name: not fill.is_cold(s.name) for s in spheres}
            ratio = {s.name: (fill.activity_ratio(s.name) if hot[s.name] else 0.0) for s in spheres}
        except FillRecordError:
            fill_error_hint(volume, template, where)
            raise
        placement = locate(volume, template, axis_insert=opts.axis_insert, hot=hot, activity_ratio=ratio, overrides=overrides, where=where)
        settings.step("measuring the ROIs")
        bg_set = template.background
        assert bg_set is not None  # check_template refuses a body template without one
        u, v, axis = _plane_basis(placement)
        out = RowBuilder(volume, template)
        add = out.add
        warnings = list(placement.warnings)
        frame = placement.body_frame if placement.body_frame is not None else ring_frame(placement, template)
        sampler = PlaneSampler.choose(volume, axis, u, v)

        # ---- background ROIs: placed on the body found in the image, every slice offset, every size
        geo = read_background_planes(volume, placement, frame, template, sampler)
        obstacles = background_obstacles(placement, frame, template)
        d_max = max(bg_set.diameters_mm)
        outline_xy = template.body.outline_xy()
        bounds = (*(outline_xy[:, 0].min() - 20, outline_xy[:, 0].max() + 20), *(outline_xy[:, 1].min() - 20, outline_xy[:, 1].max() + 20))
        bplace = place_background(np.asarray(bg_set.centres_xy_mm, float), geo.geometries, obstacles, d_max, bg_set.min_clearance_mm, bounds,
                                  tolerance_mm=geo.edge_tolerance_mm)
        if len(bplace.xy) == 0:
            raise PhantomNotFound(
                f"{where}: no background ROI position keeps {bg_set.min_clearance_mm:g} mm from the body edge found in the image, "
                "the spheres and the insert; is the whole phantom in the field of view, and is this the template's phantom?"
            )
        discs: dict[float, tuple[PlaneImage, np.ndarray]] = {}
        means: dict[float, list[np.ndarray]] = {d: [] for d in bg_set.diameters_mm}
        for pg in geo.geometries:
            plane = geo.planes[pg.offset_mm]
            uv = plane.world_to_uv(pg.to_plane(bplace.xy))
            discs[pg.offset_mm] = (plane, uv)
            for d in bg_set.diameters_mm:
                try:
                    means[d].append(disc_means(plane, uv, d))
                except PhantomNotFound:
                    raise PhantomNotFound(
                        f"{where}: background ROIs at {pg.offset_mm:+g} mm from the sphere plane fall outside the image"
                    ) from None
        roi_means = {d: np.concatenate(m) for d, m in means.items()}
        c_b = {}
        bv = {}
        for d, m in roi_means.items():
            bv[d], c_b[d], _ = background_variability(m) if len(m) >= 2 else (math.nan, float(np.mean(m)), None)
        c_b_ref = c_b[opts.reference_background_diameter_mm]
        k_used = len(bplace.xy) * len(geo.geometries)
        k_planned = bg_set.n_rois
        k_note = None if k_used == k_planned else f"K = {k_used} background ROIs of {k_planned} ({bplace.summary()})"
        # ---- spheres, each on the slice (or plane) through its centre
        sphere_discs: dict[str, tuple[PlaneImage, np.ndarray]] = {}
        for s in spheres:
            centre = placement.insert_centre(s.name)
            try:
                sp, uv = sphere_disc(sampler, volume, centre, s.diameter_mm, name=s.name)
                c_sphere = float(disc_means(sp, uv, s.diameter_mm)[0])
            except PhantomNotFound:
                raise PhantomNotFound(f"{where}: {s.name} lies outside the image") from None
            sphere_discs[s.name] = (sp, uv[0])
            cb = c_b.get(s.diameter_mm, c_b_ref)
            if hot[s.name]:
                if ratio[s.name] <= 1:
                    raise InputError(f"fill record: {s.name} is hot but its ratio to background is {ratio[s.name]:g} (must exceed 1)")
                add(s.name, "percent_contrast", percent_contrast_hot(c_sphere, cb, ratio[s.name]), "%")
            else:
                add(s.name, "percent_contrast", percent_contrast_cold(c_sphere, cb), "%")
            add(s.name, "background_variability_pct", bv.get(s.diameter_mm, math.nan), "%", k_note)
            if hot[s.name]:
                rc = recovery_coefficients(
                    volume,
                    centre,
                    s.diameter_mm,
                    true_ins[s.name],
                    c_b_ref,
                    peak_diameter_mm=opts.peak_diameter_mm,
                    isocontour_fraction=opts.isocontour_fraction,
                )
                for k in ("rc_max", "rc_mean", "rc_peak"):
                    add(s.name, k, rc[k], "1")
            for axis_name, val in zip("xyz", centre):
                add(s.name, f"centre_{axis_name}_mm", val, "mm")
        # ---- low-density insert residual
        lung_discs: list[tuple[float, PlaneImage, np.ndarray]] = []
        if opts.lung_insert is not None:
            lung = template.insert(opts.lung_insert)
            lung_vals = []
            for off in opts.lung_slice_offsets_mm or bg_set.slice_offsets_mm:
                plane = geo.planes.get(float(off))
                if plane is None:
                    plane = sampler.plane(placement.to_world([0.0, 0.0, off]), geo.half_width_mm, name=f"insert {off:+g} mm")
                lc = sampler.onto(plane, _lung_centre(placement, lung, off, overrides))
                uv = plane.world_to_uv(lc[None])
                lung_vals.append(float(disc_means(plane, uv, opts.lung_roi_diameter_mm)[0]))
                lung_discs.append((float(off), plane, uv[0]))
            avg, _ = lung_residual(np.array(lung_vals), c_b_ref)
            add(lung.name, "lung_residual_pct", avg, "%")
        # ---- background level and calibration check
        add("background", "mean_bq_ml", c_b_ref, "Bq/mL", k_note)
        note = calibration_warning(c_b_ref, true_bg, "background")
        if note:
            warnings.append(note)
        add("background", "activity_recovery", c_b_ref / true_bg, "1", note)
        result = BodyAnalysis(volume, template, fill, placement, out.rows, true_bg, true_ins, warnings,
                              planes=geo.planes, background_roi_means=roi_means, frame=frame, sampler=sampler,
                              background_placement=bplace, background_discs=discs, sphere_discs=sphere_discs,
                              lung_discs=lung_discs, outlines={pg.offset_mm: pg.outline for pg in geo.geometries},
                              obstacles=obstacles, plane_geometries=geo.geometries)
        result.placement_checks = placement_checks(result, c_b_ref)
        _placement_warnings(result)
        _noise_resolution_uncertainties(result, overrides=overrides, settings=settings)
        return result


# ============================================================================== placement on the image
@dataclass
class BackgroundPlanes:
    """The background planes read for one analysis and what the image shows on them."""

    planes: dict[float, PlaneImage]
    geometries: list[PlaneGeometry]
    half_width_mm: float
    #: allowance for locating the edge when a template position is checked (mm)
    edge_tolerance_mm: float = EDGE_TOLERANCE_MM


def edge_tolerance_mm(edge_se_mm: float | None) -> float:
    """Allowance for locating the body edge: :data:`~phantometry.background_rois.EDGE_TOLERANCE_MM`,
    or twice the edge's standard error on a noisier image, at most :data:`MAX_EDGE_TOLERANCE_MM`."""
    if edge_se_mm is None or not math.isfinite(edge_se_mm):
        return EDGE_TOLERANCE_MM
    return float(min(MAX_EDGE_TOLERANCE_MM, max(EDGE_TOLERANCE_MM, 2.0 * edge_se_mm)))


#: Largest allowance (mm) for locating the body edge.
MAX_EDGE_TOLERANCE_MM = 2.0


def ring_frame(placement: Placement, template: Template) -> BodyFrame:
    """The ring's fit as the body frame: used only when the body outline was not found (the
    template's ring-to-body arrangement is then assumed, and a warning says so)."""
    z0, z1 = template.body.z_range_mm
    return BodyFrame(placement.rotation.copy(), placement.translation_mm.copy(), None, False, None, (float(z0), float(z1)),
                     None, None, None, None, "ring fit (no outline)")


#: Largest share of rays without an edge that an outline may have (they are interpolated).
MAX_MISSING_RAYS = 0.10


def plane_outline(volume: Volume, origin_mm: np.ndarray, plane: PlaneImage, level: float, max_radius_mm: float, **kw: Any) -> Outline | None:
    """The outline about ``origin_mm`` in ``plane`` (:func:`phantometry.outline.find_outline`);
    a few rays without an edge are interpolated from their neighbours; None when too many lack one."""
    ol = find_outline(plane, origin_mm, level, max_radius_mm, **kw)
    bad = ~np.isfinite(ol.radii_mm)
    if bad.mean() > MAX_MISSING_RAYS:
        return None
    if bad.any():
        ol.radii_mm = np.interp(ol.angles_rad, ol.angles_rad[~bad], ol.radii_mm[~bad], period=2 * np.pi)
    return ol


def read_background_planes(volume: Volume, placement: Placement, frame: BodyFrame, template: Template, sampler: PlaneSampler) -> BackgroundPlanes:
    """Read every background plane (nearest slice or interpolated, :class:`PlaneSampler`) and
    find the body outline on it (rays from the phantom axis, 50 % of the background level;
    combined over the planes, :func:`phantometry.outline.combine_outlines`)."""
    opts = KIND.options(template)
    bg_set = template.background
    ax = template.insert(opts.axis_insert)
    half_width = template.body.half_extent_xy_mm + 10
    level = 0.5 * placement.background_estimate_bq_ml
    max_r = template.body.half_extent_xy_mm + 30.0
    planes: dict[float, PlaneImage] = {}
    geometries: list[PlaneGeometry] = []
    for off in bg_set.slice_offsets_mm:
        off = float(off)
        plane = sampler.plane(placement.to_world([0.0, 0.0, off]), half_width, name=f"background {off:+g} mm")
        planes[off] = plane
        origin = sampler.onto(plane, placement.to_world([ax.centre_mm[0], ax.centre_mm[1], off]))
        outline = plane_outline(volume, origin, plane, level, max_r)

        def to_plane(xy: np.ndarray, off: float = off, plane: PlaneImage = plane) -> np.ndarray:
            xy = np.asarray(xy, float).reshape(-1, 2)
            return sampler.onto(plane, frame.to_world(np.c_[xy, np.full(len(xy), off)]))

        geometries.append(PlaneGeometry(off, to_plane, outline))
    # one body, one edge: the planes' outlines share their noise-free part (rays from the axis,
    # same directions), so their median is taken, except where a plane really differs
    combined, edge_se = combine_outlines([pg.outline for pg in geometries])
    for pg, ol in zip(geometries, combined):
        pg.outline = ol
    return BackgroundPlanes(planes, geometries, half_width, edge_tolerance_mm(edge_se))


def background_obstacles(placement: Placement, frame: BodyFrame, template: Template) -> list[Obstacle]:
    """The spheres and the inserts parallel to the axis, where the placement put them, in the
    body frame's ``x, y`` (what background ROIs keep their clearance from; NEMA NU 2)."""
    out = []
    for ins in template.inserts:
        if ins.role == "sphere" or (ins.shape == "cylinder" and abs(float(ins.axis_unit[2])) > 0.999):
            xy = frame.to_body(placement.insert_centre(ins.name))[:2]
            out.append(Obstacle(ins.name, xy, 0.5 * ins.outer_diameter_mm))
    return out


def sphere_disc(sampler: PlaneSampler, volume: Volume, centre: np.ndarray, diameter_mm: float, name: str | None = None) -> tuple[PlaneImage, np.ndarray]:
    """The plane (the slice nearest the sphere centre, or the plane through it) and the (1, 2)
    in-plane centre of a sphere's ROI."""
    plane = sampler.plane(centre, diameter_mm / 2 + 4 * float(np.max(volume.spacing_mm)), name=name)
    return plane, plane.world_to_uv(sampler.onto(plane, centre)[None])


def _background_rows(template: Template, diameter: float, reference: bool, lung: str | None) -> list[tuple[str, str]]:
    rows = [(s.name, m) for s in template.spheres if s.diameter_mm == diameter for m in ("background_variability_pct", "percent_contrast")]
    if reference:
        rows += [(s.name, "percent_contrast") for s in template.spheres if s.diameter_mm not in template.background.diameters_mm]
        rows += [("background", "mean_bq_ml"), ("background", "activity_recovery")]
        rows += [(s.name, "rc_mean") for s in template.spheres]  # the A50 isocontour level uses the background
        if lung:
            rows.append((lung, "lung_residual_pct"))
    return rows


def placement_checks(analysis: "BodyAnalysis", c_b_ref: float) -> list[RoiSetCheck]:
    """How the image confirms each ROI set: the background ROIs of every size, the sphere ROIs
    and the insert ROIs (fraction inside the region found in the image, distance to its edge)."""
    tpl, vol, pl = analysis.template, analysis.volume, analysis.placement
    opts = analysis.options
    bg = tpl.background
    bp = analysis.background_placement
    geos = analysis.plane_geometries
    need = bg.min_clearance_mm - bp.tolerance_mm
    checks: list[RoiSetCheck] = []
    k_used = len(bp.xy) * len(geos)
    missing = [f"{pg.offset_mm:+g} mm" for pg in geos if pg.outline is None]
    for d in sorted(bg.diameters_mm, reverse=True):
        sc = check_size(bp.xy, geos, analysis.obstacles, d)
        inside_ok = math.isfinite(sc.min_inside_fraction) and sc.min_inside_fraction >= 1.0 - 1e-9
        confirmed = inside_ok and sc.min_edge_distance_mm >= need and sc.min_obstacle_distance_mm >= need - 1e-9 and k_used >= 2 and not missing
        bits = [f"K = {k_used} of {bg.n_rois}", bp.summary()]
        bits.append(f"closest to a sphere or insert: {sc.min_obstacle_distance_mm:.1f} mm")
        if missing:
            bits.append("no body outline found on the plane(s) " + ", ".join(missing))
        elif not confirmed:
            bits.append(f"not every ROI lies wholly inside the body found, {bg.min_clearance_mm:g} mm from its edge, the spheres and the insert")
        checks.append(RoiSetCheck(f"background_{d:g}mm", bg.n_rois, k_used, sc.min_inside_fraction,
                                  sc.min_edge_distance_mm if math.isfinite(sc.min_edge_distance_mm) else None, confirmed, "; ".join(bits),
                                  _background_rows(tpl, d, d == opts.reference_background_diameter_mm, opts.lung_insert)))
    # ---- spheres: inside the body found, and each refined centre agreeing with the rigid fit
    outline0 = next((pg.outline for pg in geos if pg.offset_mm == 0.0), None) or next((pg.outline for pg in geos if pg.outline), None)
    fractions, edges, off_fit = [], [], []
    tol = max(2.0, 0.75 * float(np.max(vol.spacing_mm)))
    for s in tpl.spheres:
        plane, uv = analysis.sphere_discs[s.name]
        c = plane.uv_to_world(uv)
        if outline0 is not None:
            fractions.append(float(outline0.disc_inside_fraction(c[None], s.diameter_mm)[0]))
            edges.append(float(outline0.signed_distance(c[None])[0]) - s.diameter_mm / 2)
        fit = pl.fits.get(s.name)
        if fit is not None and fit.signal_to_noise is not None and fit.signal_to_noise > 5 and (fit.residual_mm or 0.0) > tol:
            off_fit.append(f"{s.name} {fit.residual_mm:.1f} mm")
    inside = min(fractions) if fractions else math.nan
    confirmed = bool(fractions) and inside >= 1.0 - 1e-9 and not off_fit
    note = "every sphere ROI inside the body found" if confirmed else "; ".join(
        (["no body outline found"] if not fractions else [] if inside >= 1.0 - 1e-9 else ["a sphere ROI crosses the body edge found"])
        + ([f"refined centres off the rigid fit (more than {tol:.1f} mm): " + ", ".join(off_fit)] if off_fit else []))
    sphere_rows = [(s.name, m) for s in tpl.spheres for m in ("percent_contrast", "rc_max", "rc_mean", "rc_peak", "centre_x_mm", "centre_y_mm", "centre_z_mm")]
    checks.append(RoiSetCheck("spheres", len(tpl.spheres), len(tpl.spheres), inside, min(edges) if edges else None, confirmed, note, sphere_rows))
    # ---- the low-density insert's ROIs inside the cold insert found on each plane
    if opts.lung_insert is not None and analysis.lung_discs:
        lung = tpl.insert(opts.lung_insert)
        fr, ed, lost = [], [], []
        for off, plane, uv in analysis.lung_discs:
            c = plane.uv_to_world(uv)
            ol = plane_outline(vol, c, plane, 0.5 * c_b_ref, lung.outer_diameter_mm + 20.0, mode="first", n_rays=360)
            if ol is None:
                lost.append(f"{off:+g} mm")
                continue
            fr.append(float(ol.disc_inside_fraction(c[None], opts.lung_roi_diameter_mm)[0]))
            ed.append(float(ol.signed_distance(c[None])[0]) - opts.lung_roi_diameter_mm / 2)
        inside = min(fr) if fr else math.nan
        confirmed = not lost and bool(fr) and inside >= 1.0 - 1e-9
        note = (f"every {opts.lung_roi_diameter_mm:g} mm ROI inside the cold insert found" if confirmed else
                "; ".join((["the cold insert was not found around the ROI on the plane(s) " + ", ".join(lost)] if lost else [])
                          + (["an ROI reaches beyond the cold insert found"] if fr and inside < 1.0 - 1e-9 else [])))
        checks.append(RoiSetCheck(lung.name, len(analysis.lung_discs), len(analysis.lung_discs), inside, min(ed) if ed else None,
                                  confirmed, note, [(lung.name, "lung_residual_pct")]))
    return checks


def _placement_warnings(analysis: "BodyAnalysis") -> None:
    """Say what happened to the background ROIs, and loudly when an ROI set is not confirmed."""
    bp = analysis.background_placement
    bg = analysis.template.background
    if bp.n_moved or bp.n_dropped:
        k = len(bp.xy) * len(analysis.plane_geometries)
        analysis.warnings.append(
            f"background ROIs: {bp.summary()} (template numbering), to keep {bg.min_clearance_mm:g} mm from the body edge found in "
            f"the image, the spheres and the insert; K = {k} ROIs per size (NEMA NU 2 plans {bg.n_rois})"
        )
    for c in analysis.placement_checks:
        if not c.confirmed:
            analysis.warnings.append(
                f"WARNING: {c.roi_set} ROIs are not confirmed in the image ({c.note}); the numbers that depend on them are doubtful "
                "and their band verdicts are withheld"
            )


def _template_error(template: Template, problem: str):
    from ..errors import TemplateError

    return TemplateError(f"{template.source_path or template.name}: invalid template: {problem}")


def _lung_centre(placement, lung, off: float, overrides: dict[str, np.ndarray] | None) -> np.ndarray:
    """World centre of the low-density insert's ROI on the plane ``off`` mm from the sphere
    plane: on the template's insert axis, or on the line through the manual centre."""
    if lung.name in (overrides or {}):
        c = placement.insert_centre(lung.name)
        return c + (off - float(placement.to_template(c)[2])) * placement.axis_world
    return placement.to_world([lung.centre_mm[0], lung.centre_mm[1], off])


KIND = BodyKind()


# ============================================================================== noise, resolution, uncertainties
def _noise_resolution_uncertainties(analysis: BodyAnalysis, *, overrides, settings: AnalysisSettings) -> None:
    """Add the noise model, the effective FWHM row and the standard uncertainties (in place).

    A step that cannot be done (too little background, a failed fit) leaves its numbers out
    and says so in the warnings; it never stops the measurement.
    """
    noise = None
    if settings.uncertainties or settings.resolution:
        settings.step("estimating the image noise, the effective resolution and the uncertainties")
        try:
            pl_noise, tpl_noise = noise_geometry(analysis)
            noise = estimate_noise(analysis.volume, pl_noise, tpl_noise, variance_power=settings.variance_power)
        except PhantometryError as exc:
            analysis.warnings.append(f"no uncertainties: the noise could not be estimated ({exc})")
    analysis.noise = noise
    fit = None
    if settings.resolution:
        try:
            fit = fit_body(analysis, noise)
        except PhantometryError as exc:
            analysis.warnings.append(f"effective resolution not fitted: {exc}")
        else:
            note = fit.note()
            if fit.rms_weighted_residual is not None and fit.rms_weighted_residual > 2.0:
                warn = (
                    f"the blurred-sphere model fits the sphere voxels poorly (RMS residual {fit.rms_weighted_residual:.1f} noise SDs); "
                    "effective_fwhm_mm may not describe this reconstruction (edge overshoot, non-Gaussian response, wrong fill record)"
                )
                analysis.warnings.append(warn)
                note = f"WARNING: poor model fit; {note}"
            r0 = analysis.rows[0]
            analysis.rows.append(Measurement(series_uid=r0.series_uid, acquired_at=r0.acquired_at, template=r0.template, roi="phantom",
                                             metric="effective_fwhm_mm", value=fit.fwhm_mm, unit="mm", uncertainty=fit.se_mm, note=note))
    analysis.resolution = fit
    if settings.uncertainties and noise is not None:
        try:
            us = body_uncertainties(analysis, noise, resolution_fit=fit, overrides=overrides)
        except PhantometryError as exc:
            analysis.warnings.append(f"no uncertainties: {exc}")
        else:
            analysis.rows[:] = [
                dataclasses.replace(r, uncertainty=float(us[(r.roi, r.metric)])) if (r.roi, r.metric) in us and r.uncertainty is None else r
                for r in analysis.rows
            ]


def noise_geometry(analysis: BodyAnalysis) -> tuple[Placement, Template]:
    """Placement and template describing the phantom as found (body frame from the outline,
    inserts where the placement put them, body ends as found) for the noise estimate's
    background mask; the ring's placement and the template as written when no outline was found."""
    pl = analysis.placement
    if pl.body_frame is None:
        return pl, analysis.template
    return body_frame_placement(pl, pl.body_frame), as_found_template(analysis.template, pl, pl.body_frame)


def body_uncertainties(
    analysis: BodyAnalysis,
    noise: NoiseModel,
    *,
    resolution_fit: ResolutionFit | None = None,
    overrides: dict[str, np.ndarray] | None = None,
    n_draws: int | None = None,
) -> dict[tuple[str, str], float]:
    """Standard uncertainty of every ROI-mean based metric of a body image-quality analysis.

    Parameters
    ----------
    analysis : :class:`BodyAnalysis` (rows, planes, placement, template,
        fill, volume); the ROIs are rebuilt exactly as :meth:`BodyKind.analyse`
        placed them.
    noise : the image's noise model (:func:`phantometry.noise.estimate_noise`).
    resolution_fit : the blurred-sphere fit (:func:`fit_body`);
        its model image is the noise-free image of the RC max bootstrap (else the image
        smoothed by one voxel).
    overrides : the manual insert centres the analysis used (the low-density insert's ROI
        follows its override as in the measurement).
    n_draws : noise draws of the RC max / mean / peak simulation (default
        :data:`BOOTSTRAP_DRAWS`).

    Returns
    -------
    dict (roi, metric) -> standard uncertainty in the metric's unit (see the module notes).
    """
    n_draws = BOOTSTRAP_DRAWS if n_draws is None else int(n_draws)
    vol = analysis.volume
    tpl = analysis.template
    fill = analysis.fill
    pl = analysis.placement
    a = analysis.options
    out: dict[tuple[str, str], float] = {}
    ref = a.reference_background_diameter_mm
    c_b = {d: float(np.mean(means)) for d, means in analysis.background_roi_means.items()}
    cb_ref = c_b[ref]
    model_fn = resolution_fit.model_at if resolution_fit is not None else None
    # ---- the RC searches by simulation, started first: its chunks of draws in threads (numpy
    # and the FFTs release the interpreter lock) while this thread propagates the ROI means
    # below; each chunk has its own seed, so results do not depend on the threads
    searches: list[tuple[str, np.ndarray, float, float]] = []
    noise_free = noise.sd_bq_ml <= 1e-6 * max(noise.background_bq_ml, 1e-12)
    for s in tpl.spheres:
        true = 0.0 if fill.is_cold(s.name) else float(analysis.true_insert_bq_ml[s.name])
        if true <= 0:
            continue
        if noise_free:
            # no measurable noise (a noise-free image: float32 rounding only): nothing to simulate
            out[(s.name, "rc_max")] = out[(s.name, "rc_mean")] = out[(s.name, "rc_peak")] = 0.0
        else:
            searches.append((s.name, pl.insert_centre(s.name), float(s.diameter_mm), true))
    def make_simulation() -> SearchSimulation:
        return SearchSimulation(noise, vol, [(c, d) for _, c, d, _ in searches], cb_ref, model_fn, fraction=a.isocontour_fraction,
                                peak_diameter_mm=a.peak_diameter_mm, n_draws=n_draws, seed=_seed("rc searches"))

    sim = None
    chunks: list = []
    if searches and fft_workers() > 1:
        from concurrent.futures import ThreadPoolExecutor

        sim = make_simulation()

        def run(chunk: tuple[int, int]):
            with threads(1):
                return sim.run_chunk(*chunk)  # type: ignore[union-attr]

        with ThreadPoolExecutor(min(fft_workers(), len(sim.chunks))) as pool:
            futures = [pool.submit(run, chunk) for chunk in sim.chunks]
            try:
                _roi_mean_uncertainties(analysis, noise, out, c_b, resolution_fit, overrides)
                chunks = [f.result() for f in futures]
            finally:
                for f in futures:
                    f.cancel()
    else:
        # one thread: one step after the other, so their working memories never add up
        _roi_mean_uncertainties(analysis, noise, out, c_b, resolution_fit, overrides)
        if searches:
            sim = make_simulation()
            chunks = [sim.run_chunk(*chunk) for chunk in sim.chunks]
    sds_all = sim.standard_deviations(chunks) if sim is not None else []
    results = [(name, true, sds) for (name, _, _, true), sds in zip(searches, sds_all)]
    for name, true, sds in results:
        out[(name, "rc_max")] = sds["max"] / true
        out[(name, "rc_mean")] = sds["mean"] / true
        out[(name, "rc_peak")] = sds["peak"] / true
    return out


def _roi_mean_uncertainties(
    analysis: BodyAnalysis,
    noise: NoiseModel,
    out: dict[tuple[str, str], float],
    c_b: dict[float, float],
    resolution_fit: ResolutionFit | None,
    overrides: dict[str, np.ndarray] | None,
) -> None:
    """The ROI-mean based uncertainties of :func:`body_uncertainties` (first-order propagation), into ``out``.

    ``c_b``: background ROI set mean per diameter, Bq/mL.
    """
    part, u_cb = _disc_uncertainties(analysis, noise)
    out.update(part)
    _lung_uncertainty(analysis, noise, out, c_b, u_cb, resolution_fit, overrides)


def _disc_uncertainties(analysis: BodyAnalysis, noise: NoiseModel) -> tuple[dict[tuple[str, str], float], dict[float, float]]:
    """The uncertainties that need the noise model only: background ROI sets and spheres.

    Returns the (roi, metric) -> uncertainty entries and the standard uncertainty (Bq/mL) of
    each background ROI set mean, by diameter. Independent of the resolution fit.
    """
    out: dict[tuple[str, str], float] = {}
    c_b = {d: float(np.mean(means)) for d, means in analysis.background_roi_means.items()}
    vol = analysis.volume
    tpl = analysis.template
    fill = analysis.fill
    a = analysis.options
    values = {(r.roi, r.metric): r.value for r in analysis.rows}
    # ---- background ROI sets: the mean of K ROI means per size (level = background), on the
    # planes and at the positions the measurement used
    discs_by_offset = [(plane, c) for plane, uvs in analysis.background_discs.values() for c in uvs]
    u_cb: dict[float, float] = {}
    for d in analysis.background_roi_means:
        u_cb[d] = math.sqrt(discs_variance(noise, vol, discs_by_offset, d, heteroscedastic=False))
    ref = a.reference_background_diameter_mm
    cb_ref, ucb_ref = c_b[ref], u_cb[ref]
    # ---- spheres, on the planes the measurement used
    for s in tpl.spheres:
        name = s.name
        sp, uv = analysis.sphere_discs[name]
        uv = np.asarray(uv, float).reshape(1, 2)
        c_sphere = float(disc_means(sp, uv, s.diameter_mm)[0])
        u_sphere = math.sqrt(discs_variance(noise, vol, [(sp, uv[0])], s.diameter_mm, heteroscedastic=True))
        cb = c_b.get(s.diameter_mm, cb_ref)
        ucb = u_cb.get(s.diameter_mm, ucb_ref)
        hot = not fill.is_cold(name)
        if hot:
            ratio = float(fill.activity_ratio(name))
            out[(name, "percent_contrast")] = u_percent_contrast_hot(c_sphere, u_sphere, cb, ucb, ratio)
        else:
            out[(name, "percent_contrast")] = u_percent_contrast_cold(c_sphere, u_sphere, cb, ucb)
        n_pct = values.get((name, "background_variability_pct"), math.nan)
        if s.diameter_mm in analysis.background_roi_means:
            k = len(analysis.background_roi_means[s.diameter_mm])
            out[(name, "background_variability_pct")] = u_background_variability(n_pct, k, cb, ucb)
    return out, u_cb


def _lung_uncertainty(
    analysis: BodyAnalysis,
    noise: NoiseModel,
    out: dict[tuple[str, str], float],
    c_b: dict[float, float],
    u_cb: dict[float, float],
    resolution_fit: ResolutionFit | None,
    overrides: dict[str, np.ndarray] | None,
) -> None:
    """Low-density insert residual and background level uncertainties, into ``out``."""
    vol = analysis.volume
    tpl = analysis.template
    pl = analysis.placement
    a = analysis.options
    values = {(r.roi, r.metric): r.value for r in analysis.rows}
    ref = a.reference_background_diameter_mm
    cb_ref, ucb_ref = c_b[ref], u_cb[ref]
    # ---- low-density insert, on the planes and at the positions the measurement used
    if a.lung_insert is not None and (a.lung_insert, "lung_residual_pct") in values and analysis.lung_discs:
        lung = tpl.insert(a.lung_insert)
        discs = [(plane, np.asarray(uv, float)) for _, plane, uv in analysis.lung_discs]
        c_lung = float(np.mean([disc_means(plane, uv[None], a.lung_roi_diameter_mm)[0] for plane, uv in discs]))
        level_fn = None
        if resolution_fit is not None and lung.shape == "cylinder":
            level_fn = _cylinder_level(resolution_fit, pl.insert_centre(lung.name), pl.direction_to_world(lung.axis_unit), 0.5 * lung.outer_diameter_mm)
        u_lung = math.sqrt(discs_variance(noise, vol, discs, a.lung_roi_diameter_mm, heteroscedastic=True, level_fn=level_fn))
        out[(a.lung_insert, "lung_residual_pct")] = 100.0 * u_ratio(c_lung, u_lung, cb_ref, ucb_ref)
    # ---- background level and calibration check
    out[("background", "mean_bq_ml")] = ucb_ref
    if analysis.true_background_bq_ml > 0:
        out[("background", "activity_recovery")] = ucb_ref / analysis.true_background_bq_ml


def _cylinder_level(fit: ResolutionFit, centre: np.ndarray, axis: np.ndarray, radius_mm: float):
    """Noise-free level inside a long cold cylinder: background minus the blurred cylinder.

    ``b (1 - g(rho))`` with ``g`` the blurred disc profile at the fitted effective SD
    (:func:`phantometry.metrics.resolution.blurred_disc_profile`); the spill-in a cold insert
    receives from the background around it.
    """
    a = np.asarray(axis, float) / np.linalg.norm(axis)

    def level(points: np.ndarray) -> np.ndarray:
        rel = np.asarray(points, float) - centre
        ax = rel @ a
        rho = np.sqrt(np.maximum(np.einsum("...i,...i->...", rel, rel) - ax * ax, 0.0))
        return fit.background_bq_ml * (1.0 - blurred_disc_profile(rho, radius_mm, fit.sigma_eff_mm))

    return level


def _seed(name: str) -> int:
    """A fixed seed per ROI name (reproducible bootstrap draws)."""
    return int.from_bytes(name.encode("utf-8")[:8].ljust(8, b"\0"), "little") % (2**32)


# ============================================================================== effective resolution
#: Distance (mm) kept from inserts that are not fitted (the low-density cylinder).
EXCLUSION_MARGIN_MM = 15.0


def body_spheres(analysis: BodyAnalysis) -> list[SphereObservation]:
    """The spheres of a body image-quality analysis as fit inputs (hot: true concentration; cold: 0)."""
    out = []
    for s in analysis.template.spheres:
        true = 0.0 if analysis.fill.is_cold(s.name) else float(analysis.true_insert_bq_ml[s.name])
        out.append(SphereObservation(s.name, analysis.placement.insert_centre(s.name), float(s.diameter_mm), float(s.wall_mm), true))
    return out


def insert_exclusions(analysis: BodyAnalysis, margin_mm: float = EXCLUSION_MARGIN_MM) -> list[Callable[[np.ndarray], np.ndarray]]:
    """Exclusion tests (world points -> bool) for every insert that is not a fitted sphere."""
    pl = analysis.placement
    fns = []
    for ins in analysis.template.inserts:
        if ins.role == "sphere" and ins.shape == "sphere":
            continue
        c = pl.insert_centre(ins.name)
        r_out = 0.5 * ins.outer_diameter_mm + margin_mm
        if ins.shape == "sphere":
            def fn(p, c=c, r_out=r_out):
                rel = p - c
                return np.einsum("...i,...i->...", rel, rel) < r_out * r_out
        else:
            a = pl.direction_to_world(ins.axis_unit)
            half = 0.5 * float(ins.length_mm) + margin_mm

            def fn(p, c=c, a=a, r_out=r_out, half=half):
                rel = p - c
                ax = rel @ a
                rho2 = np.einsum("...i,...i->...", rel, rel) - ax * ax
                return (rho2 < r_out * r_out) & (np.abs(ax) < half)
        fns.append(fn)
    return fns


def fit_body(analysis: BodyAnalysis, noise: NoiseModel | None = None, **kwargs: Any) -> ResolutionFit:
    """:func:`fit_sphere_profiles` on the spheres of a body image-quality analysis.

    Sphere centres start at the placement's; the low-density insert (and any other
    non-sphere insert) is kept out with a 15 mm margin; the background starts at the measured
    C_B of the reference background ROIs.
    """
    ref = analysis.options.reference_background_diameter_mm
    c_b = float(np.mean(analysis.background_roi_means[ref]))
    return fit_sphere_profiles(
        analysis.volume,
        body_spheres(analysis),
        c_b,
        exclusions=insert_exclusions(analysis),
        noise=noise,
        where=analysis.volume.source,
        **kwargs,
    )


# ============================================================================== re-reading on a filtered image
#: The recovery-coefficient metrics.
RC_METRICS = ("rc_max", "rc_mean", "rc_peak")


@dataclass
class DiscSet:
    """Disc ROIs of one diameter on one plane as a linear map of the voxels they read.

    Each disc's partial-area pixel weights (:func:`phantometry.rois.disc_weights`) are spread
    onto the voxels its plane interpolates (:func:`phantometry.noise.plane_voxel_weights`)
    and normalised, so ``means(data)`` gives the discs' means as
    :func:`phantometry.rois.disc_means` on the plane read from ``data`` does (to rounding), for
    any image on the same grid, reading only :attr:`box`.
    """

    box: tuple[slice, slice, slice]
    matrix: Any  # scipy.sparse.csr_matrix (n discs, voxels of box)

    @classmethod
    def build(cls, volume: Volume, plane: PlaneImage, uvs: np.ndarray, diameter_mm: float) -> "DiscSet":
        from scipy import sparse

        parts = []
        for uv in np.asarray(uvs, float).reshape(-1, 2):
            box2d, w2d = disc_weights(plane, uv, diameter_mm)
            box, w = plane_voxel_weights(volume, plane, box2d, w2d)
            nz = np.argwhere(w > 0)  # trim the neighbours that carry no weight
            lo, hi = nz.min(axis=0), nz.max(axis=0) + 1
            w = w[tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))]
            parts.append((np.array([b.start for b in box]) + lo, w / float(w.sum())))
        lo = np.min([p for p, _ in parts], axis=0)
        hi = np.max([p + np.array(w.shape) for p, w in parts], axis=0)
        dims = tuple(int(v) for v in hi - lo)
        rows, cols, vals = [], [], []
        for i, (p, w) in enumerate(parts):
            idx = np.argwhere(w > 0)
            rows.append(np.full(len(idx), i))
            cols.append(np.ravel_multi_index(tuple((idx + (p - lo)).T), dims))
            vals.append(w[tuple(idx.T)])
        matrix = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(len(parts), int(np.prod(dims))))
        return cls(tuple(slice(int(a), int(b)) for a, b in zip(lo, hi)), matrix)  # type: ignore[arg-type]

    def means(self, data: np.ndarray) -> np.ndarray:
        return self.matrix @ np.asarray(data[self.box], dtype=np.float64).ravel()


class SphereSearch:
    """The hottest-voxel and isocontour searches of one sphere, their geometry computed once.

    The same searches as :func:`phantometry.rois.max_in_sphere` and
    :func:`phantometry.rois.isocontour_mean` (voxel centres within the sphere; the
    26-connected VOI ``>= B + fraction (max - B)`` holding the hottest voxel, within the
    sphere grown by one voxel), for reading one sphere of many filtered copies of an image.
    """

    def __init__(self, volume: Volume, centre_mm: np.ndarray, diameter_mm: float) -> None:
        r = 0.5 * float(diameter_mm)
        self.box, self.mask = centres_in_sphere(volume, centre_mm, r)
        self.iso_box, self.iso_mask = centres_in_sphere(volume, centre_mm, r + float(np.max(volume.spacing_mm)))
        self.offset = np.array([a.start - b.start for a, b in zip(self.box, self.iso_box)])

    def max(self, data: np.ndarray) -> tuple[float, tuple[int, ...]]:
        """The hottest voxel within the sphere and its index in :attr:`box` (first in array order)."""
        vals = np.where(self.mask, data[self.box], -np.inf)
        loc = np.unravel_index(int(np.argmax(vals)), vals.shape)
        return float(vals[loc]), tuple(int(v) for v in loc)

    def isocontour_mean(self, data: np.ndarray, background_bq_ml: float, fraction: float) -> float:
        """Mean of the isocontour VOI; NaN when no voxel is above the background."""
        vmax, loc = self.max(data)
        bg = float(background_bq_ml)
        if not (math.isfinite(bg) and vmax > bg):
            return math.nan
        threshold = bg + float(fraction) * (vmax - bg)
        vals = data[self.iso_box].astype(np.float64)
        labels, _ = ndimage.label(self.iso_mask & (vals >= threshold), structure=np.ones((3, 3, 3), dtype=bool))
        voi = labels == labels[tuple(np.array(loc) + self.offset)]
        return float(vals[voi].mean())


class BodyReread(Reread):
    """Body metrics read again on a post-filtered copy of the image (:mod:`phantometry.harmonise`).

    Every ROI stays where :meth:`BodyKind.analyse` placed it: the background, sphere and insert
    discs on their planes (as :class:`DiscSet` maps of the voxels they read), the recovery
    searches about the placed sphere centres. The values come from the same formulas as in the
    analysis; the uncertainties as in :func:`body_uncertainties`, with the noise model of the
    filtered image and the blurred-sphere model widened by the filter (Gaussians compose: the
    effective variance grows by the filter's). ``effective_fwhm_mm`` is the fitted FWHM
    composed with the filter, ``sqrt(FWHM^2 + (2 sqrt(2 ln 2))^2 s_f^2)``; the sphere centres
    do not move.
    """

    def __init__(self, analysis: BodyAnalysis, keys: Sequence[tuple[str, str]]) -> None:
        self.analysis = a = analysis
        opts = a.options
        vol = a.volume
        self.keys = [(str(r), str(m)) for r, m in keys]
        self.spheres = {s.name: s for s in a.template.spheres}
        ref = opts.reference_background_diameter_mm
        have = set(a.background_roi_means)
        self.rc: dict[str, set[str]] = {}
        self.contrast: list[str] = []
        sizes: set[float] = set()
        self.lung = False
        for roi, metric in self.keys:
            s = self.spheres.get(roi)
            if s is not None:
                if metric in RC_METRICS and not a.fill.is_cold(roi):
                    self.rc.setdefault(roi, set()).add(metric)
                    if metric == "rc_mean":
                        sizes.add(ref)
                elif metric == "percent_contrast":
                    self.contrast.append(roi)
                    sizes.add(s.diameter_mm if s.diameter_mm in have else ref)
                elif metric == "background_variability_pct" and s.diameter_mm in have:
                    sizes.add(s.diameter_mm)
            elif roi == opts.lung_insert and metric == "lung_residual_pct" and a.lung_discs:
                self.lung = True
                sizes.add(ref)
            elif roi == "background":
                sizes.add(ref)
        self.sizes = sorted(sizes)
        # the discs as maps of the voxels they read (background: one set per plane and size)
        self.background = {d: [DiscSet.build(vol, plane, uvs, d) for plane, uvs in a.background_discs.values()] for d in self.sizes}
        self.sphere_discs = {n: DiscSet.build(vol, a.sphere_discs[n][0], a.sphere_discs[n][1], self.spheres[n].diameter_mm)
                             for n in self.contrast}
        self.lung_discs = [DiscSet.build(vol, plane, uv, opts.lung_roi_diameter_mm) for _, plane, uv in a.lung_discs] if self.lung else []
        boxes = [ds.box for sets in self.background.values() for ds in sets] + [ds.box for ds in self.sphere_discs.values()]
        boxes += [ds.box for ds in self.lung_discs]
        step = float(np.max(vol.spacing_mm))
        self.searches = {n: SphereSearch(vol, a.placement.insert_centre(n), self.spheres[n].diameter_mm) for n in self.rc}
        for name in self.rc:
            # every voxel the max, isocontour and peak searches and their simulation read
            r = 0.5 * self.spheres[name].diameter_mm + 0.5 * opts.peak_diameter_mm + 3.0 * step
            box, _ = centres_in_sphere(vol, a.placement.insert_centre(name), r)
            boxes.append(box)
        self.boxes = boxes

    def _reference_background(self, c_b: dict[float, float]) -> float:
        ref = self.analysis.options.reference_background_diameter_mm
        return c_b[ref] if ref in c_b else float(np.mean(self.analysis.background_roi_means[ref]))

    def _composed_fit(self, blur_variance_mm2: float) -> ResolutionFit | None:
        fit = self.analysis.resolution
        if fit is None:
            return None
        return dataclasses.replace(fit, sigma_eff_mm=math.sqrt(fit.sigma_eff_mm**2 + max(0.0, blur_variance_mm2)))

    def read(self, volume: Volume, blur_variance_mm2: float) -> tuple[dict[tuple[str, str], float], dict[str, Any]]:
        a = self.analysis
        opts = a.options
        data = volume.data
        means = {d: np.concatenate([ds.means(data) for ds in sets]) for d, sets in self.background.items()}
        c_b = {d: float(np.mean(m)) for d, m in means.items()}
        bv = {d: (background_variability(m)[0] if len(m) >= 2 else math.nan) for d, m in means.items()}
        cb_ref = self._reference_background(c_b)
        old = a.values()
        values: dict[tuple[str, str], float] = {k: math.nan for k in self.keys}
        state: dict[str, Any] = {"c_b": c_b, "means": means, "c_sphere": {}, "c_lung": None}
        for name, ds in self.sphere_discs.items():
            s = self.spheres[name]
            c_sphere = float(ds.means(data)[0])
            state["c_sphere"][name] = c_sphere
            cb = c_b.get(s.diameter_mm, cb_ref)
            if a.fill.is_cold(name):
                values[(name, "percent_contrast")] = percent_contrast_cold(c_sphere, cb)
            else:
                values[(name, "percent_contrast")] = percent_contrast_hot(c_sphere, cb, float(a.fill.activity_ratio(name)))
        for roi, metric in self.keys:
            s = self.spheres.get(roi)
            if s is not None and metric == "background_variability_pct" and s.diameter_mm in bv:
                values[(roi, metric)] = bv[s.diameter_mm]
            elif s is not None and metric.startswith("centre_"):
                values[(roi, metric)] = old.get((roi, metric), math.nan)
            elif roi == "background" and metric == "mean_bq_ml":
                values[(roi, metric)] = cb_ref
            elif roi == "background" and metric == "activity_recovery" and a.true_background_bq_ml > 0:
                values[(roi, metric)] = cb_ref / a.true_background_bq_ml
            elif roi == "phantom" and metric == "effective_fwhm_mm" and a.resolution is not None:
                values[(roi, metric)] = math.hypot(a.resolution.fwhm_mm, FWHM_PER_SIGMA * math.sqrt(max(0.0, blur_variance_mm2)))
        for name, metrics in self.rc.items():
            s = self.spheres[name]
            centre = a.placement.insert_centre(name)
            true = float(a.true_insert_bq_ml[name])
            search = self.searches[name]
            if "rc_max" in metrics:
                values[(name, "rc_max")] = search.max(data)[0] / true
            if "rc_mean" in metrics:  # NaN when nothing is above the background (no isocontour VOI)
                values[(name, "rc_mean")] = search.isocontour_mean(data, cb_ref, opts.isocontour_fraction) / true
            if "rc_peak" in metrics:
                values[(name, "rc_peak")] = peak_search(volume, centre, s.diameter_mm, opts.peak_diameter_mm)[0] / true
        if self.lung:
            vals = np.array([float(ds.means(data)[0]) for ds in self.lung_discs])
            state["c_lung"] = float(np.mean(vals))
            values[(opts.lung_insert, "lung_residual_pct")] = lung_residual(vals, cb_ref)[0]
        state["values"] = values
        state["cb_ref"] = cb_ref
        return values, state

    def uncertainties(self, volume: Volume, noise: NoiseModel, blur_variance_mm2: float, state: dict[str, Any], *,
                      n_draws: int | None = None) -> dict[tuple[str, str], float | None]:
        a = self.analysis
        opts = a.options
        n_draws = BOOTSTRAP_DRAWS if n_draws is None else int(n_draws)
        values = state["values"]
        c_b = state["c_b"]
        cb_ref = state["cb_ref"]
        ref = opts.reference_background_diameter_mm
        fit = self._composed_fit(blur_variance_mm2)
        out: dict[tuple[str, str], float | None] = {}
        old = {(r.roi, r.metric): r.uncertainty for r in a.rows}
        noise_free = noise.sd_bq_ml <= 1e-6 * max(noise.background_bq_ml, 1e-12)
        # ---- recovery coefficients: the simulation of the searches (all spheres share its draws)
        names = [s.name for s in a.template.spheres if s.name in self.rc]
        if names:
            if noise_free:
                sds = [{"max": 0.0, "mean": 0.0, "peak": 0.0} for _ in names]
            else:
                sim = SearchSimulation(noise, volume, [(a.placement.insert_centre(n), float(self.spheres[n].diameter_mm)) for n in names],
                                       cb_ref, fit.model_at if fit is not None else None, fraction=opts.isocontour_fraction,
                                       peak_diameter_mm=opts.peak_diameter_mm, n_draws=n_draws, seed=_seed("rc searches"))
                sds = sim.standard_deviations([sim.run_chunk(*chunk) for chunk in sim.chunks])
            for name, sd in zip(names, sds):
                true = float(a.true_insert_bq_ml[name])
                for metric in self.rc[name]:
                    out[(name, metric)] = sd[metric[3:]] / true
        # ---- ROI means: first-order propagation with the filtered autocovariance
        u_cb: dict[float, float] = {}

        def ucb(d: float) -> float:
            if d not in u_cb:
                discs = [(plane, c) for plane, uvs in a.background_discs.values() for c in uvs]
                u_cb[d] = math.sqrt(discs_variance(noise, volume, discs, d, heteroscedastic=False))
            return u_cb[d]

        for roi, metric in self.keys:
            key = (roi, metric)
            if key in out or not math.isfinite(values.get(key, math.nan)):
                continue
            s = self.spheres.get(roi)
            if s is not None and metric == "percent_contrast":
                d = s.diameter_mm if s.diameter_mm in c_b else ref
                sp, uv = a.sphere_discs[roi]
                u_sphere = math.sqrt(discs_variance(noise, volume, [(sp, np.asarray(uv, float).reshape(2))], s.diameter_mm, heteroscedastic=True))
                c_sphere = state["c_sphere"][roi]
                if a.fill.is_cold(roi):
                    out[key] = u_percent_contrast_cold(c_sphere, u_sphere, c_b[d], ucb(d))
                else:
                    out[key] = u_percent_contrast_hot(c_sphere, u_sphere, c_b[d], ucb(d), float(a.fill.activity_ratio(roi)))
            elif s is not None and metric == "background_variability_pct":
                d = s.diameter_mm
                out[key] = u_background_variability(values[key], len(state["means"][d]), c_b[d], ucb(d))
            elif roi == opts.lung_insert and metric == "lung_residual_pct":
                lung = a.template.insert(opts.lung_insert)
                level_fn = None
                if fit is not None and lung.shape == "cylinder":
                    level_fn = _cylinder_level(fit, a.placement.insert_centre(lung.name), a.placement.direction_to_world(lung.axis_unit),
                                               0.5 * lung.outer_diameter_mm)
                discs = [(plane, np.asarray(uv, float)) for _, plane, uv in a.lung_discs]
                u_lung = math.sqrt(discs_variance(noise, volume, discs, opts.lung_roi_diameter_mm, heteroscedastic=True, level_fn=level_fn))
                out[key] = 100.0 * u_ratio(state["c_lung"], u_lung, cb_ref, ucb(ref))
            elif roi == "background" and metric == "mean_bq_ml":
                out[key] = ucb(ref)
            elif roi == "background" and metric == "activity_recovery":
                out[key] = ucb(ref) / a.true_background_bq_ml
            elif roi == "phantom" and metric == "effective_fwhm_mm" and a.resolution is not None:
                u0 = old.get(key)
                out[key] = None if u0 is None else u0 * a.resolution.fwhm_mm / values[key] if values[key] > 0 else u0
            else:
                out[key] = old.get(key)
        return out
