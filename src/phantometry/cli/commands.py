"""The commands. Each one parses options and calls a library function; no analysis here."""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, List, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ..errors import InputError
from ..results import CAUTION
from ..timeutil import parse_aware_time
from . import app, templates_app

if TYPE_CHECKING:  # pragma: no cover
    from ..phantoms.base import Analysis

console = Console(highlight=False)


def _fmt(v, nd=2) -> str:
    if v is None:
        return "-"
    try:
        return f"{float(v):.{nd}f}"
    except (TypeError, ValueError):
        return str(v)


def print_summary_table(analysis: Analysis) -> None:
    """The terminal summary of an analysis (its kind's table), then its warnings."""
    st = analysis.summary_table()
    t = Table(title=st.title, caption=CAUTION, caption_justify="left")
    for i, c in enumerate(st.columns):
        t.add_column(c, no_wrap=True, justify="left" if i == 0 or c in ("fill", "metric") else "right", min_width=11 if i == 0 else None)
    for row in st.rows:
        t.add_row(*(escape(c) for c in row))
    console.print(t)
    for line in st.lines:
        console.print(line, markup=False)
    basis = analysis.volume.time_basis
    if basis:
        console.print(f"times: {basis}" + (f", {analysis.volume.time_zone}" if analysis.volume.time_zone else ""), markup=False)
    for c in getattr(analysis, "protocol_checks", []):
        if c.status == "warning":
            console.print("[bold]PROTOCOL[/bold]: " + escape(c.message))
    for w in analysis.warnings:
        console.print("[bold]WARNING[/bold]: " + escape(w))


@app.command("measure")
def measure_cmd(
    inputs: List[Path] = typer.Argument(..., help="DICOM folder(s)/file(s) of one series, or a NIfTI file."),
    template: str = typer.Option("iec-body", "--template", "-t", help="Template name or YAML file."),
    fill: Path = typer.Option(..., "--fill", "-f", help="Fill record YAML (phantom preparation)."),
    out: Path = typer.Option(..., "--out", "-o", help="Result folder: a new one, or earlier results with --overwrite (written atomically)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace --out when it holds earlier phantometry results (never any other folder)."),
    series: Optional[str] = typer.Option(None, "--series", help="Series UID, UID prefix or series number."),
    centre: Optional[List[str]] = typer.Option(None, "--centre", help="Manual insert centre NAME=x,y,z (world mm); repeatable."),
    units: Optional[str] = typer.Option(None, "--units", help="NIfTI: pixel units (Bq/mL, kBq/mL)."),
    acquired_at: Optional[str] = typer.Option(None, "--acquired-at", help="Image reference time, ISO 8601 with offset."),
    nuclide: Optional[str] = typer.Option(None, "--nuclide", help="NIfTI: radionuclide, e.g. F-18."),
    calibration: Optional[float] = typer.Option(None, "--calibration", help="Bq/mL per count for CNTS images."),
    templates_dir: Optional[List[Path]] = typer.Option(None, "--templates", help="Extra folder of templates."),
    report: bool = typer.Option(False, "--report", help="Also write report.html (self-contained, printable)."),
    seg: bool = typer.Option(False, "--seg", help="Also write rois_seg.dcm: the ROIs as a DICOM Segmentation (DICOM input only)."),
    record: bool = typer.Option(False, "--record", help="Record the analysis in the trend ledger after writing the results."),
    db: Optional[str] = typer.Option(None, "--db", envvar="PHANTOMETRY_DB", help="Ledger database URL or file (with --record)."),
    site: Optional[str] = typer.Option(None, "--site", help="Ledger site label (with --record; default: the fill record's site)."),
    scanner: Optional[str] = typer.Option(None, "--scanner", help="Ledger scanner label (with --record; default: station name)."),
    protocol: Optional[str] = typer.Option(None, "--protocol", help="Ledger protocol label (with --record; default: reconstruction)."),
    replace: bool = typer.Option(False, "--replace", help="With --record: replace an analysis of the same series + template + settings."),
    bands: Optional[List[str]] = typer.Option(None, "--bands", help="Acceptance band set (name or YAML file; phantometry bands list); repeatable."),
    strict: bool = typer.Option(False, "--strict", help="Exit code 3 when any banded value fails (results are still written)."),
    timezone: Optional[str] = typer.Option(
        None, "--timezone", help="Site time zone (IANA name, e.g. Europe/Berlin) of scanner times written without a UTC offset "
        "(default: the fill record's timezone:, else its own offset)."),
) -> None:
    """Measure a phantom scan: recovery coefficients, contrast, background variability, insert residual.

    With --bands, every banded value gets a verdict (pass, fail, n/a); with --strict the exit
    code is 3 when any verdict is fail (for scripted QC), 0 otherwise.
    """
    if strict and not bands:
        raise InputError("--strict needs at least one --bands NAME to judge against (phantometry bands list)")
    if not record and (site or scanner or protocol or replace):
        raise InputError("--site, --scanner, --protocol and --replace apply with --record; add --record")
    from ..measure import measure

    request = None
    if record:
        from .ledger import record_request

        request = record_request(db, site=site, scanner=scanner, protocol=protocol, replace=replace)
    analysis = measure(
        [str(p) for p in inputs],
        template=template,
        fill=fill,
        out=out,
        series=series,
        centres=centre,
        units=units,
        acquired_at=None if acquired_at is None else parse_aware_time(acquired_at, "--acquired-at"),
        nuclide=nuclide,
        calibration_factor=calibration,
        templates_dirs=[str(d) for d in templates_dir or []],
        report=report,
        seg=seg,
        bands=list(bands or []),
        overwrite=overwrite,
        record=request,
        timezone=timezone,
    )
    print_summary_table(analysis)
    _print_resolution_and_verdicts(analysis, bool(bands))
    print_written(analysis.written)
    console.print(f"wrote {out}/measurements.csv, measurements.json, overlay.png", markup=False)
    pictures = [name for name in analysis.pictures() if (Path(out) / name).exists()]
    if pictures:
        console.print(f"wrote {out}/" + ", ".join(pictures), markup=False)
    if report or seg:
        console.print(f"wrote {out}/" + ", ".join(n for n, on in (("report.html", report), ("rois_seg.dcm", seg)) if on), markup=False)
    if request is not None:
        from .ledger import print_recorded

        print_recorded(request)
    if strict:
        from ..bands import any_failed

        if any_failed(analysis.rows):
            failed = sum(1 for r in analysis.rows if r.verdict == "fail")
            console.print(f"[bold]--strict[/bold]: {failed} banded value(s) fail; exit code 3")
            raise typer.Exit(3)


