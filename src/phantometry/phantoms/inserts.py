"""User-defined phantoms (analysis kind ``inserts``): insert by insert.

For each insert a VOI of the insert's shape, scaled by ``insert_voi_fraction`` (default 0.8 of
the inner diameter and length, keeping the VOI clear of the partial-volume edge), gives the
mean concentration; hot inserts (more active than the background) also get ``rc_mean`` and
``rc_max`` against their true concentration, cold inserts a ``spillover_ratio`` against the
reference VOI mean. The reference VOI (a cylinder along the axis in a uniform part) gives the
background mean, its uniformity (%STD) and the activity recovery against the fill record.
The definitions follow the recovery coefficient and spill-over ratio of the standards
(NEMA NU 2 / NU 4) applied to the user's geometry.

Every insert is confirmed in the image: its contrast at the placed position (VOI mean over
the reference mean, minus 1) is compared with the contrast the template and fill record
predict there at the image's resolution (the template's concentrations blurred by the point
response found at the body edge, averaged over the same VOI). The ratio is the row
``contrast_confirmation``; an insert whose ratio is below :data:`CONFIRMATION_MIN` (or whose
contrast does not stand out of the noise) is not confirmed: a loud warning, and its band
verdicts are withheld.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from pydantic import BaseModel, ConfigDict, Field
from scipy import ndimage

from ..errors import PhantomNotFound
from ..fill import FillRecord
from ..locate import GenericPlacement, expected_concentration, locate_generic
from ..metrics.nu4 import uniformity
from ..rois import RoiWeights, cylinder_weights, sample_plane, sphere_weights
from ..templates import Insert, Template
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
from ._placement import ball_overlap_fraction, disc_overlap_fraction, outside_warning

#: Hot / cold limits: an insert counts as hot above 1.05 x the background, cold below 0.95 x.
HOT_FACTOR = 1.05
COLD_FACTOR = 0.95
#: An insert is confirmed when its measured contrast is at least this fraction of the
#: contrast predicted at the image's resolution (phantometry's choice: a VOI half off its
#: insert, or on the wrong insert, falls well below it; a correctly placed one reads near 1).
CONFIRMATION_MIN = 0.5
#: ... and stands out of the noise by this many standard errors of the VOI mean.
CONFIRMATION_SIGMAS = 3.0
#: Below this expected contrast (fraction of the background) an insert cannot be confirmed by
#: contrast (e.g. filled like the background); it is then reported as such, not flagged.
CONFIRMATION_MIN_EXPECTED = 0.05
FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


class ReferenceVoi(BaseModel):
    """A cylindrical VOI along the phantom axis (template frame), in a uniform part."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    centre_z_mm: float = 0.0
    diameter_mm: float = Field(gt=0)
    length_mm: float = Field(gt=0)


class Options(KindOptions):
    """Analysis options of a user phantom measured insert by insert."""

    reference_voi: ReferenceVoi
    insert_voi_fraction: float = Field(default=0.8, gt=0, le=1)


