"""Small-animal phantom image quality (analysis kind ``small_animal_image_quality``): the
NEMA NU 4-2008 image-quality phantom (rods, uniform region, cold chambers).

Metrics (:mod:`phantometry.metrics.nu4`): uniformity of the uniform region (mean, max, min,
%STD) and its activity recovery against the fill record; rod recovery coefficients from axial
line profiles through the hottest pixel of the slice-averaged rod section, with %STD;
spill-over ratios in the water and air chambers, with %STD.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydantic import BaseModel, ConfigDict, Field
from scipy import ndimage

from ..errors import PhantomNotFound, TemplateError
from ..fill import FillRecord
from ..locate import ORIGINAL_SLICES_MAX_TILT_DEG, Placement, SmallAnimalPlacement, locate_small_animal
from ..metrics.nu4 import ratio_with_std, uniformity
from ..rois import PlaneImage, cylinder_weights, sample_plane
from ..templates import Template, Vec2
from ..volume import Volume
from .base import (
    Analysis,
    AnalysisSettings,
    KindOptions,
    Overlay,
    PhantomKind,
    RoiSetCheck,
    RowBuilder,
    Shape,
    SummaryTable,
    View,
    display_window,
    series_phrase,
    calibration_warning,
    check_scan_time,
    fmt_number,
)
from ._placement import cylinder_inside, interval_overlap_fraction, outside_warning

#: Voxels count in a NU 4 VOI when at least this fraction of their cell lies inside it.
VOI_MEMBERSHIP = 0.5


class CylinderVoi(BaseModel):
    """A cylindrical VOI along the phantom axis (template frame)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    centre_z_mm: float = 0.0
    diameter_mm: float = Field(gt=0)
    length_mm: float = Field(gt=0)


