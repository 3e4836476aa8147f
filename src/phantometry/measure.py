"""The main job: measure a body phantom scan end to end.

``measure_volume`` (library) and ``measure`` (files in, result folder out) are what the
``phantometry measure`` command wires. Geometry comes from the :class:`~phantometry.locate.Placement`
(world mm); every number is computed on the voxels with sub-voxel ROI weights.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from . import __version__
from .errors import FillRecordError, InputError, PhantomNotFound, PhantometryError
from .fill import FillRecord, load_fill_record
from .locate import Placement, locate
from .metrics.nu2 import background_variability, lung_residual, percent_contrast_cold, percent_contrast_hot
from .metrics.recovery import recovery_coefficients
from .results import CAUTION, Measurement, atomic_output_dir, measurements_csv, to_json
from .rois import PlaneImage, disc_means, sample_plane
from .templates import Template, load_template
from .volume import Volume

#: Relative deviation of the measured background from the fill record that raises a warning.
BACKGROUND_WARNING_FRACTION = 0.10


@dataclass
class BodyAnalysis:
    """Everything measured on one body-phantom scan."""

    volume: Volume
    template: Template
    fill: FillRecord
    placement: Placement
    rows: list[Measurement]
    planes: dict[float, PlaneImage]
    background_roi_means: dict[float, np.ndarray]  # diameter -> (K,) means
    true_background_bq_ml: float
    true_insert_bq_ml: dict[str, float]
    warnings: list[str] = field(default_factory=list)
    #: noise model (phantometry.uncertainty.NoiseModel) behind the uncertainties, if estimated
    noise: Any = None
    #: blurred-sphere fit (phantometry.metrics.resolution.ResolutionFit), if made
    resolution: Any = None
    #: acceptance band sets applied (phantometry.bands.BandSet)
    band_sets: list[Any] = field(default_factory=list)

    def sphere_rows(self) -> list[dict[str, Any]]:
        """One dict per sphere (for the terminal table)."""
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


def _plane_basis(placement: Placement) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rot = placement.rotation
    return rot[:, 0].copy(), rot[:, 1].copy(), rot[:, 2].copy()


def measure_volume(
    volume: Volume,
    template: Template,
    fill: FillRecord,
    *,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
    bands: Sequence[Any] | None = None,
    uncertainties: bool = True,
    resolution: bool = True,
    variance_power: float = 1.0,
) -> BodyAnalysis:
    """Locate the phantom and compute every NEMA NU 2 and recovery metric.

    Parameters
    ----------
    volume : Volume in Bq/mL with a timezone-aware ``acquired_at``.
    template : a body image-quality template (``iec-body``).
    fill : the fill record; true concentrations are decay-corrected to ``volume.acquired_at``.
    overrides : manual insert centres, world mm.
    bands : acceptance band sets (:class:`phantometry.bands.BandSet`, names or files) whose
        verdicts fill the rows' ``band``, ``band_low``, ``band_high``, ``verdict``
        (:func:`phantometry.bands.apply_bands`).
    uncertainties : estimate the noise and give every ROI-mean based metric its standard
        uncertainty (:mod:`phantometry.uncertainty`).
    resolution : fit the blurred-sphere model and add ``effective_fwhm_mm`` on ROI
        ``phantom`` (:mod:`phantometry.metrics.resolution`).
    variance_power : ``p`` of the noise level law ``var ~ level^p`` (1: Poisson-like).

    Returns
    -------
    BodyAnalysis with :class:`~phantometry.results.Measurement` rows.
    """
    where = where or volume.source or "image"
    if template.analysis.kind == "small_animal_image_quality":
        from .small_animal import measure_small_animal

        return _with_bands(measure_small_animal(volume, template, fill, overrides=overrides, where=where), bands, template)  # type: ignore[return-value]
    if template.analysis.kind == "inserts":
        from .generic import measure_inserts

        return _with_bands(measure_inserts(volume, template, fill, overrides=overrides, where=where), bands, template)  # type: ignore[return-value]
    if template.analysis.kind != "body_image_quality":
        raise InputError(f"template {template.name}: analysis kind {template.analysis.kind} is not measurable yet")
    if volume.acquired_at is None:
        raise InputError(f"{where}: the image has no acquisition time; give it (NIfTI: --acquired-at) so the fill record can be decay-corrected")
    if volume.nuclide and volume.nuclide != fill.nuclide.name:
        raise InputError(f"{where}: image nuclide {volume.nuclide} differs from the fill record's {fill.nuclide.name}")
    at = volume.acquired_at
    spheres = template.spheres
    try:
        true_bg = fill.background_bq_ml(at)
        true_ins = {s.name: fill.insert_bq_ml(s.name, at) for s in spheres}
        hot = {s.name: not fill.is_cold(s.name) for s in spheres}
        ratio = {s.name: (fill.activity_ratio(s.name) if hot[s.name] else 0.0) for s in spheres}
    except FillRecordError:
        # a fill record that does not fit the template often means the wrong template: say so
        from .locate import check_body_size

        check_body_size(volume, template, where)
        raise
    placement = locate(volume, template, hot=hot, activity_ratio=ratio, overrides=overrides, where=where)
    analysis = template.analysis
    bg_set = template.background
    assert bg_set is not None
    u, v, axis = _plane_basis(placement)
    common = dict(series_uid=volume.series_uid, acquired_at=at.isoformat(), template=template.name)
    rows: list[Measurement] = []
    warnings = list(placement.warnings)

    def add(roi: str, metric: str, value: float, unit: str, note: str | None = None) -> None:
        rows.append(Measurement(roi=roi, metric=metric, value=float(value), unit=unit, note=note, **common))  # type: ignore[arg-type]

    # ---- background ROIs on every slice offset, every size
    half_width = template.body.half_extent_xy_mm + 10
    planes: dict[float, PlaneImage] = {}
    means: dict[float, list[np.ndarray]] = {d: [] for d in bg_set.diameters_mm}
    centres_xy = np.asarray(bg_set.centres_xy_mm, float)
    for off in bg_set.slice_offsets_mm:
        plane_centre = placement.to_world([0.0, 0.0, off])
        plane = sample_plane(volume, plane_centre, u, v, half_width)
        planes[off] = plane
        world = placement.to_world(np.c_[centres_xy, np.full(len(centres_xy), off)])
        uv = plane.world_to_uv(world)
        for d in bg_set.diameters_mm:
            try:
                means[d].append(disc_means(plane, uv, d))
            except PhantomNotFound:
                raise PhantomNotFound(
                    f"{where}: background ROIs at {off:+g} mm from the sphere plane fall outside the image; "
                    "is the whole phantom in the field of view?"
                ) from None
    roi_means = {d: np.concatenate(m) for d, m in means.items()}
    c_b = {}
    bv = {}
    for d, m in roi_means.items():
        bv[d], c_b[d], _ = background_variability(m)
    ref_d = analysis.reference_background_diameter_mm
    c_b_ref = c_b[ref_d]
    # ---- spheres
    for s in spheres:
        centre = placement.insert_centre(s.name)
        sp = sample_plane(volume, centre, u, v, s.diameter_mm / 2 + 4 * float(np.max(volume.spacing_mm)))
        try:
            c_sphere = float(disc_means(sp, sp.world_to_uv(centre[None]), s.diameter_mm)[0])
        except PhantomNotFound:
            raise PhantomNotFound(f"{where}: {s.name} lies outside the image; is the whole phantom in the field of view?") from None
        cb = c_b.get(s.diameter_mm, c_b_ref)
        if hot[s.name]:
            if ratio[s.name] <= 1:
                raise InputError(f"fill record: {s.name} is hot but its ratio to background is {ratio[s.name]:g} (must exceed 1)")
            add(s.name, "percent_contrast", percent_contrast_hot(c_sphere, cb, ratio[s.name]), "%")
        else:
            add(s.name, "percent_contrast", percent_contrast_cold(c_sphere, cb), "%")
        add(s.name, "background_variability_pct", bv.get(s.diameter_mm, math.nan), "%")
        if hot[s.name]:
            rc = recovery_coefficients(
                volume,
                centre,
                s.diameter_mm,
                true_ins[s.name],
                c_b_ref,
                peak_diameter_mm=analysis.peak_diameter_mm,
                isocontour_fraction=analysis.isocontour_fraction,
            )
            for k in ("rc_max", "rc_mean", "rc_peak"):
                add(s.name, k, rc[k], "1")
        for axis_name, val in zip("xyz", centre):
            add(s.name, f"centre_{axis_name}_mm", val, "mm")
    # ---- lung insert residual
    if analysis.lung_insert is not None:
        lung = template.insert(analysis.lung_insert)
        offsets = analysis.lung_slice_offsets_mm or bg_set.slice_offsets_mm
        lung_vals = []
        for off in offsets:
            plane = planes.get(off)
            if plane is None:
                plane = sample_plane(volume, placement.to_world([0.0, 0.0, off]), u, v, half_width)
            lc = placement.to_world([lung.centre_mm[0], lung.centre_mm[1], off])
            if analysis.lung_insert in (overrides or {}):
                lc = placement.insert_centre(lung.name) + (off - float(placement.to_template(placement.insert_centre(lung.name))[2])) * axis
            lung_vals.append(float(disc_means(plane, plane.world_to_uv(lc[None]), analysis.lung_roi_diameter_mm)[0]))
        avg, _ = lung_residual(np.array(lung_vals), c_b_ref)
        add(lung.name, "lung_residual_pct", avg, "%")
    # ---- background level and calibration check
    add("background", "mean_bq_ml", c_b_ref, "Bq/mL")
    recovery = c_b_ref / true_bg
    note = None
    if abs(recovery - 1.0) > BACKGROUND_WARNING_FRACTION:
        note = (
            f"WARNING: measured background {c_b_ref:.0f} Bq/mL is {100 * (recovery - 1):+.0f} % from the fill record's "
            f"{true_bg:.0f} Bq/mL; check the fill record (activity, times, volume), units and calibration"
        )
        warnings.append(note)
    add("background", "activity_recovery", recovery, "1", note)
    result = BodyAnalysis(volume, template, fill, placement, rows, planes, roi_means, true_bg, true_ins, warnings)
    _judge_body(result, overrides=overrides, uncertainties=uncertainties, resolution=resolution, variance_power=variance_power)
    return _with_bands(result, bands, template)


def _judge_body(analysis: BodyAnalysis, *, overrides, uncertainties: bool, resolution: bool, variance_power: float) -> None:
    """Add the noise model, the standard uncertainties and the effective FWHM row (in place).

    A step that cannot be done (too little background, a failed fit) leaves its numbers out
    and says so in the warnings; it never stops the measurement.
    """
    import dataclasses

    noise = None
    if uncertainties or resolution:
        from .uncertainty import estimate_noise

        try:
            noise = estimate_noise(analysis.volume, analysis.placement, analysis.template, variance_power=variance_power)
        except PhantometryError as exc:
            analysis.warnings.append(f"no uncertainties: the noise could not be estimated ({exc})")
    analysis.noise = noise
    fit = None
    if resolution:
        from .metrics.resolution import fit_body

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
    if uncertainties and noise is not None:
        from .uncertainty import body_uncertainties

        try:
            us = body_uncertainties(analysis, noise, resolution_fit=fit, overrides=overrides)
        except PhantometryError as exc:
            analysis.warnings.append(f"no uncertainties: {exc}")
        else:
            analysis.rows[:] = [
                dataclasses.replace(r, uncertainty=float(us[(r.roi, r.metric)])) if (r.roi, r.metric) in us and r.uncertainty is None else r
                for r in analysis.rows
            ]


def _with_bands(analysis: Any, bands: Sequence[Any] | None, template: Template) -> Any:
    """Apply acceptance band sets to an analysis's rows (in place); warnings join its warnings."""
    if not bands:
        return analysis
    from .bands import apply_bands, load_band_set

    sets = [load_band_set(b) for b in bands]
    rows, warns = apply_bands(analysis.rows, sets, fill=getattr(analysis, "fill", None), template=template)
    analysis.rows[:] = rows
    analysis.warnings.extend(warns)
    if hasattr(analysis, "band_sets"):
        analysis.band_sets = sets
    return analysis