@dataclass
class InsertsAnalysis(Analysis):
    """Everything measured on one scan of a user-defined phantom."""

    kind = "inserts"

    @property
    def options(self) -> Options:
        return KIND.options(self.template)

    def summary_table(self) -> SummaryTable:
        vals = self.values()
        rows = [["reference", "mean Bq/mL", fmt_number(vals[("reference", "mean_bq_ml")], digits=1)]]
        for ins in self.template.inserts:
            for metric in ("rc_mean", "rc_max", "spillover_ratio"):
                if (ins.name, metric) in vals:
                    rows.append([ins.name, metric, fmt_number(vals[(ins.name, metric)], digits=3)])
        return SummaryTable(self.template.title, ["ROI", "metric", "value"], rows)

    def overlay(self) -> Overlay:
        """A transverse view through the inserts' mean position and a longitudinal view
        through the axis (in the direction that cuts the most inserts), with every VOI as
        analysed: each insert's VOI (``insert_voi_fraction`` of its size), its inner wall and
        the reference VOI, where each plane cuts them."""
        pl, tpl, a = self.placement, self.template, self.options
        inserts = [i for i in tpl.inserts if i.fill != "solid"]
        z_mid = float(np.mean([i.centre_mm[2] for i in inserts])) if inserts else 0.0
        half = tpl.body.half_extent_xy_mm + 5
        cx, cy = tpl.body.centre_xy_mm
        tra = sample_plane(self.volume, pl.to_world([cx, cy, z_mid]), pl.rotation[:, 0], pl.rotation[:, 1], half)
        u_t = _most_cutting_direction(tpl, inserts, a.insert_voi_fraction)
        lon = sample_plane(self.volume, pl.to_world(tpl.body_centre_mm), pl.rotation[:, :2] @ u_t, pl.axis_world,
                           max(half, tpl.body_length_mm / 2 + 5))
        ref_mean = self.value("reference", "mean_bq_ml") or self.true_background_bq_ml
        hot = [c for c in self.true_insert_bq_ml.values() if c > self.true_background_bq_ml]
        vmax, note = display_window(ref_mean, max(hot) if hot else None, what="reference mean")
        shapes: list[Shape] = []
        lshapes: list[Shape] = []
        f = a.insert_voi_fraction
        for ins in inserts:
            role = "hot" if self.true_insert_bq_ml.get(ins.name, 0.0) > self.true_background_bq_ml else "cold"
            c = pl.insert_centre(ins.name)
            axis = pl.direction_to_world(ins.axis_unit) if ins.shape == "cylinder" else None
            length = float(ins.length_mm) if ins.shape == "cylinder" else None
            for view, out in ((tra, shapes), (lon, lshapes)):
                voi = _section(view, c, f * ins.diameter_mm, axis, None if length is None else f * length, role, ins.name)
                wall = _section(view, c, ins.diameter_mm, axis, length, "guide", f"{ins.name} wall")
                if voi is not None:
                    voi.label = ins.name
                    out.append(voi)
                if wall is not None:
                    out.append(wall)
        ref = a.reference_voi
        ref_c = pl.to_world([cx, cy, ref.centre_z_mm])
        for view, out in ((tra, shapes), (lon, lshapes)):
            sec = _section(view, ref_c, ref.diameter_mm, pl.axis_world, ref.length_mm, "reference", "reference")
            if sec is not None:
                sec.label = "reference VOI"
                sec.label_below = True
                out.append(sec)
        views = [View(tra, f"Transverse plane at z = {z_mid:g} mm of the template frame (through the inserts)", shapes, vmax, window_note=note),
                 View(lon, "Longitudinal plane through the phantom axis", lshapes, vmax, window_note=note)]
        legend = {"hot": f"VOI of a hot insert ({100 * f:.0f} % of its diameter and length, as analysed)",
                  "cold": "VOI of a cold insert (the same fraction)",
                  "guide": "insert's inner wall (template size, where placed)",
                  "reference": f"reference VOI, {ref.diameter_mm:g} x {ref.length_mm:g} mm (mean, uniformity, activity recovery)"}
        caption = [f"Match {pl.ring_score or 0:.2f}: how closely the image follows the concentrations the template and fill record "
                   "predict on a cylindrical grid about the axis (normalised correlation: 1 = identical; placements below 0.30 are "
                   "refused).",
                   f"Grey scale: white 0, black {vmax:,.0f} Bq/mL and above ({note}). The VOIs keep clear of the inserts' blurred "
                   "edges; orange-red: hot, blue: cold. Letters name the patient directions of each edge "
                   f"({'DICOM LPS' if self.volume.frame == 'LPS' else 'NIfTI RAS'} frame)."]
        title = f"{tpl.title} | {series_phrase(self.volume)} | image match {pl.ring_score or 0:.2f}"
        return Overlay(views, title, frame=self.volume.frame, legend=legend, caption=caption)

    def key_metrics(self) -> list[tuple[str, str]]:
        out = [("reference", "uniformity_std_pct"), ("reference", "activity_recovery")]
        for ins in self.template.inserts:
            out += [(ins.name, m) for m in ("rc_mean", "rc_max", "spillover_ratio") if self.value(ins.name, m) is not None]
        return out