class SpilloverVoi(BaseModel):
    """The spill-over VOI, centred in each cold chamber."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    diameter_mm: float = Field(gt=0)
    length_mm: float = Field(gt=0)


#: Top of the overlay's grey scale, times the uniform region's mean (rods and uniform region
#: hold one solution: the uniform region sits at two thirds grey, its noise texture visible).
ROD_WINDOW_FACTOR = 1.5


class Options(KindOptions):
    """Analysis options of the NEMA NU 4 small-animal image-quality phantom."""

    solid_section: str
    uniform_voi: CylinderVoi
    rod_profile_z_mm: Vec2
    rod_search_diameter_factor: float = Field(default=2.0, gt=0)
    spillover_voi: SpilloverVoi


@dataclass
class RodSampling:
    """How the rod section was read (recorded in ``measurements.json``, ``sampling``).

    Attributes
    ----------
    mode : ``original_slices`` (the phantom axis within
        :data:`~phantometry.locate.ORIGINAL_SLICES_MAX_TILT_DEG` of the slice axis: the original
        slices are averaged and the profiles run down the original voxel columns) or
        ``interpolated_planes`` (a tilted phantom: planes perpendicular to its axis are
        resampled trilinearly at the slice spacing).
    tilt_deg : angle between the phantom axis and the slice axis.
    z_range_mm : template-frame z range of the profiles (the central part of the rod section).
    planes : number of slices (planes) averaged, i.e. samples per profile.
    step_mm : their spacing along the axis.
    slices : first and last slice index read (``original_slices``), else None.
    """

    mode: str
    tilt_deg: float
    z_range_mm: tuple[float, float]
    planes: int
    step_mm: float
    slices: tuple[int, int] | None = None

    def as_dict(self) -> dict[str, Any]:
        return {
            "mode": self.mode,
            "axis_to_slice_axis_deg": round(self.tilt_deg, 3),
            "z_range_mm": [round(float(v), 3) for v in self.z_range_mm],
            "planes": self.planes,
            "step_mm": round(self.step_mm, 4),
            "slices": None if self.slices is None else list(self.slices),
        }


@dataclass
class UniformVoi:
    """The uniform-region VOI as placed in this image (template frame, along the found axis).

    Attributes
    ----------
    centre_z_mm, length_mm, diameter_mm : the VOI used.
    planned_length_mm : the template's length.
    free_z_mm : the free part of the uniform region (face to the nearest chamber end).
    found : the chambers' ends were found in the image (otherwise the template's VOI is used).
    psf_fwhm_mm : the clearance aimed at (the point-response FWHM found).
    """

    centre_z_mm: float
    length_mm: float
    diameter_mm: float
    planned_length_mm: float
    free_z_mm: tuple[float, float]
    found: bool
    psf_fwhm_mm: float

    @property
    def z_range_mm(self) -> tuple[float, float]:
        return self.centre_z_mm - self.length_mm / 2, self.centre_z_mm + self.length_mm / 2

    @property
    def end_clearance_mm(self) -> float:
        lo, hi = self.z_range_mm
        return min(lo - self.free_z_mm[0], self.free_z_mm[1] - hi)

    def as_dict(self) -> dict[str, Any]:
        return {
            "centre_z_mm": round(self.centre_z_mm, 3),
            "length_mm": round(self.length_mm, 3),
            "planned_length_mm": self.planned_length_mm,
            "diameter_mm": self.diameter_mm,
            "free_region_z_mm": [round(float(v), 3) for v in self.free_z_mm],
            "from_image": self.found,
            "end_clearance_mm": round(self.end_clearance_mm, 3),
            "point_response_fwhm_mm": round(self.psf_fwhm_mm, 3),
        }


@dataclass
class SmallAnimalAnalysis(Analysis):
    """Everything measured on one small-animal phantom scan."""

    kind = "small_animal_image_quality"

    #: slice average over the rod profile range
    rod_image: PlaneImage | None = None
    #: rod name -> (u, v) of its hottest pixel on :attr:`rod_image`, mm
    rod_peaks_uv: dict[str, np.ndarray] = field(default_factory=dict)
    rod_sampling: RodSampling | None = None
    uniform_voi: UniformVoi | None = None

    @property
    def options(self) -> Options:
        return KIND.options(self.template)

    def summary_table(self) -> SummaryTable:
        vals = self.values()
        rows = [["uniform_region", "mean Bq/mL", fmt_number(vals[("uniform_region", "mean_bq_ml")], digits=1),
                 fmt_number(vals[("uniform_region", "uniformity_std_pct")], digits=2)]]
        for r in self.template.rods:
            rows.append([r.name, "RC", fmt_number(vals[(r.name, "rc_rod")], digits=3), fmt_number(vals[(r.name, "rc_rod_std_pct")], digits=2)])
        for c in self.template.chambers:
            rows.append([c.name, "SOR", fmt_number(vals[(c.name, "spillover_ratio")], digits=3),
                         fmt_number(vals[(c.name, "spillover_ratio_std_pct")], digits=1)])
        return SummaryTable(self.template.title, ["ROI", "metric", "value", "%STD"], rows)

    def overlay(self) -> Overlay:
        """Rod-section slice average with search circles and peaks, and a longitudinal view
        through the cold chambers (as found) with the uniform-region and spill-over VOIs."""
        pl, tpl, a = self.placement, self.template, self.options
        img = self.rod_image
        assert img is not None and self.rod_sampling is not None and self.uniform_voi is not None
        z_lo, z_hi = self.rod_sampling.z_range_mm
        z_ref = 0.5 * (z_lo + z_hi)
        shapes: list[Shape] = []
        for r in tpl.rods:
            uv = img.world_to_uv(pl.to_world([r.centre_mm[0], r.centre_mm[1], z_ref]))
            shapes.append(Shape("circle", "search", uv, r.diameter_mm * a.rod_search_diameter_factor,
                                label=r.name.replace("rod_", "").replace("mm", " mm"), name=r.name))
            shapes.append(Shape("marker", "peak", self.rod_peaks_uv[r.name], name=f"{r.name} peak"))
        how = "original slices" if self.rod_sampling.mode == "original_slices" else "interpolated planes"
        level = self.value("uniform_region", "mean_bq_ml") or self.true_background_bq_ml
        vmax, note = display_window(level, factor=ROD_WINDOW_FACTOR, what="uniform-region mean")
        views = [View(img, f"Rods: mean of {self.rod_sampling.planes} {how}, z {z_lo:.1f} to {z_hi:.1f} mm (phantom frame)",
                      shapes, vmax, window_note=note)]
        u_dir = pl.rotation[:, 0]
        found = [c for c in getattr(pl, "chambers", []) if c.found]
        if len(found) >= 2:  # the plane through the axis and the chambers as found
            dxy = found[1].xy_template_mm - found[0].xy_template_mm
            if np.linalg.norm(dxy) > 0:
                u_dir = pl.rotation[:, :2] @ (dxy / np.linalg.norm(dxy))
        lon = sample_plane(self.volume, pl.to_world(tpl.body_centre_mm), u_dir, pl.axis_world,
                           max(tpl.body_length_mm, 2 * tpl.body.half_extent_xy_mm) / 2 + 3)
        uvoi = self.uniform_voi
        lshapes = [Shape("rect", "voi", lon.world_to_uv(pl.to_world([0.0, 0.0, uvoi.centre_z_mm])), (uvoi.diameter_mm, uvoi.length_mm),
                         label="uniform VOI", label_below=True, name="uniform_region")]
        for c in tpl.chambers:
            lshapes.append(Shape("rect", "insert", lon.world_to_uv(pl.insert_centre(c.name)),
                                 (a.spillover_voi.diameter_mm, a.spillover_voi.length_mm), label=c.name.replace("cold_", ""), name=c.name))
        views.append(View(lon, "Through the phantom axis and the cold chambers as found (phantom frame)", lshapes, vmax, window_note=note))
        title = f"{tpl.title} | {series_phrase(self.volume)} | rod match {pl.ring_score or 0:.2f}"
        legend = {
            "search": f"rod search region ({a.rod_search_diameter_factor:g} x the rod diameter)",
            "peak": "hottest pixel of each rod (its profile runs there)",
            "voi": f"uniform-region VOI, {uvoi.diameter_mm:g} x {uvoi.length_mm:.1f} mm (mean, %STD)",
            "insert": f"spill-over VOI in each cold chamber, {a.spillover_voi.diameter_mm:g} x {a.spillover_voi.length_mm:g} mm",
        }
        caption = [f"Rod match {pl.ring_score or 0:.2f}: how closely the rods' angular profile in the image follows the template's "
                   "(normalised correlation: 1 = identical).",
                   f"Grey scale: white 0, black {vmax:,.0f} Bq/mL and above ({ROD_WINDOW_FACTOR:g} x the uniform region's mean). Views in "
                   "the phantom's own frame; the letters name the patient directions of each edge "
                   f"({'DICOM LPS' if self.volume.frame == 'LPS' else 'NIfTI RAS'} frame), so a turned or flipped phantom shows."]
        return Overlay(views, title, frame=self.volume.frame, legend=legend, caption=caption)

    def json_extras(self) -> dict[str, Any]:
        out = super().json_extras()
        out["sampling"] = {
            "rods": None if self.rod_sampling is None else self.rod_sampling.as_dict(),
            "uniform_voi": None if self.uniform_voi is None else self.uniform_voi.as_dict(),
        }
        return out

    def key_metrics(self) -> list[tuple[str, str]]:
        out = [("uniform_region", "uniformity_std_pct"), ("uniform_region", "activity_recovery")]
        out += [(r.name, "rc_rod") for r in self.template.rods]
        return out + [(c.name, "spillover_ratio") for c in self.template.chambers]


def _voi_values(volume: Volume, centre: np.ndarray, axis: np.ndarray, diameter: float, length: float, what: str, where: str) -> np.ndarray:
    try:
        roi = cylinder_weights(volume, centre, axis, diameter, length)
    except PhantomNotFound:
        raise PhantomNotFound(f"{where}: the {what} lies outside the image; is the phantom in the field of view?") from None
    if roi.clipped:
        raise PhantomNotFound(f"{where}: the {what} reaches beyond the image; is the phantom in the field of view?")
    vals = volume.data[roi.box][roi.weights >= VOI_MEMBERSHIP]
    if vals.size < 2:
        raise PhantomNotFound(f"{where}: the {what} holds fewer than two voxels; the voxels are too coarse")
    return vals.astype(np.float64)


# ------------------------------------------------------------------------------- placement
def place_uniform_voi(pl: SmallAnimalPlacement, template: Template, a: Options) -> UniformVoi:
    """The uniform-region VOI for this image.

    NEMA NU 4 (recalled) puts a 22.5 mm x 10 mm VOI over the centre of the uniform region; the
    part of it free of the cold chambers runs from the face of the solid section (z = 0) to the
    nearest chamber end found in the image. The VOI is centred there and keeps the point-response
    FWHM found in the image from both ends (cold plastic on either side): when the free part is
    too short for that, the VOI is shortened, but to no less than half its planned length.
    When the chambers' ends were not found, the template's VOI is used as written.
    """
    u = a.uniform_voi
    fwhm = float(pl.psf_fwhm_mm or 0.0)
    ends = [c.end_z_mm for c in pl.chambers if c.found and c.end_z_mm is not None]
    if not ends or len(ends) < len(template.chambers):
        free = (0.0, float(min([c.centre_mm[2] - c.length_mm / 2 - c.wall_mm for c in template.chambers] or [template.body.z_range_mm[1]])))
        return UniformVoi(u.centre_z_mm, u.length_mm, u.diameter_mm, u.length_mm, free, False, fwhm)
    free = (0.0, float(min(ends)))
    span = free[1] - free[0]
    length = float(min(u.length_mm, max(span - 2 * fwhm, u.length_mm / 2)))
    return UniformVoi(0.5 * (free[0] + free[1]), length, u.diameter_mm, u.length_mm, free, True, fwhm)


# ------------------------------------------------------------------------------- rod sampling
def _tilt_to_slice_axis_deg(volume: Volume, axis: np.ndarray) -> float:
    return math.degrees(math.acos(min(1.0, abs(float(np.asarray(axis, float) @ volume.axes_world[0])))))


@dataclass
class _RodStack:
    values: np.ndarray  # (n, A, B): the slices (planes) of the rod section
    world: np.ndarray  # (A, B, 3): world mm of each column at the middle of the slab
    sampling: RodSampling
    display: PlaneImage  # the slab average on a plane perpendicular to the axis


def _rod_stack(volume: Volume, pl: Placement, z_range: tuple[float, float], half: float, where: str) -> _RodStack:
    """The rod section as the standard reads it: original slices when the phantom lies along the
    slice axis (within :data:`ORIGINAL_SLICES_MAX_TILT_DEG`), else interpolated planes."""
    axis = pl.axis_world
    tilt = _tilt_to_slice_axis_deg(volume, axis)
    z0, z1 = z_range
    zmid = 0.5 * (z0 + z1)
    u, v = pl.rotation[:, 0], pl.rotation[:, 1]
    disp = sample_plane(volume, pl.to_world([0.0, 0.0, zmid]), u, v, half)
    nv, nu = disp.values.shape
    cc, rr = np.meshgrid(np.arange(nu) * disp.pixel_mm, np.arange(nv) * disp.pixel_mm)
    nodes = disp.origin_mm + cc[..., None] * disp.u_dir + rr[..., None] * disp.v_dir  # (nv, nu, 3)
    if tilt <= ORIGINAL_SLICES_MAX_TILT_DEG:
        dz = float(volume.spacing_mm[0])
        n = max(1, int(round((z1 - z0) / dz)))
        kc = float(volume.world_to_index(pl.to_world([0.0, 0.0, zmid]))[0])
        k0 = int(math.floor(kc - (n - 1) / 2 + 0.5))
        k1 = k0 + n
        if k0 < 0 or k1 > volume.shape[0]:
            raise PhantomNotFound(f"{where}: the rod section reaches beyond the first or last slice; is the whole phantom in the field of view?")
        idx = volume.world_to_index(nodes)
        jlo = max(0, int(math.floor(np.nanmin(idx[..., 1]))) - 1)
        jhi = min(volume.shape[1], int(math.ceil(np.nanmax(idx[..., 1]))) + 2)
        ilo = max(0, int(math.floor(np.nanmin(idx[..., 2]))) - 1)
        ihi = min(volume.shape[2], int(math.ceil(np.nanmax(idx[..., 2]))) + 2)
        if jhi <= jlo or ihi <= ilo:
            raise PhantomNotFound(f"{where}: the rods lie outside the image; is the phantom in the field of view?")
        values = volume.data[k0:k1, jlo:jhi, ilo:ihi].astype(np.float64)
        kmid = 0.5 * (k0 + k1 - 1)
        jj, ii = np.meshgrid(np.arange(jlo, jhi, dtype=float), np.arange(ilo, ihi, dtype=float), indexing="ij")
        world = volume.index_to_world(np.stack([np.full(jj.shape, kmid), jj, ii], axis=-1))
        avg = values.mean(axis=0)
        shown = ndimage.map_coordinates(avg, [idx[..., 1].ravel() - jlo, idx[..., 2].ravel() - ilo], order=1, mode="constant",
                                        cval=np.nan, prefilter=False).reshape(nv, nu)
        z_of = pl.to_template(volume.index_to_world(np.array([[k, 0.5 * (jlo + jhi - 1), 0.5 * (ilo + ihi - 1)] for k in (k0, k1 - 1)])))[:, 2]
        sampling = RodSampling("original_slices", tilt, (float(z_of.min()) - dz / 2, float(z_of.max()) + dz / 2), n, dz, (k0, k1 - 1))
        display = PlaneImage(shown, disp.origin_mm, disp.u_dir, disp.v_dir, disp.pixel_mm)
        return _RodStack(values, world, sampling, display)
    # a tilted phantom: planes perpendicular to its axis, trilinear, at the spacing along the axis
    dz = float(abs(volume.spacing_mm @ np.abs(volume.axes_world @ axis)))
    dz = min(dz, float(np.max(volume.spacing_mm)))
    n = max(1, int(round((z1 - z0) / dz)))
    zs = zmid + (np.arange(n) - (n - 1) / 2) * dz  # as many planes as slices would fit, centred
    offs = (zs - zmid)[:, None, None, None] * axis
    values = _spline_samples(volume, nodes[None] + offs)
    avg = values.mean(axis=0)
    sampling = RodSampling("interpolated_planes", tilt, (float(zs[0] - dz / 2), float(zs[-1] + dz / 2)), len(zs), dz)
    display = PlaneImage(avg, disp.origin_mm, disp.u_dir, disp.v_dir, disp.pixel_mm)
    return _RodStack(values, nodes + (float(zs.mean()) - zmid) * axis, sampling, display)


def _spline_samples(volume: Volume, points_mm: np.ndarray, margin: int = 4) -> np.ndarray:
    """Cubic-spline samples of the volume at world points (NaN outside the grid).

    The interpolating cubic B-spline (``scipy.ndimage``, prefiltered on the sub-box that holds
    the points plus a margin) reproduces the voxel values at the voxel centres and, unlike
    trilinear interpolation, does not smooth between them: a thin rod keeps its peak on a
    tilted plane.
    """
    idx = volume.world_to_index(points_mm)
    flat = idx.reshape(-1, 3)
    ok = np.all((flat >= -0.5) & (flat <= np.array(volume.shape) - 0.5), axis=1)
    out = np.full(len(flat), np.nan)
    if ok.any():
        lo = np.maximum(np.floor(flat[ok].min(axis=0)).astype(int) - margin, 0)
        hi = np.minimum(np.ceil(flat[ok].max(axis=0)).astype(int) + margin + 1, volume.shape)
        box = volume.data[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]].astype(np.float64)
        out[ok] = ndimage.map_coordinates(box, (flat[ok] - lo).T, order=3, mode="nearest", prefilter=True)
    return out.reshape(idx.shape[:-1])


def _rod_profile_range(pl: SmallAnimalPlacement, a: Options) -> tuple[float, float]:
    """The central part of the rod section found in the image (template frame), as long as the
    template's ``rod_profile_z_mm``; the template's range when the rods' far end was not seen."""
    z0, z1 = a.rod_profile_z_mm
    if pl.rod_section_z_mm is None:
        return float(z0), float(z1)
    mid = 0.5 * (pl.rod_section_z_mm[0] + pl.rod_section_z_mm[1])
    return mid - (z1 - z0) / 2, mid + (z1 - z0) / 2


