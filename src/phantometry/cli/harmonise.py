"""``phantometry harmonise``: wiring over :func:`phantometry.harmonise.harmonise`; no analysis here."""

from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer
from rich import box
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ..errors import InputError
from ..results import CAUTION
from . import app
from ..timeutil import parse_aware_time
from .commands import print_written
from .numbers import limits_range, number

console = Console(highlight=False)

#: Exit code of ``harmonise --strict`` when no filter meets every band.
EXIT_NO_FILTER = 3


def print_harmonisation(h) -> None:
    """The recommendation, the passing range and what limits it, each band set's range, the
    values at the recommendation, the caution and the warnings."""
    from ..harmonise import FILTER_CAUTION

    o = h.overall
    bands = ", ".join(bs.name for bs in h.band_sets)
    sweep = f"{h.fwhms[0]:g}-{h.max_fwhm_mm:g} mm in {h.step_mm:g} mm"
    console.print(f"[bold]Harmonising post-filter[/bold] for {escape(bands)} ({len(h.steps)} Gaussian filters, {sweep})")
    if o.found:
        console.print(f"  recommended: [bold]{o.recommended_mm:g} mm FWHM[/bold] (closest to the band centres: "
                      f"RMS distance {o.distance:.2f})" if o.distance is not None else f"  recommended: [bold]{o.recommended_mm:g} mm FWHM[/bold]")
        console.print(f"  every band met from {o.low_mm:g} to {o.high_mm:g} mm", markup=False)
        console.print(f"  lower end: {o.low_end.text}", markup=False, soft_wrap=True)
        console.print(f"  upper end: {o.high_end.text}", markup=False, soft_wrap=True)
    else:
        console.print("  [bold]no filter meets every band[/bold]")
        console.print(f"  {o.reason}", markup=False, soft_wrap=True)
    if len(h.by_set) > 1:
        for name, pr in h.by_set.items():
            text = f"{pr.low_mm:g}-{pr.high_mm:g} mm, closest to its centres {pr.recommended_mm:g} mm" if pr.found else "no filter meets it"
            console.print(f"  {name}: {text}", markup=False, soft_wrap=True)
    rec = h.recommended
    if rec is not None:
        t = Table(title=f"Values at {rec.fwhm_mm:g} mm", caption="u = standard uncertainty (noise only); limits inclusive.",
                  caption_justify="left", box=box.SIMPLE_HEAD)
        for c in ("ROI", "metric", "value", "u", "band", "verdict"):
            t.add_column(c, justify="right" if c in ("value", "u") else "left", no_wrap=True)
        for r in rec.rows:
            t.add_row(escape(r.roi), escape(r.metric), number(r.value, r.unit), number(r.uncertainty, r.unit),
                      escape(limits_range(r.band_low, r.band_high)), r.verdict or "-")
        console.print(t)
    console.print(f"[bold]CAUTION[/bold]: {escape(FILTER_CAUTION)}", soft_wrap=True)
    console.print(CAUTION, markup=False, soft_wrap=True)
    seen = set()
    for w in [*h.analysis.warnings, *h.warnings]:
        if w not in seen:
            seen.add(w)
            console.print("[bold]WARNING[/bold]: " + escape(w), soft_wrap=True)


@app.command("harmonise")
def harmonise_cmd(
    inputs: List[Path] = typer.Argument(..., metavar="INPUT", help="DICOM folder(s)/file(s) of one series, or a NIfTI file."),
    fill: Path = typer.Option(..., "--fill", "-f", metavar="FILE", help="Fill record YAML (phantom preparation)."),
    bands: List[str] = typer.Option(..., "--bands", "-b", metavar="NAME|FILE", help="Band set to aim for (name or YAML file; phantometry bands list); repeatable."),
    out: Path = typer.Option(..., "--out", "-o", metavar="DIR", help="Result folder: a new one, or earlier results with --overwrite (written atomically)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace --out when it holds earlier phantometry results (never any other folder)."),
    template: str = typer.Option("iec-body", "--template", "-t", metavar="NAME|FILE", help="Template name or YAML file (the body image-quality kind, e.g. iec-body)."),
    series: Optional[str] = typer.Option(None, "--series", metavar="UID|NUMBER", help="Series UID, UID prefix or series number."),
    centre: Optional[List[str]] = typer.Option(None, "--centre", metavar="NAME=X,Y,Z", help="Manual insert centre NAME=x,y,z (world mm); repeatable."),
    units: Optional[str] = typer.Option(None, "--units", metavar="UNIT", help="NIfTI: pixel units (Bq/mL, kBq/mL)."),
    acquired_at: Optional[str] = typer.Option(None, "--acquired-at", metavar="TIME", help="Image reference time, ISO 8601 with offset."),
    nuclide: Optional[str] = typer.Option(None, "--nuclide", metavar="NAME", help="NIfTI: radionuclide, e.g. F-18."),
    calibration: Optional[float] = typer.Option(None, "--calibration", metavar="FACTOR", help="Bq/mL per count for CNTS images."),
    templates_dir: Optional[List[Path]] = typer.Option(None, "--templates", metavar="DIR", help="Extra folder of templates."),
    max_fwhm: float = typer.Option(10.0, "--max-fwhm", metavar="MM", help="Widest Gaussian post-filter to try, mm FWHM."),
    step: float = typer.Option(0.25, "--step", metavar="MM", help="Step between the filters tried, mm."),
    write_filtered: bool = typer.Option(False, "--write-filtered", help="Also write the image filtered at the recommendation (DICOM series or NIfTI, as the input)."),
    strict: bool = typer.Option(False, "--strict", help="Exit code 3 when no filter meets every band (results are still written)."),
    timezone: Optional[str] = typer.Option(
        None, "--timezone", metavar="ZONE", help="Site time zone (IANA name, e.g. Europe/Berlin) of scanner times written without a UTC offset "
        "(default: the fill record's timezone:, else its own offset)."),
) -> None:
    """Find the Gaussian post-filter that brings a reconstruction inside acceptance bands.

    Filters of 0 to --max-fwhm mm FWHM are applied to the image after reconstruction and
    every banded metric is read again with its uncertainty; the recommendation is the passing
    filter closest to the band centres. Confirm it with a real reconstruction on the scanner.
    """
    from ..harmonise import harmonise

    if not bands:  # pragma: no cover - typer requires the option
        raise InputError("harmonise needs at least one --bands NAME (phantometry bands list)")
    h = harmonise(
        [str(p) for p in inputs],
        fill=fill,
        bands=list(bands),
        out=out,
        template=template,
        series=series,
        centres=centre,
        units=units,
        acquired_at=None if acquired_at is None else parse_aware_time(acquired_at, "--acquired-at"),
        nuclide=nuclide,
        calibration_factor=calibration,
        templates_dirs=[str(d) for d in templates_dir or []],
        max_fwhm_mm=max_fwhm,
        step_mm=step,
        write_filtered=write_filtered,
        overwrite=overwrite,
        timezone=timezone,
    )
    print_harmonisation(h)
    print_written(h.written)
    files = ["harmonisation.json", "harmonisation.csv", "harmonisation.png"]
    if h.filtered_image is not None:
        files.append(h.filtered_image["path"])
    console.print(f"wrote {out}/" + ", ".join(files), markup=False)
    if strict and not h.overall.found:
        console.print(f"[bold]--strict[/bold]: no filter meets every band; exit code {EXIT_NO_FILTER}")
        raise typer.Exit(EXIT_NO_FILTER)