def _section(view, centre: np.ndarray, diameter_mm: float, axis: np.ndarray | None, length_mm: float | None, role: str,
             name: str) -> Shape | None:
    """Where a plane cuts a sphere (``axis`` None) or a cylinder: a circle (sphere, or a
    cylinder across the plane), a rectangle (a cylinder lying in the plane's v direction), or
    None where the plane misses it (or cuts a cylinder obliquely: not drawn)."""
    r = diameter_mm / 2
    dist = float(view.distance_to_plane(centre))
    uv = view.world_to_uv(centre)
    if axis is None:
        return Shape("circle", role, uv, 2 * math.sqrt(r * r - dist * dist), name=name) if abs(dist) < r else None
    a = np.asarray(axis, float) / np.linalg.norm(axis)
    across = abs(float(a @ view.normal))
    if across > 0.99:  # the cylinder crosses the plane: a circle where its length reaches
        return Shape("circle", role, uv, diameter_mm, name=name) if abs(dist) <= length_mm / 2 else None
    if across < 0.09 and abs(dist) < r:  # the cylinder lies in the plane
        chord = 2 * math.sqrt(r * r - dist * dist)
        along_v = abs(float(a @ view.v_dir)) >= abs(float(a @ view.u_dir))
        return Shape("rect", role, uv, (chord, length_mm) if along_v else (length_mm, chord), name=name)
    return None


def _most_cutting_direction(template: Template, inserts: list[Insert], fraction: float) -> np.ndarray:
    """The in-plane direction (template x, y; unit) of the longitudinal plane through the axis
    that cuts the most insert VOIs (every 5 degrees; the first of equals)."""
    cx, cy = template.body.centre_xy_mm
    best, best_n = np.array([1.0, 0.0]), -1
    for deg in range(0, 180, 5):
        d = np.array([math.cos(math.radians(deg)), math.sin(math.radians(deg))])
        normal = np.array([-d[1], d[0]])
        n = sum(abs(float((np.asarray(i.centre_mm[:2], float) - (cx, cy)) @ normal)) < fraction * i.diameter_mm / 2 for i in inserts)
        if n > best_n:
            best, best_n = d, n
    return best


def _values(volume: Volume, roi: RoiWeights, what: str, where: str) -> np.ndarray:
    if roi.clipped:
        raise PhantomNotFound(f"{where}: the {what} reaches beyond the image; is the phantom in the field of view?")
    vals = volume.data[roi.box][roi.weights >= 0.5]
    if vals.size < 2:
        raise PhantomNotFound(f"{where}: the {what} holds fewer than two voxels; the voxels are too coarse")
    return vals.astype(np.float64)


def insert_concentrations(template: Template, fill: FillRecord, at) -> dict[str, float]:
    """True concentration (Bq/mL at ``at``) of every insert's fill."""
    bg = fill.background_bq_ml(at)
    out = {}
    for ins in template.inserts:
        if ins.fill == "fill_record":
            out[ins.name] = fill.insert_bq_ml(ins.name, at)
        elif ins.fill == "background":
            out[ins.name] = bg
        else:
            out[ins.name] = 0.0
    return out