def analysis_json(analysis: BodyAnalysis) -> dict[str, Any]:
    """The measurements.json document."""
    return {
        "tool": {"name": "phantometry", "version": __version__},
        "caution": CAUTION,
        "series": analysis.volume.summary(),
        "template": {"name": analysis.template.name, "title": analysis.template.title, "source": analysis.template.source_path},
        "fill_record": analysis.fill.to_dict(),
        "true_concentrations_bq_ml": {"background": analysis.true_background_bq_ml, **analysis.true_insert_bq_ml},
        "localisation": analysis.placement.as_dict(),
        "warnings": analysis.warnings,
        "noise": analysis.noise.as_dict() if getattr(analysis, "noise", None) is not None else None,
        "effective_resolution": analysis.resolution.as_dict() if getattr(analysis, "resolution", None) is not None else None,
        "bands": [{k: v for k, v in b.summary().items() if k != "entries"} for b in getattr(analysis, "band_sets", [])],
        "measurements": [r.as_dict() for r in analysis.rows],
    }


def load_image(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    series: str | None = None,
    units: str | None = None,
    acquired_at: Any = None,
    nuclide: str | None = None,
    calibration_factor: float | None = None,
) -> Volume:
    """Load a DICOM series (file, folder or list) or a NIfTI file, whichever the input is."""
    paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
    if not paths:
        raise InputError("no input given: name a DICOM folder or file, or a NIfTI file")
    for p in paths:
        if not p.exists():
            raise InputError(f"{p}: no such file or folder")
    if len(paths) == 1 and paths[0].is_file() and paths[0].name.lower().endswith((".nii", ".nii.gz")):
        from .io.nifti import load_nifti

        return load_nifti(paths[0], units=units, acquired_at=acquired_at, nuclide=nuclide, calibration_factor=calibration_factor)
    from .io.dicom import load_dicom

    vol = load_dicom(paths if len(paths) > 1 else paths[0], series=series, calibration_factor=calibration_factor)
    if acquired_at is not None:
        import dataclasses

        vol = dataclasses.replace(vol, acquired_at=acquired_at)
    return vol