def _print_resolution_and_verdicts(analysis: Analysis, banded: bool) -> None:
    """The effective FWHM line and, with bands, a verdict table (one row per banded value)."""
    for r in analysis.rows:
        if r.roi == "phantom" and r.metric == "effective_fwhm_mm":
            fit = analysis.json_extras().get("effective_resolution") or {}
            ci95 = fit.get("ci95_mm")
            ci = f" (95 % interval {ci95[0]:.2f}-{ci95[1]:.2f} mm)" if ci95 else ""
            console.print(f"  effective FWHM {_fmt(r.value, 2)} +- {_fmt(r.uncertainty, 2)} mm{ci}", markup=False)
    if not banded:
        return
    sets = list(analysis.band_sets)
    caption = "Limits inclusive; u = standard uncertainty (noise only)."
    if len(sets) > 1:
        caption += " verdict: the worst over the bands; each band's limits are in measurements.csv (note)."
    from rich import box

    t = Table(title="Acceptance bands", caption=caption, caption_justify="left", box=box.SIMPLE_HEAD)
    t.add_column("ROI", no_wrap=True)
    t.add_column("metric", no_wrap=True)
    t.add_column("value", justify="right", no_wrap=True, min_width=5)
    t.add_column("u", justify="right", no_wrap=True, min_width=5)
    for bs in sets:
        t.add_column(escape(bs.name), justify="right", no_wrap=len(sets) == 1, overflow="fold")
    t.add_column("verdict", no_wrap=True)
    colour = {"pass": "green", "fail": "bold red", "n/a": "yellow"}

    def cell(verdict: str, text: str = "") -> str:
        return f"[{colour.get(verdict, 'white')}]{verdict}[/]{text}"

    for r in analysis.rows:
        if r.verdict is None:
            continue
        cells = []
        for bs in sets:
            e = bs.entry(r.roi, r.metric)
            if e is None:
                cells.append("-")
                continue
            lo = "-inf" if e.low is None else f"{e.low:.3g}"
            hi = "+inf" if e.high is None else f"{e.high:.3g}"
            cells.append(cell(e.judge(r.value), f" {lo}..{hi}") if len(sets) == 1 else cell(e.judge(r.value)))
        t.add_row(escape(r.roi), escape(r.metric), _fmt(r.value, 3), _fmt(r.uncertainty, 3), *cells, cell(r.verdict))
    console.print(t)


def print_written(written) -> None:
    """Say so when an earlier results folder was replaced (and what it held that is now gone)."""
    text = written.message() if written is not None else None
    if text:
        console.print(f"[bold]NOTE[/bold]: {escape(text)}", soft_wrap=True)