class InsertsKind(PhantomKind):
    """A user phantom measured insert by insert."""

    name = "inserts"
    summary = "per-insert mean, RC mean/max (hot) or spill-over ratio (cold); reference uniformity"
    Options = Options

    def known_metrics(self, template: Template) -> dict[str, tuple[str, ...]]:
        out: dict[str, tuple[str, ...]] = {"reference": ("mean_bq_ml", "uniformity_std_pct", "activity_recovery")}
        for ins in template.inserts:
            if ins.fill != "solid":
                out[ins.name] = ("mean_bq_ml", "rc_mean", "rc_max", "spillover_ratio", "contrast_confirmation",
                                 "centre_x_mm", "centre_y_mm", "centre_z_mm")
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
    ) -> InsertsAnalysis:
        """Locate a user-defined phantom, measure every insert and confirm it in the image."""
        check_scan_time(volume, fill, where)
        at = volume.acquired_at
        a = self.options(template)
        true_bg = fill.background_bq_ml(at)
        conc = insert_concentrations(template, fill, at)
        ref = a.reference_voi
        pl = locate_generic(volume, template, concentrations=conc, overrides=overrides, where=where,
                            edge_z_mm=(ref.centre_z_mm - ref.length_mm / 2, ref.centre_z_mm + ref.length_mm / 2))
        out = RowBuilder(volume, template)
        add = out.add
        ref_roi = cylinder_weights(volume, pl.to_world([*template.body.centre_xy_mm, ref.centre_z_mm]), pl.axis_world, ref.diameter_mm, ref.length_mm)
        ref_vals = _values(volume, ref_roi, "reference VOI", where)
        uni = uniformity(ref_vals)
        add("reference", "mean_bq_ml", uni["mean_bq_ml"], "Bq/mL")
        add("reference", "uniformity_std_pct", uni["uniformity_std_pct"], "%")
        add("reference", "activity_recovery", uni["mean_bq_ml"] / true_bg, "1")
        warnings = list(pl.warnings)
        checks = [_reference_check(volume, pl, template, ref_roi, a)]
        f = a.insert_voi_fraction
        sigma = (pl.psf_fwhm_mm or 0.0) / FWHM_PER_SIGMA
        fwhm_noise = pl.psf_fwhm_mm or 2.0 * float(np.max(volume.spacing_mm))
        for ins in template.inserts:
            if ins.fill == "solid":
                continue
            c = pl.insert_centre(ins.name)
            if ins.shape == "sphere":
                roi = sphere_weights(volume, c, f * ins.diameter_mm)
            else:
                roi = cylinder_weights(volume, c, pl.direction_to_world(ins.axis_unit), f * ins.diameter_mm, f * float(ins.length_mm))
            vals = _values(volume, roi, f"{ins.name} VOI", where)
            mean = float(np.average(volume.data[roi.box], weights=roi.weights))
            add(ins.name, "mean_bq_ml", mean, "Bq/mL")
            metrics = ["mean_bq_ml"]
            if conc[ins.name] > true_bg * HOT_FACTOR:
                add(ins.name, "rc_mean", mean / conc[ins.name], "1")
                add(ins.name, "rc_max", float(vals.max()) / conc[ins.name], "1")
                metrics += ["rc_mean", "rc_max"]
            elif conc[ins.name] < true_bg * COLD_FACTOR:
                add(ins.name, "spillover_ratio", mean / uni["mean_bq_ml"], "1")
                metrics.append("spillover_ratio")
            # confirmation: measured contrast against the template's expectation at this resolution
            expected = expected_voi_mean(template, ins, conc, true_bg, sigma, f) / true_bg - 1.0
            measured = mean / uni["mean_bq_ml"] - 1.0
            voi_ml = float(roi.weights.sum()) * volume.voxel_volume_ml
            n_cells = max(1.0, voi_ml * 1000.0 / fwhm_noise**3)
            se = uni["sd_bq_ml"] / uni["mean_bq_ml"] / math.sqrt(n_cells)
            if abs(expected) >= CONFIRMATION_MIN_EXPECTED:
                ratio = measured / expected
                add(ins.name, "contrast_confirmation", ratio, "1")
                metrics.append("contrast_confirmation")
                confirmed = ratio >= CONFIRMATION_MIN and abs(measured) >= CONFIRMATION_SIGMAS * se
                why = (f"contrast {measured:+.3f} against {expected:+.3f} expected at this resolution "
                       f"({100 * ratio:.0f} %; confirmed from {100 * CONFIRMATION_MIN:.0f} % and {CONFIRMATION_SIGMAS:g} standard errors, "
                       f"{se:.3f})")
            else:
                ratio, confirmed = None, True
                why = f"no contrast expected ({expected:+.3f} of the background): not confirmable by contrast"
            for ax_name, val in zip("xyz", c):
                add(ins.name, f"centre_{ax_name}_mm", val, "mm")
            chk = _insert_check(pl, ins, f, confirmed, why, [(ins.name, m) for m in metrics])
            checks.append(chk)
            if not confirmed:
                warnings.append(
                    f"WARNING: insert {ins.name} is not confirmed in the image: {why}; misplaced, another phantom, or not filled "
                    "as the fill record says? Its band verdicts are withheld"
                )
            w = outside_warning(chk, f"insert {ins.name}")
            if w:
                warnings.append(w)
        w = outside_warning(checks[0], "reference VOI")
        if w:
            warnings.append(w)
        note = calibration_warning(uni["mean_bq_ml"], true_bg, "reference mean")
        if note:
            warnings.append(note)
        return InsertsAnalysis(volume, template, fill, pl, out.rows, true_bg, conc, warnings, placement_checks=checks)