def parse_centre_overrides(items: Sequence[str] | None, template: Template) -> dict[str, np.ndarray]:
    """Parse ``NAME=x,y,z`` (world mm) overrides; unknown names are refused with the choices."""
    out: dict[str, np.ndarray] = {}
    for item in items or []:
        name, sep, rest = item.partition("=")
        name = name.strip()
        try:
            xyz = [float(v) for v in rest.split(",")]
        except ValueError:
            xyz = []
        if not sep or len(xyz) != 3:
            raise InputError(f"--centre {item!r}: expected NAME=x,y,z in world mm, e.g. sphere_37mm=-28.6,-84.5,-20")
        if name not in {i.name for i in template.inserts}:
            raise InputError(
                f"--centre {item!r}: template {template.name} has no insert {name!r}; inserts: "
                f"{', '.join(i.name for i in template.inserts)}"
            )
        out[name] = np.array(xyz, float)
    return out


def measure(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    template: str = "iec-body",
    fill: str | os.PathLike,
    out: str | os.PathLike,
    series: str | None = None,
    centres: Sequence[str] | None = None,
    units: str | None = None,
    acquired_at: Any = None,
    nuclide: str | None = None,
    calibration_factor: float | None = None,
    templates_dirs: Sequence[str] | None = None,
    overlay: bool = True,
    report: bool = False,
    seg: bool = False,
    bands: Sequence[Any] | None = None,
    record: Any = None,
) -> BodyAnalysis:
    """Measure a phantom scan from files and write ``out/`` (CSV, JSON, overlay picture).

    ``report=True`` adds ``report.html`` (:mod:`phantometry.report`); ``seg=True`` adds
    ``rois_seg.dcm``, the placed ROIs as a DICOM Segmentation (:mod:`phantometry.seg`; DICOM
    input and body image-quality templates only, refused before measuring otherwise).

    ``bands`` (names or files of acceptance band sets, :mod:`phantometry.bands`) fill the
    rows' verdicts; they are loaded and checked against the template before measuring. Body
    phantoms also get ``recovery_curve.png`` (measured RC, fitted model curves, bands).

    ``record`` (a :class:`phantometry.ledger.measure_record.RecordRequest`) records the
    analysis in the trend ledger once the folder is written; a duplicate is refused before the
    image is read and before anything is written.

    The folder appears only when everything succeeded; if localisation fails, a diagnostic
    picture is written to ``out.failed.png`` beside it and :class:`PhantomNotFound` is raised.
    """
    tpl = load_template(template, list(templates_dirs or []))
    fill_record = load_fill_record(fill)
    overrides = parse_centre_overrides(centres, tpl)
    band_sets = None
    if bands:
        from .bands import check_band_set, load_band_set

        band_sets = [load_band_set(b, templates_dirs=list(templates_dirs or [])) for b in bands]
        for b in band_sets:
            check_band_set(b, tpl)
    if record is not None:  # a duplicate is refused before the pixels are read
        record.check_inputs(inputs, series=series, acquired_at=acquired_at, template=tpl.name, fill=fill_record)
    volume = load_image(inputs, series=series, units=units, acquired_at=acquired_at, nuclide=nuclide, calibration_factor=calibration_factor)
    where = str(inputs if isinstance(inputs, (str, os.PathLike)) else ", ".join(map(str, inputs)))
    if record is not None:
        record.check_volume(volume, template=tpl.name, fill=fill_record)
    if seg:
        from .seg import check_seg_request

        check_seg_request(volume, tpl, where)
    out = Path(out)
    try:
        analysis = measure_volume(volume, tpl, fill_record, overrides=overrides, where=where, bands=band_sets)
    except PhantomNotFound:
        try:
            from .figures import diagnostic_picture

            diagnostic_picture(volume, out.with_name(out.name + ".failed.png"))
        except Exception:  # the picture is a courtesy; the original error matters
            pass
        raise
    with atomic_output_dir(out) as tmp:
        (tmp / "measurements.csv").write_text(measurements_csv(analysis.rows), encoding="utf-8")
        (tmp / "measurements.json").write_text(to_json(analysis_json(analysis)), encoding="utf-8")
        if overlay:
            from .figures import overlay_picture

            if isinstance(analysis, BodyAnalysis):
                overlay_picture(analysis, tmp / "overlay.png")
                from .figures import recovery_curve_picture

                recovery_curve_picture(analysis, tmp / "recovery_curve.png")
            elif hasattr(analysis, "rod_image"):
                from .figures import small_animal_overlay

                small_animal_overlay(analysis, tmp / "overlay.png")
            else:
                from .figures import inserts_overlay

                inserts_overlay(analysis, tmp / "overlay.png")
        if seg:
            from .seg import write_seg

            write_seg(analysis, tmp / "rois_seg.dcm", source_paths=[inputs] if isinstance(inputs, (str, os.PathLike)) else list(inputs))
        if report:
            from .report import write_measure_report

            write_measure_report(analysis, tmp / "report.html", folder=tmp)
    if record is not None:
        record.record(analysis)
    return analysis


__all__ = ["BodyAnalysis", "measure", "measure_volume", "load_image", "analysis_json", "parse_centre_overrides", "PhantometryError"]
