"""``phantometry compare``: wiring over :func:`phantometry.compare.compare`; no analysis here."""

from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from ..ranking import harmonisation_text
from ..results import CAUTION
from . import app
from .commands import print_written

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)


def print_ranking(result, report: bool = False) -> None:
    """The ranking table, then the failed series with their errors."""
    t = Table(title=f"Reconstruction settings ranked ({result.template_title})", caption=CAUTION, caption_justify="left")
    t.add_column("rank", justify="right")
    t.add_column("#", justify="right")
    t.add_column("setting")
    t.add_column("bands")
    t.add_column("passed", justify="right")
    t.add_column("distance", justify="right")
    t.add_column("failing values")
    harmonised = result.harmonised
    if harmonised:
        t.add_column("filter (passing range)", no_wrap=True)
    outcomes = {o.job.number: o for o in result.outcomes}
    for e in result.ranking:
        if e.meets_all_bands is None:
            meets = "no bands"
        else:
            meets = "meets all" if e.meets_all_bands else "[bold]FAILS[/bold]"
        t.add_row(
            str(e.rank),
            str(e.number),
            escape(e.label),
            meets,
            f"{e.passed}/{e.checked}",
            "-" if e.distance is None else f"{e.distance:.2f}",
            escape(", ".join(e.brief[:4]) + (f" (+{len(e.brief) - 4} more)" if len(e.brief) > 4 else "")),
            *([escape(harmonisation_text(outcomes[e.number].harmonisation))] if harmonised else []),
        )
    console.print(t)
    if harmonised:
        console.print("filter: the Gaussian post-filter (mm FWHM) closest to the band centres among those meeting every band "
                      "(harmonisation.json in each series folder; confirm with a real reconstruction)", markup=False, soft_wrap=True)
        for o in result.succeeded:
            h = o.harmonisation or {}
            if h.get("error") or (h and h.get("recommended_fwhm_mm") is None):
                console.print(f"  #{o.job.number}: {escape(h.get('error') or h.get('passing_range_reason') or '')}", soft_wrap=True)
    if any(e.reasons for e in result.ranking):
        console.print("reasons in full: ranking.csv" + (" and report.html" if report else ""), markup=False)
    for o in result.failed:
        console.print(f"[bold]FAILED[/bold] #{o.job.number} {escape(o.job.where)}: {escape(o.error or '')}", soft_wrap=True)
    seen = set()
    for w in [*result.warnings, *(w for o in result.succeeded for w in o.warnings)]:
        if w not in seen:
            seen.add(w)
            console.print("[bold]WARNING[/bold]: " + escape(w), soft_wrap=True)


@app.command("compare")
def compare_cmd(
    inputs: List[Path] = typer.Argument(..., help="Folder of reconstructions (DICOM series, NIfTI files), or the series themselves."),
    template: str = typer.Option("iec-body", "--template", "-t", help="Template name or YAML file."),
    fill: Path = typer.Option(..., "--fill", "-f", help="Fill record YAML, the same for every series."),
    bands: Optional[List[str]] = typer.Option(None, "--bands", "-b", help="Acceptance band set; repeatable."),
    out: Path = typer.Option(..., "--out", "-o", help="Result folder: a new one, or earlier results with --overwrite (written atomically)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace --out when it holds earlier phantometry results (never any other folder)."),
    labels: Optional[Path] = typer.Option(None, "--labels", help="YAML or CSV file: series UID or number -> label."),
    workers: Optional[int] = typer.Option(None, "--workers", "-j", help="Worker processes (default: one per CPU)."),
    report: bool = typer.Option(False, "--report", help="Also write report.html (self-contained)."),
    templates_dir: Optional[List[Path]] = typer.Option(None, "--templates", help="Extra folder of templates."),
    harmonise: bool = typer.Option(False, "--harmonise", help="Also find each setting's harmonising Gaussian post-filter against --bands."),
    timezone: Optional[str] = typer.Option(None, "--timezone", help="Site time zone (IANA name, e.g. Europe/Berlin) of scanner times written without a UTC offset; one for all series."),
) -> None:
    """Compare reconstruction settings: measure every PET series with one fill record and rank them.

    Exit code 0 when every series was measured, 4 when some could not be (listed with their
    errors; the others are still measured and written), 2 for problems common to all.
    """
    from ..compare import compare

    with Progress(
        TextColumn("measuring"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TextColumn("{task.description}"),
        console=err_console,
        transient=True,
    ) as bar:
        task = bar.add_task("", total=None)

        def progress(done: int, total: int, outcome) -> None:
            text = ""
            if outcome is not None:
                text = f"#{outcome.job.number} {'ok' if outcome.ok else 'FAILED'}"
            bar.update(task, completed=done, total=total, description=escape(text))

        result = compare(
            [str(p) for p in inputs],
            template=template,
            fill=fill,
            bands=list(bands or []),
            out=out,
            labels=labels,
            workers=workers,
            report=report,
            templates_dirs=[str(d) for d in templates_dir or []],
            progress=progress,
            overwrite=overwrite,
            harmonise=harmonise,
            timezone=timezone,
        )
    print_ranking(result, report)
    print_written(result.written)
    files = ", ".join(["comparison.csv", "ranking.csv", "summary.json", *(name for name, _ in result.charts)] + (["report.html"] if report else []))
    console.print(f"wrote {out}/ ({files}); {len(result.succeeded)} of {len(result.outcomes)} series measured", markup=False)
    if result.exit_code:
        raise typer.Exit(result.exit_code)