def expected_voi_mean(template: Template, ins: Insert, conc: dict[str, float], background: float, sigma_mm: float, fraction: float) -> float:
    """Mean over an insert's VOI (``fraction`` of its size, at its template place) of the
    concentrations the template and fill predict, blurred by an isotropic Gaussian of
    ``sigma_mm`` (0: unblurred).

    The template is point-sampled (:func:`phantometry.locate.expected_concentration`) on a
    template-frame grid around the insert (spacing at most an eighth of its diameter, half
    the sigma and 1 mm, coarser only to bound the grid at about a million points), blurred
    (``scipy.ndimage.gaussian_filter``) and averaged over the grid points inside the VOI.
    """
    r_out = ins.outer_diameter_mm / 2
    centre = np.asarray(ins.centre_mm, float)
    margin = 4.0 * sigma_mm + 1.0
    if ins.shape == "sphere":
        half = np.full(3, r_out + margin)
    else:
        ax = np.abs(ins.axis_unit)
        half = ax * (float(ins.length_mm) / 2 + ins.wall_mm) + r_out * np.sqrt(np.clip(1 - ax**2, 0, 1)) + margin
    h = min(ins.diameter_mm / 8, sigma_mm / 2 if sigma_mm > 0 else np.inf, 1.0)
    h = max(h, float((np.prod(2 * half) / 1e6) ** (1 / 3)))
    axes = [np.arange(-hw, hw + h / 2, h) for hw in half]
    X, Y, Z = np.meshgrid(*axes, indexing="ij")
    rel = np.stack([X, Y, Z], axis=-1)
    field = expected_concentration(template, centre + rel, conc, background)
    if sigma_mm > 0:
        field = ndimage.gaussian_filter(field, sigma_mm / h, mode="nearest")
    if ins.shape == "sphere":
        inside = np.linalg.norm(rel, axis=-1) <= fraction * ins.diameter_mm / 2
    else:
        along = rel @ ins.axis_unit
        radial = np.linalg.norm(rel - along[..., None] * ins.axis_unit, axis=-1)
        inside = (radial <= fraction * ins.diameter_mm / 2) & (np.abs(along) <= fraction * float(ins.length_mm) / 2)
    if not inside.any():
        inside = np.linalg.norm(rel, axis=-1) <= np.linalg.norm(rel, axis=-1).min()
    return float(field[inside].mean())