@app.command("synth")
def synth_cmd(
    out: Path = typer.Argument(..., help="Output folder: a new one, or an earlier synthetic scan with --overwrite."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace OUT when it holds an earlier phantometry folder (never any other folder)."),
    phantom: str = typer.Option("iec-body", "--phantom", help="Template name: iec-body, small-animal, or a user template."),
    template_file: Optional[Path] = typer.Option(
        None, "--template-file", help="Build the phantom from this template file instead (a variant: e.g. the sphere ring turned or mirrored)."
    ),
    fmt: str = typer.Option("dicom", "--format", help="dicom or nifti."),
    voxel: Optional[float] = typer.Option(None, "--voxel", help="Isotropic voxel size, mm (default 2; 0.5 for small-animal)."),
    matrix: Optional[str] = typer.Option(None, "--matrix", help="Grid size NX,NY,NZ (default: fits the phantom)."),
    fwhm: Optional[float] = typer.Option(None, "--fwhm", help="PSF FWHM, mm (default 6; 1.8 for small-animal)."),
    ratio: float = typer.Option(4.0, "--ratio", help="Hot insert : background concentration ratio."),
    background: Optional[float] = typer.Option(None, "--background", help="Background at scan time, kBq/mL (default 5.3; 150 for small-animal)."),
    noise: float = typer.Option(0.1, "--noise", help="Background voxel coefficient of variation (0 = off)."),
    cold: Optional[List[str]] = typer.Option(None, "--cold", help="Insert filled with water; repeatable."),
    shift: str = typer.Option("0,0,0", "--shift", help="Translation x,y,z, mm."),
    rotate: str = typer.Option("0,0,0", "--rotate", help="Rotation about x,y,z, degrees."),
    flip: bool = typer.Option(False, "--flip", help="Phantom lying the other way along the bed."),
    seed: int = typer.Option(0, "--seed", help="Noise seed."),
    diameter: Optional[float] = typer.Option(None, "--diameter", help="Cylindrical body diameter, mm (e.g. uniform-cylinder; default: the template's)."),
    length: Optional[float] = typer.Option(None, "--length", help="Cylindrical body length, mm (default: the template's)."),
    calibration_factor: float = typer.Option(1.0, "--calibration-factor", help="Imperfection: gain of the whole image (1 = calibrated)."),
    axial_slope: float = typer.Option(0.0, "--axial-slope", help="Imperfection: axial gain slope, % per 100 mm along the slice axis."),
    slice_artefact: Optional[str] = typer.Option(None, "--slice-artefact", help="Imperfection: Z_MM,GAIN_PCT: the image slice nearest Z_MM from the phantom centre scaled by 1 + GAIN_PCT/100."),
    radial: float = typer.Option(0.0, "--radial", help="Imperfection: radial gain at the wall relative to the axis, % (positive: cupping, negative: capping)."),
    local_times: bool = typer.Option(False, "--local-times", help="Write the scanner's times as local wall clock without a UTC offset, as most scanners do."),
) -> None:
    """Synthesise a phantom scan with known truth (image, fill.yaml, truth.json)."""
    from ..outputs import KIND_SCAN, check_output_folder, existing_inputs
    from ..synth import SynthSpec, default_scan_settings, synth_template_source, synthesize, write_synthetic

    if fmt not in ("dicom", "nifti"):
        raise InputError(f"--format {fmt!r}: use dicom or nifti")
    phantom = synth_template_source(phantom, template_file, phantom_given=phantom != "iec-body")
    inputs = existing_inputs(phantom)
    check_output_folder(out, KIND_SCAN, inputs=inputs, overwrite=overwrite)  # before synthesising
    defaults = default_scan_settings(phantom)
    voxel = defaults["voxel_mm"] if voxel is None else voxel
    fwhm = defaults["psf_fwhm_mm"] if fwhm is None else fwhm
    background = defaults["background_kbq_ml"] if background is None else background

    def vec(text: str, n: int, what: str, typ=float):
        try:
            vals = [typ(v) for v in text.split(",")]
        except ValueError:
            vals = []
        if len(vals) != n:
            raise InputError(f"{what} {text!r}: expected {n} comma-separated numbers")
        return tuple(vals)

    spec = SynthSpec(
        phantom=phantom,
        voxel_mm=(voxel, voxel, voxel),
        matrix=vec(matrix, 3, "--matrix", int) if matrix else None,
        psf_fwhm_mm=fwhm,
        sphere_ratio=ratio,
        background_kbq_ml=background,
        noise_cv=noise,
        cold=list(cold or []),
        shift_mm=vec(shift, 3, "--shift"),
        rotation_deg=vec(rotate, 3, "--rotate"),
        flip=flip,
        seed=seed,
        diameter_mm=diameter,
        length_mm=length,
        calibration_factor=calibration_factor,
        axial_slope_pct_per_100mm=axial_slope,
        slice_artefact=vec(slice_artefact, 2, "--slice-artefact") if slice_artefact else None,
        radial_gain_pct=radial,
    )
    paths = write_synthetic(synthesize(spec), out, fmt, overwrite=overwrite, inputs=inputs, local_times=local_times)
    print_written(paths["written"])
    console.print(f"wrote {paths['image']}, {paths['fill']}, {paths['truth']}", markup=False)


@app.command("info")
def info_cmd(
    inputs: List[Path] = typer.Argument(..., help="DICOM folder(s)/file(s) or a NIfTI file."),
    series: Optional[str] = typer.Option(None, "--series"),
    units: Optional[str] = typer.Option(None, "--units"),
) -> None:
    """Show the series found and the loaded volume's geometry and metadata."""
    from ..measure import load_image

    vol = load_image([str(p) for p in inputs], series=series, units=units)
    console.print_json(json.dumps({k: v for k, v in vol.summary().items() if k != "affine"}))


@app.command("demo")
def demo_cmd(
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Folder for the demo scan and results: a new one, or an earlier demo with --overwrite (default: a temporary folder)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace --out when it holds an earlier phantometry folder (never any other folder)."),
    noise: float = typer.Option(0.1, "--noise", help="Background voxel coefficient of variation."),
) -> None:
    """Synthesise an IEC body phantom scan (invented scenario) and measure it end to end."""
    from ..measure import measure
    from ..outputs import KIND_DEMO, output_folder
    from ..synth import SynthSpec, synthesize, write_synthetic

    base = Path(out) if out else Path(tempfile.mkdtemp(prefix="phantometry-demo-"))
    if out is None:  # mkdtemp makes it 0700: give it the user's umask like any other folder
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(base, 0o777 & ~mask)
    try:
        with output_folder(base, KIND_DEMO, overwrite=overwrite) as staging:
            console.print("[bold]phantometry demo[/bold]: synthetic IEC body phantom (invented site and scanner) in " + escape(str(base)))
            spec = SynthSpec(voxel_mm=(2.0, 2.0, 2.0), psf_fwhm_mm=6.0, noise_cv=noise, shift_mm=(6.0, -4.0, 3.0), rotation_deg=(1.5, -1.0, 17.0), seed=7)
            paths = write_synthetic(synthesize(spec), staging.path / "scan", "dicom")
            analysis = measure([str(paths["image"])], template="iec-body", fill=paths["fill"], out=staging.path / "results")
    except BaseException:
        if out is None:  # the empty temporary folder made above
            shutil.rmtree(base, ignore_errors=True)
        raise
    print_summary_table(analysis)
    print_written(staging.written)
    console.print(f"results in {base / 'results'} (measurements.csv, measurements.json, overlay.png)", markup=False)


@templates_app.command("list")
def templates_list(templates_dir: Optional[List[Path]] = typer.Option(None, "--templates")) -> None:
    """List the templates found (user folders first, then the built-in ones)."""
    from ..templates import list_templates, load_template_file

    for name, path in list_templates([str(d) for d in templates_dir or []]).items():
        try:
            title = load_template_file(path).title
        except InputError as exc:
            title = f"(invalid: {exc})"
        console.print(f"{name:<20} {title}  ({path})", markup=False)


@templates_app.command("show")
def templates_show(name: str, templates_dir: Optional[List[Path]] = typer.Option(None, "--templates")) -> None:
    """Print a template as validated (JSON)."""
    from ..phantoms import load_template

    console.print_json(json.dumps(load_template(name, [str(d) for d in templates_dir or []]).summary()))


@templates_app.command("check")
def templates_check(path: Path) -> None:
    """Validate a template file: schema and geometry (inserts inside, no overlaps, ROI clearances)."""
    from ..errors import TemplateError
    from ..phantoms import check_template
    from ..templates import load_template_file

    tpl = load_template_file(path)
    problems = check_template(tpl)
    if problems:
        raise TemplateError(f"{path}: {len(problems)} problem(s): " + "; ".join(problems))
    extra = f", {tpl.background.n_rois} background ROI positions per size" if tpl.background else ""
    console.print(f"{path}: template {tpl.name} is valid ({len(tpl.inserts)} inserts{extra})", markup=False)
