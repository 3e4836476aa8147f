"""User-defined phantoms (template analysis kind ``inserts``): insert by insert.

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

from dataclasses import dataclass, field

import numpy as np

from .errors import InputError, PhantomNotFound
from .fill import FillRecord
from .locate import Placement, locate_generic
from .metrics.nu4 import uniformity
from .results import Measurement
from .rois import cylinder_weights, sphere_weights
from .templates import Template
from .volume import Volume


@dataclass
class InsertsAnalysis:
    volume: Volume
    template: Template
    fill: FillRecord
    placement: Placement
    rows: list[Measurement]
    true_background_bq_ml: float
    true_insert_bq_ml: dict[str, float] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    def table(self) -> tuple[list[str], list[list[str]]]:
        vals = {(r.roi, r.metric): r.value for r in self.rows}
        out = [["reference", "mean Bq/mL", f"{vals[('reference', 'mean_bq_ml')]:.1f}"]]
        for ins in self.template.inserts:
            for metric in ("rc_mean", "rc_max", "spillover_ratio"):
                if (ins.name, metric) in vals:
                    out.append([ins.name, metric, f"{vals[(ins.name, metric)]:.3f}"])
        return ["ROI", "metric", "value"], out


def _values(volume: Volume, roi, what: str, where: str) -> np.ndarray:
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


def measure_inserts(
    volume: Volume,
    template: Template,
    fill: FillRecord,
    *,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
) -> InsertsAnalysis:
    """Locate a user-defined phantom and measure every insert."""
    where = where or volume.source or "image"
    if volume.acquired_at is None:
        raise InputError(f"{where}: the image has no acquisition time; give it (NIfTI: --acquired-at)")
    at = volume.acquired_at
    a = template.analysis
    true_bg = fill.background_bq_ml(at)
    conc = insert_concentrations(template, fill, at)
    pl = locate_generic(volume, template, concentrations=conc, overrides=overrides, where=where)
    common = dict(series_uid=volume.series_uid, acquired_at=at.isoformat(), template=template.name)
    rows: list[Measurement] = []

    def add(roi: str, metric: str, value: float, unit: str, note: str | None = None) -> None:
        rows.append(Measurement(roi=roi, metric=metric, value=float(value), unit=unit, note=note, **common))  # type: ignore[arg-type]

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
        if conc[ins.name] > true_bg * 1.05:
            add(ins.name, "rc_mean", mean / conc[ins.name], "1")
            add(ins.name, "rc_max", float(vals.max()) / conc[ins.name], "1")
        elif conc[ins.name] < true_bg * 0.95:
            add(ins.name, "spillover_ratio", mean / uni["mean_bq_ml"], "1")
        for ax_name, val in zip("xyz", c):
            add(ins.name, f"centre_{ax_name}_mm", val, "mm")
    if abs(uni["mean_bq_ml"] / true_bg - 1) > 0.10:
        warnings.append(
            f"WARNING: measured reference mean {uni['mean_bq_ml']:.0f} Bq/mL is {100 * (uni['mean_bq_ml'] / true_bg - 1):+.0f} % from "
            f"the fill record's {true_bg:.0f} Bq/mL; check the fill record, units and calibration"
        )
    return InsertsAnalysis(volume, template, fill, pl, rows, true_bg, conc, warnings)
