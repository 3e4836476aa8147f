"""Small-animal phantom analysis (NEMA NU 4-2008 image quality): uniformity, rod recovery,
spill-over ratios. Formulas in :mod:`phantometry.metrics.nu4`."""

from __future__ import annotations

from dataclasses import dataclass, field


import numpy as np

from .errors import InputError, PhantomNotFound
from .fill import FillRecord
from .locate import Placement, locate_small_animal, sample_world
from .metrics.nu4 import ratio_with_std, uniformity
from .results import Measurement
from .rois import PlaneImage, cylinder_weights, sample_plane
from .templates import Template
from .volume import Volume

#: Voxels count in a NU 4 VOI when at least this fraction of their cell lies inside it.
VOI_MEMBERSHIP = 0.5


@dataclass
class SmallAnimalAnalysis:
    """Everything measured on one small-animal phantom scan."""

    volume: Volume
    template: Template
    fill: FillRecord
    placement: Placement
    rows: list[Measurement]
    rod_image: PlaneImage  # slice average over the rod profile range
    rod_peaks_uv: dict[str, np.ndarray]
    true_background_bq_ml: float
    true_insert_bq_ml: dict[str, float] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    def table(self) -> tuple[list[str], list[list[str]]]:
        """Columns and rows of the terminal summary."""
        vals = {(r.roi, r.metric): r.value for r in self.rows}
        cols = ["ROI", "metric", "value", "%STD"]
        out = [["uniform_region", "mean Bq/mL", f"{vals[('uniform_region', 'mean_bq_ml')]:.1f}", f"{vals[('uniform_region', 'uniformity_std_pct')]:.2f}"]]
        for r in self.template.rods:
            out.append([r.name, "RC", f"{vals[(r.name, 'rc_rod')]:.3f}", f"{vals[(r.name, 'rc_rod_std_pct')]:.2f}"])
        for c in self.template.chambers:
            std = vals[(c.name, "spillover_ratio_std_pct")]
            out.append([c.name, "SOR", f"{vals[(c.name, 'spillover_ratio')]:.3f}", f"{std:.1f}" if np.isfinite(std) else "-"])
        return cols, out


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


def measure_small_animal(
    volume: Volume,
    template: Template,
    fill: FillRecord,
    *,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> SmallAnimalAnalysis:
    """Locate the small-animal phantom and compute the NEMA NU 4-2008 image-quality metrics."""
    where = where or volume.source or "image"
    if volume.acquired_at is None:
        raise InputError(f"{where}: the image has no acquisition time; give it (NIfTI: --acquired-at)")
    a = template.analysis
    pl = locate_small_animal(volume, template, overrides=overrides, where=where)
    axis = pl.axis_world
    common = dict(series_uid=volume.series_uid, acquired_at=volume.acquired_at.isoformat(), template=template.name)
    rows: list[Measurement] = []

    def add(roi: str, metric: str, value: float, unit: str, note: str | None = None) -> None:
        rows.append(Measurement(roi=roi, metric=metric, value=float(value), unit=unit, note=note, **common))  # type: ignore[arg-type]

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
    if abs(uni["mean_bq_ml"] / true_bg - 1) > 0.10:
        warnings.append(
            f"WARNING: measured uniform-region mean {uni['mean_bq_ml']:.0f} Bq/mL is {100 * (uni['mean_bq_ml'] / true_bg - 1):+.0f} % "
            f"from the fill record's {true_bg:.0f} Bq/mL; check the fill record, units and calibration"
        )
        rows[[r.metric for r in rows].index("activity_recovery")].note = warnings[-1]
    true_ins = {r.name: true_bg for r in rods} | {c.name: 0.0 for c in template.chambers}
    return SmallAnimalAnalysis(volume, template, fill, pl, rows, rod_image, peaks, true_bg, true_ins, warnings)

