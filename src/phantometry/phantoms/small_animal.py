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

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PhantomNotFound, TemplateError
from ..fill import FillRecord
from ..locate import locate_small_animal, sample_world
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
    RowBuilder,
    Shape,
    SummaryTable,
    View,
    calibration_warning,
    check_scan_time,
    fmt_number,
)

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


class Options(KindOptions):
    """Analysis options of the NEMA NU 4 small-animal image-quality phantom."""

    solid_section: str
    uniform_voi: CylinderVoi
    rod_profile_z_mm: Vec2
    rod_search_diameter_factor: float = Field(default=2.0, gt=0)
    spillover_voi: SpilloverVoi


@dataclass
class SmallAnimalAnalysis(Analysis):
    """Everything measured on one small-animal phantom scan."""

    kind = "small_animal_image_quality"

    #: slice average over the rod profile range
    rod_image: PlaneImage | None = None
    #: rod name -> (u, v) of its hottest pixel on :attr:`rod_image`, mm
    rod_peaks_uv: dict[str, np.ndarray] = field(default_factory=dict)

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
        """Rod-section slice average with search circles and peaks, and a longitudinal view with
        the uniform-region and spill-over VOIs."""
        pl, tpl, a = self.placement, self.template, self.options
        img = self.rod_image
        assert img is not None
        z_ref = a.rod_profile_z_mm[0]
        shapes: list[Shape] = []
        for r in tpl.rods:
            uv = img.world_to_uv(pl.to_world([r.centre_mm[0], r.centre_mm[1], z_ref]))
            shapes.append(Shape("circle", "search", uv, r.diameter_mm * a.rod_search_diameter_factor, label=r.name.replace("rod_", "")))
            shapes.append(Shape("marker", "peak", self.rod_peaks_uv[r.name]))
        views = [View(img, f"Rod section, mean of slices {a.rod_profile_z_mm[0]:g} to {a.rod_profile_z_mm[1]:g} mm: search circles, peaks (+)",
                      shapes, float(np.nanpercentile(img.values, 99.8)) or 1.0)]
        lon = sample_plane(self.volume, pl.to_world(tpl.body_centre_mm), pl.rotation[:, 0], pl.axis_world,
                           max(tpl.body_length_mm, 2 * tpl.body.half_extent_xy_mm) / 2 + 3)
        lshapes = [Shape("rect", "voi", lon.world_to_uv(pl.to_world([0.0, 0.0, a.uniform_voi.centre_z_mm])),
                         (a.uniform_voi.diameter_mm, a.uniform_voi.length_mm))]
        for c in tpl.chambers:
            lshapes.append(Shape("rect", "insert", lon.world_to_uv(pl.to_world(list(c.centre_mm))),
                                 (a.spillover_voi.diameter_mm, a.spillover_voi.length_mm)))
        views.append(View(lon, "Longitudinal view: uniform VOI (solid), spill-over VOIs (dotted)", lshapes,
                          float(np.nanpercentile(lon.values, 99.8)) or 1.0))
        title = f"{tpl.title} | series {self.volume.series_description or self.volume.series_uid or ''} | rod match {pl.ring_score or 0:.2f}"
        return Overlay(views, title)

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
                                 overrides=overrides, where=where)
        axis = pl.axis_world
        out = RowBuilder(volume, template)
        add = out.add
        rows = out.rows

        # ---- uniform region
        uv = a.uniform_voi
        uni_vals = _voi_values(volume, pl.to_world([0.0, 0.0, uv.centre_z_mm]), axis, uv.diameter_mm, uv.length_mm, "uniform-region VOI", where)
        uni = uniformity(uni_vals)
        for k in ("mean_bq_ml", "max_bq_ml", "min_bq_ml"):
            add("uniform_region", k, uni[k], "Bq/mL")
        add("uniform_region", "uniformity_std_pct", uni["uniformity_std_pct"], "%")
        true_bg = fill.background_bq_ml(volume.acquired_at)
        add("uniform_region", "activity_recovery", uni["mean_bq_ml"] / true_bg, "1")
        # ---- rods: slice average over the profile range, hottest pixel, axial profile
        z0, z1 = a.rod_profile_z_mm
        dz = float(abs(volume.spacing_mm @ np.abs(volume.axes_world @ axis)))  # spacing along the axis
        dz = min(dz, float(np.max(volume.spacing_mm)))
        zs = np.arange(z0 + dz / 2, z1, dz) if (z1 - z0) > dz else np.array([(z0 + z1) / 2])
        rods = template.rods
        half = max(np.hypot(r.centre_mm[0], r.centre_mm[1]) + r.diameter_mm * a.rod_search_diameter_factor for r in rods) + 2
        u, v = pl.rotation[:, 0], pl.rotation[:, 1]
        plane0 = sample_plane(volume, pl.to_world([0.0, 0.0, zs[0]]), u, v, half)
        nv, nu = plane0.values.shape
        cc, rr = np.meshgrid(np.arange(nu) * plane0.pixel_mm, np.arange(nv) * plane0.pixel_mm)
        grid = plane0.origin_mm + cc[..., None] * plane0.u_dir + rr[..., None] * plane0.v_dir  # (nv, nu, 3)
        stack = sample_world(volume, grid[None] + ((zs - zs[0])[:, None, None, None] * axis))
        if np.isnan(stack).any():
            raise PhantomNotFound(f"{where}: the rods lie (partly) outside the image; is the phantom in the field of view?")
        avg = stack.mean(axis=0)
        rod_image = PlaneImage(avg, plane0.origin_mm, plane0.u_dir, plane0.v_dir, plane0.pixel_mm)
        peaks: dict[str, np.ndarray] = {}
        for r in rods:
            centre_uv = plane0.world_to_uv(pl.to_world([r.centre_mm[0], r.centre_mm[1], zs[0]]))
            radius = r.diameter_mm * a.rod_search_diameter_factor / 2
            inside = (cc - centre_uv[0]) ** 2 + (rr - centre_uv[1]) ** 2 <= radius**2
            if not inside.any():
                inside = (cc - centre_uv[0]) ** 2 + (rr - centre_uv[1]) ** 2 <= ((cc - centre_uv[0]) ** 2 + (rr - centre_uv[1]) ** 2).min()
            flat = np.where(inside, avg, -np.inf)
            j, i = np.unravel_index(int(np.argmax(flat)), flat.shape)
            profile = stack[:, j, i]
            rc, rc_std = ratio_with_std(profile, uni["mean_bq_ml"], uni["sd_bq_ml"])
            add(r.name, "rc_rod", rc, "1")
            add(r.name, "rc_rod_std_pct", rc_std, "%")
            peak_world = grid[j, i] + (zs.mean() - zs[0]) * axis
            peaks[r.name] = np.array([cc[j, i], rr[j, i]])
            for ax_name, val in zip("xyz", peak_world):
                add(r.name, f"centre_{ax_name}_mm", val, "mm")
        # ---- spill-over ratios in the cold chambers
        sv = a.spillover_voi
        for c in template.chambers:
            vals = _voi_values(volume, pl.insert_centre(c.name), pl.direction_to_world(c.axis_unit), sv.diameter_mm, sv.length_mm, f"{c.name} VOI", where)
            sor, sor_std = ratio_with_std(vals, uni["mean_bq_ml"], uni["sd_bq_ml"])
            add(c.name, "spillover_ratio", sor, "1")
            add(c.name, "spillover_ratio_std_pct", sor_std, "%")
        warnings = list(pl.warnings)
        note = calibration_warning(uni["mean_bq_ml"], true_bg, "uniform-region mean")
        if note:
            warnings.append(note)
            rows[[r.metric for r in rows].index("activity_recovery")].note = note
        true_ins = {r.name: true_bg for r in rods} | {c.name: 0.0 for c in template.chambers}
        return SmallAnimalAnalysis(volume, template, fill, pl, rows, true_bg, true_ins, warnings, rod_image=rod_image, rod_peaks_uv=peaks)


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