def _insert_check(pl: GenericPlacement, ins: Insert, fraction: float, confirmed: bool, why: str, rows: list[tuple[str, str]]) -> RoiSetCheck:
    """Placement quality of one insert's VOI: inside the insert where the image shows it (its
    refined centre when it stands out of the noise, else where it was placed)."""
    fit = pl.fits.get(ins.name)
    placed = pl.insert_centre(ins.name)
    seen = fit is not None and fit.refined_mm is not None and (fit.signal_to_noise or 0) > 5
    off = float(np.linalg.norm(placed - fit.refined_mm)) if seen else 0.0
    r, r_voi = ins.diameter_mm / 2, fraction * ins.diameter_mm / 2
    if ins.shape == "sphere":
        inside = ball_overlap_fraction(off, r_voi, r)
        edge = r - (off + r_voi)
    else:
        inside = disc_overlap_fraction(off, r_voi, r)
        edge = min(r - (off + r_voi), (1 - fraction) * float(ins.length_mm) / 2)
    where = f"{off:.2f} mm from its centre found in the image" if seen else "its centre not refined in the image (too little signal)"
    ok = bool(confirmed and inside >= 1 - 1e-6)
    return RoiSetCheck(ins.name, 1, 1, inside, edge, ok, f"{why}; VOI {where}", rows)


def _reference_check(volume: Volume, pl: GenericPlacement, template: Template, roi: RoiWeights, a: Options) -> RoiSetCheck:
    """Placement quality of the reference VOI: the fraction of its voxels inside the body found
    in the image (radius and ends along the axis) and outside every insert."""
    ref = a.reference_voi
    sel = roi.weights >= 0.5
    xyz = volume.box_coordinates(roi.box, rotation=pl.rotation, origin_mm=pl.translation_mm, dtype=np.float64)
    pts = np.stack([x[sel] for x in np.broadcast_arrays(*xyz)], axis=-1)  # template frame
    body = template.body
    cx, cy = body.centre_xy_mm
    z_lo, z_hi = pl.body_z_range_mm or body.z_range_mm
    radial = np.hypot(pts[:, 0] - cx, pts[:, 1] - cy)
    if body.shape == "cylinder":
        r_body = pl.body_radius_mm or body.diameter_mm / 2
        in_body = radial <= r_body
        edge = [r_body - ref.diameter_mm / 2]
    else:
        in_body = template.body_inside(pts)
        edge = []
    in_body &= (pts[:, 2] >= z_lo) & (pts[:, 2] <= z_hi)
    edge += [ref.centre_z_mm - ref.length_mm / 2 - z_lo, z_hi - (ref.centre_z_mm + ref.length_mm / 2)]
    free = in_body.copy()
    hits = []
    for ins in template.inserts:
        rel = pts - np.asarray(ins.centre_mm, float)
        if ins.shape == "sphere":
            inside = np.linalg.norm(rel, axis=1) <= ins.outer_diameter_mm / 2
        else:
            along = rel @ ins.axis_unit
            rad = np.linalg.norm(rel - along[:, None] * ins.axis_unit, axis=1)
            inside = (rad <= ins.outer_diameter_mm / 2) & (np.abs(along) <= float(ins.length_mm) / 2 + ins.wall_mm)
        if inside.any():
            hits.append(ins.name)
        free &= ~inside
    frac = float(free.mean()) if free.size else 0.0
    found = pl.body_z_range_mm is not None and (body.shape != "cylinder" or pl.body_radius_mm is not None)
    note = (f"{100 * frac:.1f} % of its voxels inside the body found in the image (z {z_lo:.1f} to {z_hi:.1f} mm"
            + (f", radius {pl.body_radius_mm:.1f} mm" if pl.body_radius_mm is not None else "") + ") and outside the inserts"
            + (f"; overlaps {', '.join(hits)}" if hits else ""))
    rows = [("reference", m) for m in ("mean_bq_ml", "uniformity_std_pct", "activity_recovery")]
    rows += [(i.name, "spillover_ratio") for i in template.inserts]
    return RoiSetCheck("reference_voi", 1, 1, frac, min(edge), bool(found and frac >= 1 - 1e-6), note, rows)


KIND = InsertsKind()