# ------------------------------------------------------------------------------- the kind
class SmallAnimalKind(PhantomKind):
    """NEMA NU 4-2008 image quality on the small-animal phantom."""

    name = "small_animal_image_quality"
    summary = "NEMA NU 4 uniformity, rod recovery and spill-over ratios with %STD"
    Options = Options

    def insert_references(self, options: Options) -> tuple[str, ...]:
        return ("solid_section",)

    def check_template(self, template: Template) -> list[str]:
        a = self.options(template)
        if not template.rods:
            raise TemplateError(f"{template.source_path or template.name}: invalid template: analysis kind {self.name} needs inserts with role: rod")
        if not template.chambers:
            raise TemplateError(f"{template.source_path or template.name}: invalid template: analysis kind {self.name} needs inserts with role: chamber")
        return _check_vois(template, a)

    def known_metrics(self, template: Template) -> dict[str, tuple[str, ...]]:
        out: dict[str, tuple[str, ...]] = {
            "uniform_region": ("mean_bq_ml", "max_bq_ml", "min_bq_ml", "uniformity_std_pct", "activity_recovery"),
        }
        for r in template.rods:
            out[r.name] = ("rc_rod", "rc_rod_std_pct", "centre_x_mm", "centre_y_mm", "centre_z_mm")
        for c in template.chambers:
            out[c.name] = ("spillover_ratio", "spillover_ratio_std_pct")
        return out

    def analyse(
        self,
        volume: Volume,
        template: Template,
        fill: FillRecord,
        *,
        overrides: dict[str, np.ndarray] | None = None,
        where: str,
        settings: AnalysisSettings,
    ) -> SmallAnimalAnalysis:
        """Locate the small-animal phantom and compute the NEMA NU 4-2008 image-quality metrics."""
        check_scan_time(volume, fill, where)
        a = self.options(template)
        pl = locate_small_animal(volume, template, solid_section=a.solid_section, rod_profile_z_mm=a.rod_profile_z_mm,
                                 spillover_voi_mm=(a.spillover_voi.diameter_mm, a.spillover_voi.length_mm),
                                 overrides=overrides, where=where)
        axis = pl.axis_world
        out = RowBuilder(volume, template)
        add = out.add
        rows = out.rows

        # ---- uniform region
        uvoi = place_uniform_voi(pl, template, a)
        uni_vals = _voi_values(volume, pl.to_world([0.0, 0.0, uvoi.centre_z_mm]), axis, uvoi.diameter_mm, uvoi.length_mm, "uniform-region VOI", where)
        uni = uniformity(uni_vals)
        voi_note = None
        if uvoi.length_mm < uvoi.planned_length_mm - 1e-9:
            voi_note = (f"uniform VOI {uvoi.length_mm:.1f} mm long (planned {uvoi.planned_length_mm:g} mm) to keep "
                        f"{uvoi.end_clearance_mm:.1f} mm from the solid section and the chambers")
        for k in ("mean_bq_ml", "max_bq_ml", "min_bq_ml"):
            add("uniform_region", k, uni[k], "Bq/mL")
        add("uniform_region", "uniformity_std_pct", uni["uniformity_std_pct"], "%", note=voi_note)
        true_bg = fill.background_bq_ml(volume.acquired_at)
        add("uniform_region", "activity_recovery", uni["mean_bq_ml"] / true_bg, "1")
        # ---- rods: slice average over the central 10 mm, hottest pixel, axial profile
        rods = template.rods
        z_range = _rod_profile_range(pl, a)
        half = max(np.hypot(r.centre_mm[0], r.centre_mm[1]) + r.diameter_mm * a.rod_search_diameter_factor for r in rods) + 2
        stack = _rod_stack(volume, pl, z_range, half, where)
        avg = stack.values.mean(axis=0)
        peaks: dict[str, np.ndarray] = {}
        z_mid = 0.5 * (stack.sampling.z_range_mm[0] + stack.sampling.z_range_mm[1])
        for r in rods:
            centre = pl.to_world([r.centre_mm[0], r.centre_mm[1], z_mid])
            rel = stack.world - centre
            dist = np.linalg.norm(rel - (rel @ axis)[..., None] * axis, axis=-1)
            radius = r.diameter_mm * a.rod_search_diameter_factor / 2
            inside = dist <= radius
            if not inside.any():
                inside = dist <= dist.min()
            if not np.isfinite(avg[inside]).all():
                raise PhantomNotFound(f"{where}: rod {r.name} lies (partly) outside the image; is the whole phantom in the field of view?")
            flat = np.where(inside, avg, -np.inf)
            j, i = np.unravel_index(int(np.argmax(flat)), flat.shape)
            profile = stack.values[:, j, i]
            rc, rc_std = ratio_with_std(profile, uni["mean_bq_ml"], uni["sd_bq_ml"])
            add(r.name, "rc_rod", rc, "1")
            add(r.name, "rc_rod_std_pct", rc_std, "%")
            peak_world = stack.world[j, i]
            peaks[r.name] = stack.display.world_to_uv(peak_world)
            for ax_name, val in zip("xyz", peak_world):
                add(r.name, f"centre_{ax_name}_mm", val, "mm")
        # ---- spill-over ratios in the cold chambers (VOIs centred on the chambers as found)
        sv = a.spillover_voi
        for c in template.chambers:
            vals = _voi_values(volume, pl.insert_centre(c.name), pl.direction_to_world(c.axis_unit), sv.diameter_mm, sv.length_mm, f"{c.name} VOI", where)
            sor, sor_std = ratio_with_std(vals, uni["mean_bq_ml"], uni["sd_bq_ml"])
            add(c.name, "spillover_ratio", sor, "1")
            add(c.name, "spillover_ratio_std_pct", sor_std, "%")
        warnings = list(pl.warnings)
        if uvoi.found and uvoi.end_clearance_mm < uvoi.psf_fwhm_mm - 1e-6:
            warnings.append(
                f"the free part of the uniform region ({uvoi.free_z_mm[1] - uvoi.free_z_mm[0]:.1f} mm) is too short to keep the "
                f"uniform VOI ({uvoi.length_mm:.1f} mm) one point-response FWHM ({uvoi.psf_fwhm_mm:.1f} mm) from the solid section and "
                f"the chambers: it keeps {uvoi.end_clearance_mm:.1f} mm, and the blurred cold ends raise its %STD"
            )
        note = calibration_warning(uni["mean_bq_ml"], true_bg, "uniform-region mean")
        if note:
            warnings.append(note)
            rows[[r.metric for r in rows].index("activity_recovery")].note = note
        checks = _placement_checks(pl, template, a, uvoi, stack.sampling, z_range)
        for chk, what in zip(checks, ("uniform-region VOI", "rod profiles", "spill-over VOIs")):
            w = outside_warning(chk, what)
            if w:
                warnings.append(w)
        true_ins = {r.name: true_bg for r in rods} | {c.name: 0.0 for c in template.chambers}
        return SmallAnimalAnalysis(volume, template, fill, pl, rows, true_bg, true_ins, warnings, placement_checks=checks,
                                   rod_image=stack.display, rod_peaks_uv=peaks, rod_sampling=stack.sampling, uniform_voi=uvoi)


