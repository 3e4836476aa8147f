"""The commands. Each one parses options and calls a library function; no analysis here."""

from __future__ import annotations

import json
import tempfile
from datetime import datetime
from pathlib import Path
from typing import List, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ..errors import InputError
from ..results import CAUTION
from . import app, templates_app

console = Console(highlight=False)


def _parse_time(text: Optional[str]) -> Optional[datetime]:
    if text is None:
        return None
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        raise InputError(f"--acquired-at {text!r}: expected ISO 8601 with a time zone, e.g. 2026-11-03T10:30:00+01:00") from None
    if t.tzinfo is None:
        raise InputError(f"--acquired-at {text!r}: give a time-zone offset, e.g. +01:00")
    return t


def _fmt(v, nd=2) -> str:
    if v is None:
        return "-"
    try:
        return f"{float(v):.{nd}f}"
    except (TypeError, ValueError):
        return str(v)


def print_sphere_table(analysis) -> None:
    """The terminal summary: one row per sphere, then background and insert."""
    if not hasattr(analysis, "sphere_rows"):  # another phantom kind: its own table
        cols, body = analysis.table()
        t = Table(title=analysis.template.title, caption=CAUTION, caption_justify="left")
        for c in cols:
            t.add_column(c, no_wrap=True, justify="left" if c in ("ROI", "metric") else "right")
        for row in body:
            t.add_row(*row)
        console.print(t)
        for w in analysis.warnings:
            console.print("[bold]WARNING[/bold]: " + escape(w))
        return
    t = Table(title=f"{analysis.template.title}", caption=CAUTION, caption_justify="left")
    t.add_column("ROI", no_wrap=True, min_width=11)
    t.add_column("fill", no_wrap=True)
    for col in ("contrast %", "BV %", "RC max", "RC mean", "RC peak", "resid mm"):
        t.add_column(col, justify="right")
    for row in analysis.sphere_rows():
        t.add_row(
            row["roi"],
            "hot" if row["hot"] else "cold",
            _fmt(row.get("percent_contrast"), 1),
            _fmt(row.get("background_variability_pct"), 2),
            _fmt(row.get("rc_max"), 3),
            _fmt(row.get("rc_mean"), 3),
            _fmt(row.get("rc_peak"), 3),
            _fmt(row.get("fit_residual_mm"), 2),
        )
    console.print(t)
    for r in analysis.rows:
        if r.roi in ("background",) or r.metric == "lung_residual_pct":
            console.print(f"  {r.roi:<12} {r.metric:<20} {_fmt(r.value, 3)} {r.unit}")
    for w in analysis.warnings:
        console.print("[bold]WARNING[/bold]: " + escape(w))


@app.command("measure")
def measure_cmd(
    inputs: List[Path] = typer.Argument(..., help="DICOM folder(s)/file(s) of one series, or a NIfTI file."),
    template: str = typer.Option("iec-body", "--template", "-t", help="Template name or YAML file."),
    fill: Path = typer.Option(..., "--fill", "-f", help="Fill record YAML (phantom preparation)."),
    out: Path = typer.Option(..., "--out", "-o", help="Result folder (written atomically)."),
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
        acquired_at=_parse_time(acquired_at),
        nuclide=nuclide,
        calibration_factor=calibration,
        templates_dirs=[str(d) for d in templates_dir or []],
        report=report,
        seg=seg,
        bands=list(bands or []),
        record=request,
    )
    print_sphere_table(analysis)
    _print_resolution_and_verdicts(analysis, bool(bands))
    console.print(f"wrote {out}/measurements.csv, measurements.json, overlay.png", markup=False)
    if (Path(out) / "recovery_curve.png").exists():
        console.print(f"wrote {out}/recovery_curve.png", markup=False)
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


def _print_resolution_and_verdicts(analysis, banded: bool) -> None:
    """The effective FWHM line and, with bands, a verdict table (one row per banded value)."""
    for r in analysis.rows:
        if r.roi == "phantom" and r.metric == "effective_fwhm_mm":
            fit = getattr(analysis, "resolution", None)
            ci = f" (95 % interval {fit.ci95_mm[0]:.2f}-{fit.ci95_mm[1]:.2f} mm)" if fit is not None else ""
            console.print(f"  effective FWHM {_fmt(r.value, 2)} +- {_fmt(r.uncertainty, 2)} mm{ci}", markup=False)
    if not banded:
        return
    sets = list(getattr(analysis, "band_sets", []))
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


@app.command("synth")
def synth_cmd(
    out: Path = typer.Argument(..., help="Output folder."),
    phantom: str = typer.Option("iec-body", "--phantom", help="Template name: iec-body, small-animal, or a user template."),
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
) -> None:
    """Synthesise a phantom scan with known truth (image, fill.yaml, truth.json)."""
    from ..synth import SynthSpec, default_scan_settings, synthesize, write_synthetic

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
    )
    paths = write_synthetic(synthesize(spec), out, fmt)
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
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Folder for the demo scan and results (default: a temporary folder)."),
    noise: float = typer.Option(0.1, "--noise", help="Background voxel coefficient of variation."),
) -> None:
    """Synthesise an IEC body phantom scan (invented scenario) and measure it end to end."""
    from ..measure import measure
    from ..synth import SynthSpec, synthesize, write_synthetic

    base = Path(out) if out else Path(tempfile.mkdtemp(prefix="phantometry-demo-"))
    console.print("[bold]phantometry demo[/bold]: synthetic IEC body phantom (invented site and scanner) in " + escape(str(base)))
    spec = SynthSpec(voxel_mm=(2.0, 2.0, 2.0), psf_fwhm_mm=6.0, noise_cv=noise, shift_mm=(6.0, -4.0, 3.0), rotation_deg=(1.5, -1.0, 17.0), seed=7)
    paths = write_synthetic(synthesize(spec), base / "scan", "dicom")
    analysis = measure([str(paths["image"])], template="iec-body", fill=paths["fill"], out=base / "results")
    print_sphere_table(analysis)
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
    from ..templates import load_template

    console.print_json(json.dumps(load_template(name, [str(d) for d in templates_dir or []]).summary()))


@templates_app.command("check")
def templates_check(path: Path) -> None:
    """Validate a template file: schema and geometry (inserts inside, no overlaps, ROI clearances)."""
    from ..errors import TemplateError
    from ..templates import check_template, load_template_file

    tpl = load_template_file(path)
    problems = check_template(tpl)
    if problems:
        raise TemplateError(f"{path}: {len(problems)} problem(s): " + "; ".join(problems))
    extra = f", {tpl.background.n_rois} background ROI positions per size" if tpl.background else ""
    console.print(f"{path}: template {tpl.name} is valid ({len(tpl.inserts)} inserts{extra})", markup=False)
