"""``phantometry compare``: wiring over :func:`phantometry.compare.compare`; no analysis here."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, List, Optional

import typer
from rich import box
from rich.console import Console
from rich.markup import escape
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from ..ranking import harmonisation_text
from ..results import CAUTION
from . import app
from .commands import print_written, strip_warning
from .numbers import number
from .progress import interactive

if TYPE_CHECKING:  # pragma: no cover
    from ..ranking import ComparisonResult

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)


def print_ranking(result, report: bool = False) -> None:
    """The ranking table (with bands) or each setting's key numbers (without), then the failed
    series with their errors and the warnings."""
    if result.ranked:
        _print_ranked(result, report)
    else:
        print_key_numbers(result)
    for o in result.failed:
        console.print(f"[bold]FAILED[/bold] #{o.job.number} {escape(o.job.where)}: {escape(o.error or '')}", soft_wrap=True)
    seen = set()
    for w in [*result.warnings, *(w for o in result.succeeded for w in o.warnings)]:
        if w not in seen:
            seen.add(w)
            console.print("[bold]WARNING[/bold]: " + escape(strip_warning(w)), soft_wrap=True)


def print_key_numbers(result) -> None:
    """Without bands: no ranking; each setting's key numbers, the settings sorted by label.

    A table per key metric that several ROIs have (columns: the ROIs), then one table of the
    metrics of a single ROI (its column headed by the metric's title and the ROI). Values are
    never cut: their columns are as wide as the widest value (a heading wraps between words)
    and the label column wraps instead.
    """
    from ..ranking import NOT_RANKED, by_label, key_metric_columns, key_numbers, row_of, short_roi_names

    settings = by_label(result.outcomes)
    console.print(f"[bold]{escape(result.template_title)}[/bold]: {len(settings)} setting(s) measured; {escape(NOT_RANKED)}.",
                  soft_wrap=True)
    if not settings:
        return
    units = {(k.roi, k.metric): k.unit for k in key_numbers(result.outcomes)}
    tables = key_metric_columns(result.outcomes)

    def cell(o, roi: str, metric: str) -> str:
        r = row_of(o, roi, metric)
        return number(r.value if r is not None else None, units.get((roi, metric)))

    for table in tables:
        if len(table.rois) > 1:
            columns = [(name, [cell(o, roi, table.metric) for o in settings])
                       for name, roi in zip(short_roi_names(table.rois), table.rois)]
            _print_settings_tables(table.title, settings, columns)
    single = [(t.rois[0], t) for t in tables if len(t.rois) == 1]
    if single:
        # an ROI the other tables show (a sphere) is named; an ROI with one metric of its own is not
        shown: dict[str, str] = {}
        for table in tables:
            if len(table.rois) > 1:
                shown.update(zip(table.rois, short_roi_names(table.rois)))
        columns = [(table.title + (f" {shown[roi]}" if roi in shown else ""), [cell(o, roi, table.metric) for o in settings])
                   for roi, table in single]
        _print_settings_tables("per setting", settings, columns)
    console.print(CAUTION, markup=False)


#: the narrowest the label column of a settings table gets (its words wrap)
LABEL_MIN_WIDTH = 16


def _column_width(heading: str, cells: list[str]) -> int:
    """As wide as the widest value or the longest word of the heading (which wraps between words)."""
    return max([len(w) for w in heading.split()] + [len(c) for c in cells])


def _print_settings_tables(title: str, settings, columns: list[tuple[str, list[str]]]) -> None:
    """Print the value columns in as many tables as it takes for each to fit the terminal: no
    value is ever cut short."""
    # a table of these settings is as wide as its columns with 3 characters between neighbours
    # (padding and rule; none at the outer edges)
    used = max(len(str(o.job.number)) for o in settings) + 3 + LABEL_MIN_WIDTH
    chunks: list[list[tuple[str, list[str]]]] = [[]]
    width = used
    for heading, cells in columns:
        need = 3 + _column_width(heading, cells)
        if chunks[-1] and width + need > console.width:
            chunks.append([])
            width = used
        chunks[-1].append((heading, cells))
        width += need
    for n, chunk in enumerate(chunks):
        console.print(_settings_table(title if n == 0 else f"{title} (continued)", settings, chunk))


def _settings_table(title: str, settings, columns: list[tuple[str, list[str]]]) -> Table:
    """A table of settings (rows: number and label) by value columns ``(heading, cells)``."""
    t = Table(title=escape(title), box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, title_justify="left")
    t.add_column("#", justify="right", no_wrap=True, min_width=max(len(str(o.job.number)) for o in settings))
    t.add_column("setting", min_width=LABEL_MIN_WIDTH, overflow="fold")
    for heading, cells in columns:
        t.add_column(escape(heading), justify="right", width=_column_width(heading, cells))
    for n, o in enumerate(settings):
        t.add_row(str(o.job.number), escape(o.label), *(cells[n] for _, cells in columns))
    return t


def _print_ranked(result, report: bool) -> None:
    """The ranking table (settings ranked against the bands)."""
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


@app.command("compare")
def compare_cmd(
    inputs: List[Path] = typer.Argument(..., metavar="INPUT", help="Folder of reconstructions (DICOM series, NIfTI files), or the series themselves."),
    template: str = typer.Option("iec-body", "--template", "-t", metavar="NAME|FILE", help="Template name or YAML file."),
    fill: Path = typer.Option(..., "--fill", "-f", metavar="FILE", help="Fill record YAML, the same for every series."),
    bands: Optional[List[str]] = typer.Option(None, "--bands", "-b", metavar="NAME|FILE", help="Acceptance band set; repeatable. Without bands the settings are listed, not ranked."),
    out: Path = typer.Option(..., "--out", "-o", metavar="DIR", help="Result folder: a new one, or earlier results with --overwrite (written atomically)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace --out when it holds earlier phantometry results (never any other folder)."),
    labels: Optional[Path] = typer.Option(None, "--labels", metavar="FILE", help="YAML or CSV file: series UID or number -> label."),
    workers: Optional[int] = typer.Option(None, "--workers", "-j", metavar="N", help="Worker processes (default: one per CPU)."),
    report: bool = typer.Option(False, "--report", help="Also write report.html (self-contained)."),
    templates_dir: Optional[List[Path]] = typer.Option(None, "--templates", metavar="DIR", help="Extra folder of templates; repeatable."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar on stderr (it appears only when stderr is a terminal)."),
    harmonise: bool = typer.Option(False, "--harmonise", help="Also find each setting's harmonising Gaussian post-filter against --bands."),
    timezone: Optional[str] = typer.Option(None, "--timezone", metavar="ZONE", help="Site time zone (IANA name, e.g. Europe/Berlin) of scanner times written without a UTC offset; one for all series."),
) -> None:
    """Compare reconstruction settings: measure every PET series with one fill record; rank them
    against acceptance bands, or without bands list each setting's key numbers by label.

    Exit code 0 when every series was measured, 4 when some could not be (listed with their
    errors; the others are still measured and written), 2 for problems common to all.
    """
    from ..compare import compare

    def run(progress) -> "ComparisonResult":
        return compare(
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

    if quiet or not interactive():
        result = run(None)
    else:
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

            result = run(progress)
    print_ranking(result, report)
    print_written(result.written)
    files = ", ".join(["comparison.csv", *(["ranking.csv"] if result.ranked else []), "key_numbers.csv", "summary.json",
                       *(name for name, _ in result.charts)] + (["report.html"] if report else []))
    console.print(f"wrote {out}/ ({files}); {len(result.succeeded)} of {len(result.outcomes)} series measured", markup=False)
    if result.exit_code:
        raise typer.Exit(result.exit_code)