def _placement_checks(pl: SmallAnimalPlacement, template: Template, a: Options, uvoi: UniformVoi, sampling: RodSampling,
                      z_range: tuple[float, float]) -> list[RoiSetCheck]:
    """Placement quality of the three ROI sets (uniform VOI, rod profiles, spill-over VOIs)
    against their regions as found in this image."""
    rods, chambers = template.rods, template.chambers
    rod_rows = [(r.name, m) for r in rods for m in ("rc_rod", "rc_rod_std_pct")]
    sor_rows = [(c.name, m) for c in chambers for m in ("spillover_ratio", "spillover_ratio_std_pct")]
    uni_rows = [("uniform_region", m) for m in ("mean_bq_ml", "max_bq_ml", "min_bq_ml", "uniformity_std_pct", "activity_recovery")]
    # uniform VOI: inside the body found, between the face and the chamber ends found
    body_r = float(pl.body_radius_mm or template.body.diameter_mm / 2)
    frac, edge = cylinder_inside(0.0, uvoi.diameter_mm / 2, uvoi.z_range_mm, body_r, uvoi.free_z_mm)
    if uvoi.found:
        note = (f"centred in the free part of the uniform region found in the image (z {uvoi.free_z_mm[0]:.1f} to {uvoi.free_z_mm[1]:.1f} mm); "
                f"{uvoi.end_clearance_mm:.1f} mm from its ends, {body_r - uvoi.diameter_mm / 2:.1f} mm from the body edge "
                f"(point-response FWHM {uvoi.psf_fwhm_mm:.1f} mm)")
    else:
        note = "the chambers' ends were not found: the template's VOI is used and its clearance from them is not confirmed"
    uniform = RoiSetCheck("uniform_voi", 1, 1, frac, edge, bool(uvoi.found and frac >= 1 - 1e-6), note, uni_rows + rod_rows + sor_rows)
    # rod profiles: within the rod section found (far end of the rods to the face)
    if pl.rod_section_z_mm is not None:
        lo, hi = pl.rod_section_z_mm
        rfrac = interval_overlap_fraction(*sampling.z_range_mm, lo, hi)
        redge = min(sampling.z_range_mm[0] - lo, hi - sampling.z_range_mm[1])
        rnote = (f"profiles z {sampling.z_range_mm[0]:.1f} to {sampling.z_range_mm[1]:.1f} mm in the rod section found "
                 f"(z {lo:.1f} to {hi:.1f} mm), {sampling.mode.replace('_', ' ')}; rod match {pl.ring_score or 0:.2f}")
        rconf = rfrac >= 1 - 1e-6
    else:
        rfrac, redge, rconf = 1.0, None, False
        rnote = "the far end of the rods was not seen: the profiles follow the template's range (not confirmed)"
    rod_check = RoiSetCheck("rod_profiles", len(rods), len(rods), rfrac, redge, rconf, rnote,
                            rod_rows + [(r.name, f"centre_{x}_mm") for r in rods for x in "xyz"])
    # spill-over VOIs: inside each chamber's interior as found
    fracs, edges, notes, conf = [], [], [], pl.chamber_identity in ("arrangement", "level", "override")
    sv = a.spillover_voi
    for c in chambers:
        f = pl.chamber(c.name)
        centre_t = pl.to_template(pl.insert_centre(c.name))
        half = sv.length_mm / 2
        if f is not None and f.found and f.inner_z_mm is not None:
            off = float(np.linalg.norm(centre_t[:2] - f.xy_template_mm))
            fr, ed = cylinder_inside(off, sv.diameter_mm / 2, (centre_t[2] - half, centre_t[2] + half), c.diameter_mm / 2, f.inner_z_mm)
        else:  # against the template's chamber (not found, override, or end not seen)
            tc = np.asarray(c.centre_mm, float)
            off = float(np.linalg.norm(centre_t[:2] - tc[:2]))
            inner = (tc[2] - c.length_mm / 2, tc[2] + c.length_mm / 2)
            fr, ed = cylinder_inside(off, sv.diameter_mm / 2, (centre_t[2] - half, centre_t[2] + half), c.diameter_mm / 2, inner)
            if f is None or not f.found or (f.inner_z_mm is None and pl.chamber_identity != "override"):
                conf = False
        fracs.append(fr)
        edges.append(ed)
    notes.append({
        "arrangement": "chambers found in the image where the template has them (water and air by the arrangement)",
        "level": "chambers found in the image away from the template's places; water and air told apart by level (air the colder)",
        "undetermined": "chambers found in the image away from the template's places; water and air could not be told apart",
        "override": "chamber centres given by the user",
    }.get(pl.chamber_identity, f"chambers identified by {pl.chamber_identity}"))
    missing = [c.name for c in chambers if (f := pl.chamber(c.name)) is None or not f.found]
    if missing:
        notes.append(f"not found in the image: {', '.join(missing)}")
    sor_check = RoiSetCheck("spillover_vois", len(chambers), len(chambers), min(fracs), min(edges), bool(conf and min(fracs) >= 1 - 1e-6),
                            "; ".join(notes), sor_rows)
    return [uniform, rod_check, sor_check]


