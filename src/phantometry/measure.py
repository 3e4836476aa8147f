"""The pipeline every command shares: load -> analyse (the phantom kind) -> judge (bands) ->
write the result folder.

``measure_volume`` (library: a loaded volume in, an :class:`~phantometry.phantoms.base.Analysis`
out), ``write_results`` (an analysis into a folder) and ``measure`` (files in, result folder
out) are what ``phantometry measure`` wires; ``compare`` runs the same steps for every series.
The phantom-specific work lives in the kind modules of :mod:`phantometry.phantoms`.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from . import __version__
from .bands import BandSet, apply_bands, check_band_set, load_band_set
from .errors import FillRecordError, InputError, PhantomNotFound, PhantometryError
from .fill import FillRecord, load_fill_record
from .phantoms import kind_of, load_template
from .phantoms.base import Analysis, AnalysisSettings, PhantomKind
from .protocol import protocol_checks
from .results import CAUTION, measurements_csv, to_json
from .sitetime import SiteClock, resolve_volume_time, site_clock
from .templates import Template
from .volume import Volume

#: Version of the measurements.json layout (raised when a key changes meaning or goes away;
#: new keys may appear without a change).
SCHEMA_VERSION = 2


def measure_volume(
    volume: Volume,
    template: Template,
    fill: FillRecord,
    *,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
    bands: Sequence[BandSet | str | os.PathLike] | None = None,
    uncertainties: bool = True,
    resolution: bool = True,
    variance_power: float = 1.0,
    progress: Callable[[str], None] | None = None,
    timezone: str | None = None,
) -> Analysis:
    """Locate the phantom and compute every metric its template's analysis kind defines.

    Parameters
    ----------
    volume : Volume in Bq/mL with a timezone-aware ``acquired_at``.
    template : the phantom template; its ``analysis.kind`` chooses the analysis
        (:mod:`phantometry.phantoms`).
    fill : the fill record; true concentrations are decay-corrected to ``volume.acquired_at``.
    overrides : manual insert centres, world mm.
    bands : acceptance band sets (:class:`phantometry.bands.BandSet`, names or files) whose
        verdicts fill the rows' ``band``, ``band_low``, ``band_high``, ``verdict``
        (:func:`judge`).
    uncertainties : estimate the noise and give every metric it can its standard uncertainty.
    resolution : fit the effective resolution (kinds with a model for it).
    variance_power : ``p`` of the noise level law ``var ~ level^p`` (1: Poisson-like).
    progress : called with a short text as each long step starts (locating, measuring,
        uncertainties); None: silent.
    timezone : IANA zone of the site (``--timezone``) for a volume loaded without one
        (time basis ``unresolved``); else the fill record's ``timezone:`` or its offset
        (:mod:`phantometry.sitetime`).

    Before the analysis the site time is settled and the fill record checked against the scan
    (a fill time after the scan start is refused); after it, the fill record's stated
    uncertainties fill the rows' ``uncertainty_fill`` (:func:`apply_fill_uncertainty`) and
    the protocol checks are made (:mod:`phantometry.protocol`).

    Returns
    -------
    Analysis (the kind's subclass) with :class:`~phantometry.results.Measurement` rows.
    """
    where = where or volume.source or "image"
    fill.check_inserts(template)
    kind = kind_of(template)
    volume, time_warnings = settle_site_time(volume, fill, timezone, where)
    settings = AnalysisSettings(uncertainties=uncertainties, resolution=resolution, variance_power=variance_power, progress=progress)
    settings.step(f"locating the phantom (template {template.name})")
    analysis = kind.analyse(volume, template, fill, overrides=overrides, where=where, settings=settings)
    # the loader's warnings about the image (Volume.warnings) and the clock come first
    analysis.warnings[:0] = [w for w in (*volume.warnings, *time_warnings) if w not in analysis.warnings]
    apply_fill_uncertainty(analysis)
    analysis.protocol_checks = protocol_checks(analysis)
    if bands:
        judge(analysis, [load_band_set(b) for b in bands])
    return analysis


def settle_site_time(volume: Volume, fill: FillRecord, timezone: str | None, where: str) -> tuple[Volume, list[str]]:
    """The volume with its times in the site's zone, and what the user must know about them.

    A volume loaded without a zone (basis ``unresolved``) gets the site's zone
    (:func:`phantometry.sitetime.site_clock`); an inferred basis (the fill record's offset)
    is warned about; a header offset that disagrees with a given zone at the scan time is
    warned about; a fill time after the scan start is refused and a long gap for a
    short-lived nuclide warned about (:func:`phantometry.sitetime.check_fill_against_scan`).
    """
    from .sitetime import BASIS_FILL_OFFSET, BASIS_HEADER, BASIS_UNRESOLVED, check_fill_against_scan, offset_text, site_clock

    warns: list[str] = []
    clock = site_clock(fill, timezone) if (volume.time_basis in (BASIS_UNRESOLVED, BASIS_FILL_OFFSET, BASIS_HEADER)) else None
    if volume.time_basis == BASIS_UNRESOLVED and clock is not None:
        volume = resolve_volume_time(volume, clock)
    if volume.time_basis == BASIS_FILL_OFFSET and clock is not None and clock.note:
        warns.append(f"time basis inferred: {clock.note}")
    if volume.time_basis == BASIS_HEADER and clock is not None and not clock.inferred and volume.acquired_at is not None:
        try:
            local = volume.acquired_at.astimezone(clock.zone)
        except OverflowError:  # a time at the calendar's end: the fill checks below refuse it
            local = volume.acquired_at
        if local.utcoffset() != volume.acquired_at.utcoffset():
            warns.append(
                f"the image's TimezoneOffsetFromUTC ({offset_text(volume.acquired_at)}) differs from the given zone "
                f"{clock.label} ({offset_text(local)} at the scan time); the image's own offset is used"
            )
    warns += check_fill_against_scan(fill, volume, where)
    return volume, warns


def apply_fill_uncertainty(analysis: Analysis) -> Analysis:
    """Fill every fill-dependent row's ``uncertainty_fill`` (in place) from the fill record's
    stated input uncertainties (:meth:`phantometry.fill.FillRecord.uncertainties`) and the
    row's sensitivity (:meth:`phantometry.phantoms.base.Analysis.fill_sensitivity`).

    Nothing changes when the fill record states no uncertainty.
    """
    fill = analysis.fill
    if not fill.has_uncertainties or analysis.volume.acquired_at is None:
        return analysis
    names = [n for n in analysis.true_insert_bq_ml if analysis.true_insert_bq_ml[n] > 0]
    fu = fill.uncertainties(analysis.volume.acquired_at, names)
    analysis.fill_uncertainty = fu
    for i, row in enumerate(analysis.rows):
        sens = analysis.fill_sensitivity(row)
        if sens is None:
            continue
        what, name, factor = sens
        if what == "background":
            u = factor * fu.background_rel
        elif what == "insert" and name in fu.insert_rel:
            u = factor * fu.insert_rel[name]
        elif what == "ratio" and name in fu.ratio:
            u = factor * fu.ratio[name]
        else:
            continue
        analysis.rows[i] = dataclasses.replace(row, uncertainty_fill=float(u))
    return analysis


def judge(analysis: Analysis, band_sets: Sequence[BandSet]) -> Analysis:
    """Apply acceptance band sets to an analysis's rows (in place) and record them on it.

    Each set is checked against the template (ROIs and metrics its kind produces); warnings
    (e.g. a band set for another activity ratio) join the analysis's warnings.
    """
    known = kind_of(analysis.template).known_metrics(analysis.template)
    for bs in band_sets:
        check_band_set(bs, analysis.template.name, known)
    rows, warns = apply_bands(analysis.rows, band_sets, fill=analysis.fill)
    analysis.protocol_checks = protocol_checks(analysis, band_sets)
    doubtful = {key: c for c in analysis.placement_checks if not c.confirmed for key in c.rows}
    for i, r in enumerate(rows):
        check = doubtful.get((r.roi, r.metric))
        if check is not None and r.verdict in ("pass", "fail"):
            rows[i] = dataclasses.replace(r, verdict="n/a", note=_join_note(
                r.note, f"verdict withheld: {check.roi_set} ROIs not confirmed in the image ({check.note or 'see placement_quality'})"))
    analysis.rows[:] = rows
    analysis.warnings.extend(w for w in warns if w not in analysis.warnings)
    analysis.band_sets = list(band_sets)
    return analysis


def _join_note(note: str | None, extra: str) -> str:
    return extra if not note else f"{note}; {extra}"


def analysis_json(analysis: Analysis) -> dict[str, Any]:
    """The measurements.json document (``schema_version`` :data:`SCHEMA_VERSION`)."""
    return {
        "schema_version": SCHEMA_VERSION,
        "tool": {"name": "phantometry", "version": __version__},
        "caution": CAUTION,
        "series": analysis.volume.summary(),
        "template": {"name": analysis.template.name, "title": analysis.template.title, "source": analysis.template.source_path,
                     "analysis_kind": analysis.template.analysis.kind},
        "fill_record": analysis.fill.to_dict(),
        "true_concentrations_bq_ml": {"background": analysis.true_background_bq_ml, **analysis.true_insert_bq_ml},
        "fill_uncertainty": _fill_uncertainty_json(analysis),
        "protocol_checks": [c.as_dict() for c in analysis.protocol_checks],
        "localisation": analysis.placement.as_dict(),
        "placement_quality": [c.as_dict() for c in analysis.placement_checks],
        "warnings": analysis.warnings,
        **analysis.json_extras(),
        "bands": [{k: v for k, v in b.summary().items() if k != "entries"} for b in analysis.band_sets],
        "measurements": [r.as_dict() for r in analysis.rows],
    }


def _fill_uncertainty_json(analysis: Analysis) -> dict[str, Any] | None:
    """Relative standard uncertainties of the true concentrations and standard uncertainties
    of the activity ratios from the fill record's inputs (None when it states none)."""
    fu = analysis.fill_uncertainty
    if fu is None:
        return None
    return {
        "true_concentration_relative": {"background": fu.background_rel, **fu.insert_rel},
        "activity_ratio": fu.ratio,
        "method": "GUM law of propagation (JCGM 100:2008) of the fill record's stated standard uncertainties",
    }


def write_results(
    analysis: Analysis,
    folder: str | os.PathLike,
    *,
    overlay: bool = True,
    pictures: bool = True,
    report: bool = False,
    seg: bool = False,
    source_paths: Sequence[str | os.PathLike] | None = None,
) -> list[str]:
    """Write an analysis into an existing folder; returns the names of the files written.

    ``measurements.csv`` and ``measurements.json`` always; ``overlay.png`` (``overlay``); the
    kind's extra pictures (``pictures``; e.g. ``recovery_curve.png``); ``rois_seg.dcm``
    (``seg``; the source DICOM files are re-read from ``source_paths``); ``report.html``
    (``report``, last, so it embeds the pictures written before it).
    """
    folder = Path(folder)
    written = ["measurements.csv", "measurements.json"]
    (folder / "measurements.csv").write_text(measurements_csv(analysis.rows), encoding="utf-8")
    (folder / "measurements.json").write_text(to_json(analysis_json(analysis)), encoding="utf-8")
    if overlay:
        from .figures import overlay_picture

        overlay_picture(analysis.overlay(), folder / "overlay.png")
        written.append("overlay.png")
    if pictures:
        for name, draw in analysis.pictures().items():
            draw(folder / name)
            written.append(name)
    if seg:
        from .seg import write_seg

        write_seg(analysis, folder / "rois_seg.dcm", source_paths=source_paths)
        written.append("rois_seg.dcm")
    if report:
        from .report import write_measure_report

        write_measure_report(analysis, folder / "report.html", folder=folder)
        written.append("report.html")
    return written


def load_image(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    series: str | None = None,
    units: str | None = None,
    acquired_at: Any = None,
    nuclide: str | None = None,
    calibration_factor: float | None = None,
    site_clock: Any = None,
) -> Volume:
    """Load a DICOM series (file, folder or list) or a NIfTI file, whichever the input is.

    ``site_clock`` (:class:`phantometry.sitetime.SiteClock`) is the zone of times written
    without an offset.
    """
    paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
    if not paths:
        raise InputError("no input given: name a DICOM folder or file, or a NIfTI file")
    for p in paths:
        if not p.exists():
            raise InputError(f"{p}: no such file or folder")
    if len(paths) == 1 and paths[0].is_file() and paths[0].name.lower().endswith((".nii", ".nii.gz")):
        from .io.nifti import load_nifti

        return load_nifti(paths[0], units=units, acquired_at=acquired_at, nuclide=nuclide, calibration_factor=calibration_factor,
                          site_clock=site_clock)
    from .io.dicom import load_dicom
    from .sitetime import BASIS_GIVEN_TIME, offset_text

    vol = load_dicom(paths if len(paths) > 1 else paths[0], series=series, calibration_factor=calibration_factor, site_clock=site_clock)
    if acquired_at is not None:
        vol = dataclasses.replace(vol, acquired_at=acquired_at, time_basis=BASIS_GIVEN_TIME,
                                  time_zone=f"{offset_text(acquired_at)} (--acquired-at)")
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


@dataclasses.dataclass
class PreparedInputs:
    """What ``measure`` and ``harmonise`` read and check before the image: the template and its
    kind, the fill record (checked against the template), the site clock, manual centres, the
    band sets (checked against the template) and how messages name the input."""

    template: Template
    kind: PhantomKind
    fill: FillRecord
    clock: SiteClock
    overrides: dict[str, np.ndarray]
    band_sets: list[BandSet]
    where: str


def prepare_inputs(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    template: str,
    fill: str | os.PathLike,
    bands: Sequence[BandSet | str | os.PathLike] | None = None,
    centres: Sequence[str] | None = None,
    templates_dirs: Sequence[str] | None = None,
    timezone: str | None = None,
    check_template: Callable[[Template], None] | None = None,
) -> PreparedInputs:
    """Load and cross-check everything a measurement needs except the image (nothing written).

    ``check_template`` (e.g. a command's own refusal of kinds it cannot serve) runs right after
    the template is loaded. A fill record that does not fit the template but names another
    phantom is refused with the hint ``--template NAME``.

    Raises
    ------
    TemplateError, FillRecordError, BandError, InputError
        One line naming the file and the problem.
    """
    tpl = load_template(template, list(templates_dirs or []))
    if check_template is not None:
        check_template(tpl)
    kind = kind_of(tpl)
    fill_record = load_fill_record(fill)
    with _hint_other_phantom(fill_record, tpl):
        fill_record.check_inserts(tpl)
    clock = site_clock(fill_record, timezone)
    overrides = parse_centre_overrides(centres, tpl)
    band_sets: list[BandSet] = []
    if bands:
        known = kind.known_metrics(tpl)
        band_sets = [load_band_set(b) for b in bands]
        for b in band_sets:
            check_band_set(b, tpl.name, known)
    where = str(inputs if isinstance(inputs, (str, os.PathLike)) else ", ".join(map(str, inputs)))
    return PreparedInputs(tpl, kind, fill_record, clock, overrides, band_sets, where)


@contextlib.contextmanager
def _hint_other_phantom(fill_record: FillRecord, template: Template) -> Iterator[None]:
    """A fill record that does not fit the template, but names another phantom (``phantom:``),
    is refused with the hint to measure it with that phantom's template."""
    try:
        yield
    except FillRecordError as exc:
        other = (fill_record.phantom or "").strip()
        if not other or other == template.name:
            raise
        raise FillRecordError(
            f"{exc}. The fill record is for phantom {other!r}, the template is {template.name!r}: "
            f"if the scan is of that phantom, pass --template {other}"
        ) from None


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
    bands: Sequence[BandSet | str | os.PathLike] | None = None,
    overwrite: bool = False,
    record: Any = None,
    progress: Callable[[str], None] | None = None,
    timezone: str | None = None,
) -> Analysis:
    """Measure a phantom scan from files and write ``out/`` (CSV, JSON, pictures).

    ``timezone`` (``--timezone``, an IANA name) is the site's zone, in which scanner times
    written without a UTC offset are read (:mod:`phantometry.sitetime`); by default the fill
    record's ``timezone:``, else its own offset (warned).

    ``report=True`` adds ``report.html`` (:mod:`phantometry.report`); ``seg=True`` adds
    ``rois_seg.dcm``, the placed ROIs as a DICOM Segmentation (:mod:`phantometry.seg`; DICOM
    input and kinds that export their ROIs only, refused before measuring otherwise).

    ``bands`` (names or files of acceptance band sets, :mod:`phantometry.bands`) fill the
    rows' verdicts; they are loaded and checked against the template before measuring.

    ``record`` (a :class:`phantometry.ledger.measure_record.RecordRequest`) records the
    analysis in the trend ledger once the folder is written; a duplicate is refused before the
    image is read and before anything is written.

    The folder appears only when everything succeeded; if localisation fails, a diagnostic
    picture is written to ``out.failed.png`` beside it (unless a file phantometry did not
    write is there) and :class:`PhantomNotFound` is raised.

    ``out`` follows the rules of :mod:`phantometry.outputs`, checked before anything is
    loaded: it must not exist, be an empty folder, or (with ``overwrite=True``) be a folder of
    earlier phantometry results; it may not be, lie inside or contain an input. The returned
    analysis carries ``written`` (:class:`phantometry.outputs.WrittenFolder`: whether an
    earlier folder was replaced, and what it held that this run did not write).

    ``progress`` (a callable taking a short text) hears of each long step as it starts:
    loading (with the number of files), locating, measuring, uncertainties, writing.

    Raises
    ------
    OutputRefused
        ``out`` may not be written (nothing is loaded or written).
    OutputError
        A system error while writing (the reason in the message; nothing is left behind).
    """
    from .outputs import KIND_MEASURE, check_output_folder, existing_inputs, output_folder

    input_paths = existing_inputs(inputs, fill, template, list(bands or []), list(templates_dirs or []))
    check_output_folder(out, KIND_MEASURE, inputs=input_paths, overwrite=overwrite)
    prepared = prepare_inputs(inputs, template=template, fill=fill, bands=bands, centres=centres, templates_dirs=templates_dirs,
                              timezone=timezone)
    tpl, kind, fill_record, overrides, band_sets = prepared.template, prepared.kind, prepared.fill, prepared.overrides, prepared.band_sets
    clock, where = prepared.clock, prepared.where
    if record is not None:  # a duplicate is refused before the pixels are read
        record.check_inputs(inputs, series=series, acquired_at=acquired_at, template=tpl.name, fill=fill_record)
    if progress is not None:
        progress(f"loading {describe_inputs(inputs)}")
    volume = load_image(inputs, series=series, units=units, acquired_at=acquired_at, nuclide=nuclide, calibration_factor=calibration_factor,
                        site_clock=clock)
    if record is not None:
        record.check_volume(volume, template=tpl.name, fill=fill_record)
    if seg:
        from .seg import check_seg_request

        check_seg_request(volume, tpl, kind, where)
    out = Path(out)
    try:
        with _hint_other_phantom(fill_record, tpl):
            analysis = measure_volume(volume, tpl, fill_record, overrides=overrides, where=where, progress=progress, timezone=timezone)
    except PhantomNotFound as exc:
        message = str(exc)
        try:
            from .figures import diagnostic_picture
            from .outputs import write_picture_beside

            try:  # where the search looked, as far as it got
                sketch = kind.failure_sketch(volume, tpl, where)
            except Exception:
                sketch = None
            write_picture_beside(out.with_name(out.name + ".failed.png"),
                                 lambda p: diagnostic_picture(volume, p, message=message, sketch=sketch), "failed localisation",
                                 inputs=input_paths)
        except Exception:  # the picture is a courtesy; the original error matters
            pass
        raise
    if band_sets:
        judge(analysis, band_sets)
    if progress is not None:
        progress(f"writing {out}")
    with output_folder(out, KIND_MEASURE, inputs=input_paths, overwrite=overwrite) as staging:
        write_results(analysis, staging.path, overlay=overlay, pictures=overlay, report=report, seg=seg,
                      source_paths=[inputs] if isinstance(inputs, (str, os.PathLike)) else list(inputs))
    analysis.written = staging.written
    if record is not None:
        if progress is not None:
            progress("recording the analysis in the trend ledger")
        record.record(analysis)
    return analysis


def describe_inputs(inputs: Sequence[str | os.PathLike] | str | os.PathLike) -> str:
    """The inputs as a progress line names them: ``scan/dicom (111 files)``, ``scan.nii.gz``.

    Folders are counted to the files they hold (what the loader will look at); a count that
    cannot be made (unreadable folder) is left out.
    """
    paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
    count = 0
    for p in paths:
        if p.is_dir():
            try:
                count += sum(len(files) for _, _, files in os.walk(p))
            except OSError:  # pragma: no cover - os.walk reports errors through onerror only
                pass
        else:
            count += 1
    names = ", ".join(map(str, paths[:3])) + (f" and {len(paths) - 3} more" if len(paths) > 3 else "")
    if len(paths) == 1 and paths[0].is_file():
        return names
    return f"{names} ({count} file{'s' if count != 1 else ''})"


__all__ = ["measure", "measure_volume", "judge", "settle_site_time", "apply_fill_uncertainty", "write_results", "load_image", "analysis_json",
           "parse_centre_overrides", "describe_inputs", "PhantometryError"]
