"""User-defined phantoms (analysis kind ``inserts``): insert by insert.

For each insert a VOI of the insert's shape, scaled by ``insert_voi_fraction`` (default 0.8 of
the inner diameter and length, keeping the VOI clear of the partial-volume edge), gives the
mean concentration; hot inserts (more active than the background) also get ``rc_mean`` and
``rc_max`` against their true concentration, cold inserts a ``spillover_ratio`` against the
reference VOI mean. The reference VOI (a cylinder along the axis in a uniform part) gives the
background mean, its uniformity (%STD) and the activity recovery against the fill record.
The definitions follow the recovery coefficient and spill-over ratio of the standards
(NEMA NU 2 / NU 4) applied to the user's geometry.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from ..errors import PhantomNotFound
from ..fill import FillRecord
from ..locate import locate_generic
from ..metrics.nu4 import uniformity
from ..rois import RoiWeights, cylinder_weights, sample_plane, sphere_weights
from ..templates import Template
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

#: Hot / cold limits: an insert counts as hot above 1.05 x the background, cold below 0.95 x.
HOT_FACTOR = 1.05
COLD_FACTOR = 0.95


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
        """A transverse and a longitudinal view through the inserts' mean position with every
        insert drawn and labelled."""
        pl, tpl = self.placement, self.template
        inserts = [i for i in tpl.inserts if i.fill != "solid"]
        z_mid = float(np.mean([i.centre_mm[2] for i in inserts])) if inserts else 0.0
        half = tpl.body.half_extent_xy_mm + 5
        tra = sample_plane(self.volume, pl.to_world([*tpl.body.centre_xy_mm, z_mid]), pl.rotation[:, 0], pl.rotation[:, 1], half)
        lon = sample_plane(self.volume, pl.to_world(tpl.body_centre_mm), pl.rotation[:, 0], pl.axis_world, max(half, tpl.body_length_mm / 2 + 5))
        vmax = float(np.nanpercentile(tra.values, 99.5)) or 1.0
        shapes = []
        for ins in inserts:
            hot = self.true_insert_bq_ml.get(ins.name, 0.0) > self.true_background_bq_ml
            shapes.append(Shape("circle", "hot" if hot else "cold", tra.world_to_uv(pl.insert_centre(ins.name)), ins.diameter_mm, label=ins.name))
        views = [View(tra, f"Transverse view at z = {z_mid:g} mm (template frame)", shapes, vmax),
                 View(lon, "Longitudinal view along the phantom axis", [], vmax)]
        return Overlay(views, f"{tpl.title} | match {pl.ring_score or 0:.2f}")

    def key_metrics(self) -> list[tuple[str, str]]:
        out = [("reference", "uniformity_std_pct"), ("reference", "activity_recovery")]
        for ins in self.template.inserts:
            out += [(ins.name, m) for m in ("rc_mean", "rc_max", "spillover_ratio") if self.value(ins.name, m) is not None]
        return out


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
                out[ins.name] = ("mean_bq_ml", "rc_mean", "rc_max", "spillover_ratio", "centre_x_mm", "centre_y_mm", "centre_z_mm")
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
        """Locate a user-defined phantom and measure every insert."""
        check_scan_time(volume, fill, where)
        at = volume.acquired_at
        a = self.options(template)
        true_bg = fill.background_bq_ml(at)
        conc = insert_concentrations(template, fill, at)
        pl = locate_generic(volume, template, concentrations=conc, overrides=overrides, where=where)
        out = RowBuilder(volume, template)
        add = out.add
        ref = a.reference_voi
        ref_roi = cylinder_weights(volume, pl.to_world([*template.body.centre_xy_mm, ref.centre_z_mm]), pl.axis_world, ref.diameter_mm, ref.length_mm)
        uni = uniformity(_values(volume, ref_roi, "reference VOI", where))
        add("reference", "mean_bq_ml", uni["mean_bq_ml"], "Bq/mL")
        add("reference", "uniformity_std_pct", uni["uniformity_std_pct"], "%")
        add("reference", "activity_recovery", uni["mean_bq_ml"] / true_bg, "1")
        warnings = list(pl.warnings)
        f = a.insert_voi_fraction
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
            if conc[ins.name] > true_bg * HOT_FACTOR:
                add(ins.name, "rc_mean", mean / conc[ins.name], "1")
                add(ins.name, "rc_max", float(vals.max()) / conc[ins.name], "1")
            elif conc[ins.name] < true_bg * COLD_FACTOR:
                add(ins.name, "spillover_ratio", mean / uni["mean_bq_ml"], "1")
            for ax_name, val in zip("xyz", c):
                add(ins.name, f"centre_{ax_name}_mm", val, "mm")
        note = calibration_warning(uni["mean_bq_ml"], true_bg, "reference mean")
        if note:
            warnings.append(note)
        return InsertsAnalysis(volume, template, fill, pl, out.rows, true_bg, conc, warnings)


KIND = InsertsKind()