KIND = SmallAnimalKind()


def _check_vois(tpl: Template, a: Options) -> list[str]:
    """VOIs of the NU 4 analysis lie in their regions (uniform VOI clear of the solid section
    and the chambers, spill-over VOI inside each chamber, rod profile along the rods)."""
    out: list[str] = []
    u = a.uniform_voi
    uz0, uz1 = u.centre_z_mm - u.length_mm / 2, u.centre_z_mm + u.length_mm / 2
    z0, z1 = tpl.body.z_range_mm
    r_body = tpl.body.diameter_mm / 2 if tpl.body.shape == "cylinder" else tpl.body.arc_radius_mm
    if uz0 < z0 or uz1 > z1 or u.diameter_mm / 2 > r_body:
        out.append("analysis.uniform_voi: extends outside the body")
    solid = tpl.insert(a.solid_section)
    sz0, sz1 = solid.centre_mm[2] - solid.length_mm / 2, solid.centre_mm[2] + solid.length_mm / 2
    if uz0 < sz1 and uz1 > sz0:
        out.append(f"analysis.uniform_voi: z {uz0:g}..{uz1:g} mm overlaps the solid section ({sz0:g}..{sz1:g} mm)")
    for c in tpl.chambers:
        half = c.length_mm / 2 + c.wall_mm
        cz0, cz1 = c.centre_mm[2] - half, c.centre_mm[2] + half
        radial = math.hypot(c.centre_mm[0], c.centre_mm[1]) - c.outer_diameter_mm / 2
        if uz0 < cz1 and uz1 > cz0 and radial < u.diameter_mm / 2:
            out.append(f"analysis.uniform_voi: overlaps chamber {c.name}")
        if a.spillover_voi.diameter_mm > c.diameter_mm or a.spillover_voi.length_mm > c.length_mm:
            out.append(f"analysis.spillover_voi: larger than chamber {c.name} ({c.diameter_mm:g} x {c.length_mm:g} mm)")
    r0, r1 = a.rod_profile_z_mm
    for r in tpl.rods:
        rz0, rz1 = r.centre_mm[2] - r.length_mm / 2, r.centre_mm[2] + r.length_mm / 2
        if r0 < rz0 or r1 > rz1 or r0 >= r1:
            out.append(f"analysis.rod_profile_z_mm: {r0:g}..{r1:g} mm is not within {r.name} ({rz0:g}..{rz1:g} mm)")
    return out
