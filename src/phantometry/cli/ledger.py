"""``phantometry ledger ...``: the trend ledger commands (thin wiring over phantometry.ledger.Ledger).

Every command takes ``--db URL`` (or ``$PHANTOMETRY_DB``; default a SQLite file in the user
data directory). Times given on the command line are ISO 8601: a date (``2026-11-03``, read
as UTC; as an end bound it covers that whole day) or a date and time with an offset.

Only ``add`` and ``import`` (and ``measure --record``) create a store; the other commands
refuse one that does not exist and create nothing. Files written (``export``, ``trend
--chart``) never replace an existing file without ``--overwrite``.
"""

from __future__ import annotations

import logging
import sys
from datetime import datetime, time, timedelta, timezone
from pathlib import Path
from typing import List, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from ..errors import InputError, LedgerError, PhantometryError
from ..results import CAUTION
from ..timeutil import EXAMPLE_TIME, parse_aware_time
from . import APP_SETTINGS, app

ledger_app = typer.Typer(
    no_args_is_help=True,
    **APP_SETTINGS,
    help="Trend ledger: record analyses, list them, trend one metric with control limits, "
    "baselines, drift checks, CSV export/import. --db URL or $PHANTOMETRY_DB selects the store.",
)
app.add_typer(ledger_app, name="ledger")



class _Console:
    """Rich output at the terminal's width, or 200 columns when piped (no folded tables in files)."""

    def print(self, *args, **kwargs) -> None:
        Console(highlight=False, width=None if sys.stdout.isatty() else 200).print(*args, **kwargs)


console = _Console()

DB_HELP = "Ledger database: SQLAlchemy URL (sqlite:///..., postgresql+psycopg://...) or a file path. Default: $PHANTOMETRY_DB, else ledger.sqlite3 in the user data folder."


def _db_option():
    return typer.Option(None, "--db", envvar="PHANTOMETRY_DB", help=DB_HELP, show_envvar=True)


def parse_cli_time(text: Optional[str], option: str, *, end_of_day: bool = False) -> Optional[datetime]:
    """An aware datetime from ``YYYY-MM-DD`` (UTC) or ISO 8601 with an offset; None passes."""
    if text is None:
        return None
    text = text.strip()
    if len(text) == 10:
        try:
            d = datetime.fromisoformat(text).date()
        except ValueError:
            raise InputError(f"{option} {text!r}: expected a date 2026-11-03 or a time {EXAMPLE_TIME}") from None
        t = datetime.combine(d, time(0, 0), tzinfo=timezone.utc)
        return t + timedelta(days=1) - timedelta(microseconds=1) if end_of_day else t
    try:
        return parse_aware_time(text, option)
    except InputError as exc:
        raise InputError(f"{exc} (or just a date such as 2026-11-03, read as UTC)") from None


def quiet_driver_logs() -> None:
    """Keep database drivers' log records off stderr (their errors reach us as exceptions).

    psycopg logs a warning ("error ignored terminating <psycopg.Pipeline ...>") when a
    statement in pipeline mode fails and is then handled; without a handler Python's
    last-resort handler would print it. A NullHandler on the driver's logger stops that; an
    application that configures logging still receives the records.
    """
    for name in ("psycopg", "psycopg.pool"):
        logger = logging.getLogger(name)
        if not any(isinstance(h, logging.NullHandler) for h in logger.handlers):
            logger.addHandler(logging.NullHandler())


def _open(db: Optional[str], *, create: bool = False):
    """The ledger; ``create`` only for commands that record (add, import, measure --record)."""
    from ..ledger import Ledger

    quiet_driver_logs()
    return Ledger(db, create=create)


def _when(t: Optional[datetime]) -> str:
    return t.astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M") if t else "-"


def _num(v, nd: int = 4) -> str:
    if v is None:
        return "-"
    return f"{float(v):.{nd}g}"


def _pick_scanner(ledger, scanner: Optional[str], site: Optional[str]) -> str:
    if scanner:
        return scanner
    known = [s for s in ledger.scanners() if site is None or s.site == site]
    if len(known) == 1:
        return known[0].name
    names = ", ".join(sorted({s.name for s in known})) or "(none recorded yet)"
    raise LedgerError(f"ledger {ledger.display_url}: give --scanner; scanners: {names}")


def record_request(db: Optional[str], *, site: Optional[str], scanner: Optional[str], protocol: Optional[str],
                   replace: bool):
    """The ``record=`` argument of :func:`phantometry.measure.measure` for ``measure --record``."""
    from ..ledger.measure_record import RecordRequest

    quiet_driver_logs()
    return RecordRequest(db, site=site, scanner=scanner, protocol=protocol, replace=replace)


def print_recorded(request) -> None:
    """The line ``measure --record`` prints once the analysis is recorded."""
    rec = request.result
    if rec is None:
        return
    console.print(
        f"{'replaced' if rec.replaced else 'recorded'} analysis #{rec.analysis_id} ({rec.site} / {rec.scanner} / "
        f"{rec.protocol}, {rec.n_measurements} measurements) in {request.display_url}",
        markup=False,
    )


@ledger_app.command("add")
def add_cmd(
    paths: List[Path] = typer.Argument(..., help="Result folder(s) of phantometry measure, or their measurements.json."),
    site: Optional[str] = typer.Option(None, "--site", help="Site label (default: the fill record's site)."),
    scanner: Optional[str] = typer.Option(None, "--scanner", help="Scanner label (default: station name from the headers)."),
    protocol: Optional[str] = typer.Option(None, "--protocol", help="Protocol label (default: the reconstruction settings)."),
    replace: bool = typer.Option(False, "--replace", help="Replace an analysis of the same series + template + settings."),
    db: Optional[str] = _db_option(),
) -> None:
    """Record analyses from result folders into the ledger.

    Every folder is tried: each one refused (duplicate, unreadable) is reported on its own
    error line, the others are recorded, and the exit code is 2 if any was refused.
    """
    from ..ledger.inputs import read_result_document

    refused = 0

    def refuse(exc: PhantometryError) -> None:
        nonlocal refused
        refused += 1
        print(f"phantometry: error: {' '.join(str(exc).split())}", file=sys.stderr, flush=True)

    docs = []
    for p in paths:  # read every file first: a store is created only when something can be recorded
        try:
            docs.append((p, *read_result_document(p)))
        except PhantometryError as exc:
            refuse(exc)
    if docs:
        with _open(db, create=True) as ledger:
            for p, doc, where in docs:
                try:
                    rec = ledger.record_document(doc, site=site, scanner=scanner, protocol=protocol, replace=replace, where=where)
                except PhantometryError as exc:
                    refuse(exc)
                    continue
                console.print(
                    f"{'replaced' if rec.replaced else 'recorded'} analysis #{rec.analysis_id} from {p} "
                    f"({rec.site} / {rec.scanner} / {rec.protocol}, {rec.n_measurements} measurements)",
                    markup=False,
                )
    if refused:
        raise typer.Exit(2)


@ledger_app.command("list")
def list_cmd(
    site: Optional[str] = typer.Option(None, "--site"),
    scanner: Optional[str] = typer.Option(None, "--scanner"),
    protocol: Optional[str] = typer.Option(None, "--protocol"),
    template: Optional[str] = typer.Option(None, "--template"),
    since: Optional[str] = typer.Option(None, "--since", help="Acquired on or after (date or ISO time)."),
    until: Optional[str] = typer.Option(None, "--until", help="Acquired on or before (a date covers the whole day)."),
    verdict: Optional[str] = typer.Option(None, "--verdict", help="fail, pass, n/a or none (worst verdict of the analysis)."),
    limit: Optional[int] = typer.Option(None, "--limit", help="Only the most recent N."),
    db: Optional[str] = _db_option(),
) -> None:
    """List recorded analyses (acquisition order), filtered."""
    with _open(db) as ledger:
        rows = ledger.analyses(
            site=site, scanner=scanner, protocol=protocol, template=template,
            since=parse_cli_time(since, "--since"), until=parse_cli_time(until, "--until", end_of_day=True),
            verdict=verdict, limit=limit,
        )
        t = Table(title=f"{len(rows)} analyses in {escape(ledger.display_url)}")
        for col in ("id", "acquired (UTC)", "site", "scanner", "protocol", "template", "verdict", "series UID", "recorded (UTC)"):
            t.add_column(col, overflow="fold")
        for a in rows:
            uid = a.series_uid or "-"
            t.add_row(str(a.id), _when(a.acquired_at), escape(a.site), escape(a.scanner), escape(a.protocol), escape(a.template),
                      a.verdict or "-", escape(uid if len(uid) <= 24 else "..." + uid[-21:]), _when(a.recorded_at))
        console.print(t)


@ledger_app.command("trend")
def trend_cmd(
    roi: str = typer.Argument(..., help="ROI, e.g. sphere_10mm."),
    metric: str = typer.Argument(..., help="Metric, e.g. rc_max."),
    scanner: Optional[str] = typer.Option(None, "--scanner", help="Scanner label (may be left out when there is one)."),
    protocol: Optional[str] = typer.Option(None, "--protocol", help="Protocol label (may be left out when the scanner has one)."),
    site: Optional[str] = typer.Option(None, "--site"),
    since: Optional[str] = typer.Option(None, "--since"),
    until: Optional[str] = typer.Option(None, "--until"),
    chart: Optional[Path] = typer.Option(None, "--chart", help="Write the control chart PNG here."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing --chart file."),
    db: Optional[str] = _db_option(),
) -> None:
    """Trend one metric of one ROI for one scanner and protocol: table, control limits, drift flags, chart."""
    from ..ledger.chart import save_trend_chart
    from ..ledger.outfiles import check_output_file

    if chart is not None:
        check_output_file(chart, overwrite, "ledger trend --chart")
    elif overwrite:
        raise InputError("--overwrite applies to --chart FILE; add --chart")
    with _open(db) as ledger:
        tr = ledger.trend(
            _pick_scanner(ledger, scanner, site), protocol, roi, metric, site=site,
            since=parse_cli_time(since, "--since"), until=parse_cli_time(until, "--until", end_of_day=True),
        )
    lim = tr.limits
    caption = CAUTION
    title = f"{tr.scanner} ({tr.site}) / {tr.protocol}: {tr.roi} {tr.metric} [{tr.unit}]"
    t = Table(title=escape(title), caption=caption, caption_justify="left")
    for col, just in (("id", "right"), ("acquired (UTC)", "left"), ("value", "right"), ("uncert.", "right"),
                      ("band", "left"), ("verdict", "left"), ("baseline", "left"), ("flags", "left")):
        t.add_column(col, justify=just, overflow="fold")
    for p in tr.points:
        band = "-" if p.band_low is None and p.band_high is None else f"{_num(p.band_low)}..{_num(p.band_high)}"
        flags = "; ".join(f.description for f in tr.flags_at(p.analysis_id))
        t.add_row(str(p.analysis_id), _when(p.acquired_at), _num(p.value, 5), _num(p.uncertainty, 3), band, p.verdict or "-",
                  "yes" if p.in_baseline else "", escape(flags))
    console.print(t)
    if lim is not None:
        console.print(
            f"limits from {lim.source}: mean {_num(lim.mean, 5)}, sigma {_num(lim.sigma, 3)} (n = {lim.n}); "
            f"warning {_num(lim.warning_low, 5)}..{_num(lim.warning_high, 5)}, action {_num(lim.action_low, 5)}..{_num(lim.action_high, 5)}",
            markup=False,
        )
    for note in tr.notes:
        console.print(f"note: {note}", markup=False)
    console.print(f"{len(tr.flags)} drift flag(s)" if tr.flags else "no drift flags", markup=False)
    if chart is not None:
        console.print(f"wrote {save_trend_chart(tr, chart, overwrite=overwrite)}", markup=False)


@ledger_app.command("baseline")
def baseline_cmd(
    scanner: Optional[str] = typer.Option(None, "--scanner"),
    protocol: Optional[str] = typer.Option(None, "--protocol"),
    site: Optional[str] = typer.Option(None, "--site"),
    ids: Optional[str] = typer.Option(None, "--ids", help="Analysis ids, comma-separated (see ledger list)."),
    date_from: Optional[str] = typer.Option(None, "--from", help="First acquisition date/time of the baseline."),
    date_to: Optional[str] = typer.Option(None, "--to", help="Last acquisition date/time (a date covers the whole day)."),
    note: Optional[str] = typer.Option(None, "--note", help="Why this baseline (e.g. after acceptance testing)."),
    db: Optional[str] = _db_option(),
) -> None:
    """Set the baseline (analyses or a date range) that control limits come from; without a selection, show it."""
    id_list = None
    if ids is not None:
        try:
            id_list = [int(v) for v in ids.replace(" ", "").split(",") if v]
        except ValueError:
            raise InputError(f"--ids {ids!r}: expected comma-separated analysis ids, e.g. 3,4,5") from None
    with _open(db) as ledger:
        name = _pick_scanner(ledger, scanner, site)
        if id_list is None and date_from is None and date_to is None:
            b = ledger.baseline(name, protocol, site=site)
            if b is None:
                console.print(f"no baseline set for {name}; set one with --ids or --from/--to", markup=False)
                return
        else:
            b = ledger.set_baseline(
                name, protocol, analysis_ids=id_list, site=site, note=note,
                since=parse_cli_time(date_from, "--from"), until=parse_cli_time(date_to, "--to", end_of_day=True),
            )
    console.print(
        f"baseline #{b.id} of {b.scanner} ({b.site}) / {b.protocol}: {len(b.analysis_ids)} analyses acquired "
        f"{_when(b.first_acquired_at)} .. {_when(b.last_acquired_at)} UTC (set {_when(b.created_at)})"
        + (f"; note: {b.note}" if b.note else ""),
        markup=False,
    )


@ledger_app.command("check")
def check_cmd(
    site: Optional[str] = typer.Option(None, "--site"),
    scanner: Optional[str] = typer.Option(None, "--scanner"),
    protocol: Optional[str] = typer.Option(None, "--protocol"),
    since: Optional[str] = typer.Option(None, "--since", help="Report only flags at points acquired since then."),
    all_metrics: bool = typer.Option(False, "--all-metrics", help="Also check positions (mm) and absolute concentrations (Bq/mL)."),
    strict: bool = typer.Option(False, "--strict", help="Exit code 1 when any flag is found (scripted QC)."),
    db: Optional[str] = _db_option(),
) -> None:
    """Run the drift rules on every metric of every scanner and protocol."""
    with _open(db) as ledger:
        results = ledger.check(site=site, scanner=scanner, protocol=protocol, since=parse_cli_time(since, "--since"), all_metrics=all_metrics)
    flagged = [r for r in results if r.flags]
    if flagged:
        t = Table(title="drift flags", caption=CAUTION, caption_justify="left")
        for col in ("scanner", "protocol", "roi", "metric", "acquired (UTC)", "value", "rule"):
            t.add_column(col, overflow="fold")
        for r in flagged:
            for f in r.flags:
                t.add_row(escape(f"{r.scanner} ({r.site})"), escape(r.protocol), r.roi, r.metric, _when(f.acquired_at), _num(f.value, 5), escape(f.description))
        console.print(t)
    n_flags = sum(len(r.flags) for r in flagged)
    console.print(f"{n_flags} drift flag(s) in {len(flagged)} of {len(results)} metric series checked", markup=False)
    if strict and n_flags:
        raise typer.Exit(1)


@ledger_app.command("export")
def export_cmd(
    out: Path = typer.Argument(..., help="CSV file to write (long format, one row per measurement)."),
    since: Optional[str] = typer.Option(None, "--since", help="Only analyses recorded since then (incremental export)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Replace an existing FILE."),
    db: Optional[str] = _db_option(),
) -> None:
    """Export measurements as CSV for a lab database (stable columns; spreadsheet-safe text; see the README)."""
    from ..ledger.outfiles import check_output_file

    check_output_file(out, overwrite, "ledger export")
    since_t = parse_cli_time(since, "--since")
    with _open(db) as ledger:
        rep = ledger.export_csv(out, since=since_t, overwrite=overwrite)
    console.print(f"wrote {rep.rows} rows of {rep.analyses} analyses to {rep.path}; next incremental export: --since {rep.started_at.isoformat()}", markup=False)


@ledger_app.command("import")
def import_cmd(
    path: Path = typer.Argument(..., help="CSV written by phantometry ledger export."),
    replace: bool = typer.Option(False, "--replace", help="Replace analyses of the same series + template + settings."),
    db: Optional[str] = _db_option(),
) -> None:
    """Import a ledger CSV (analyses already present are skipped; baselines are kept)."""
    from ..ledger.csvio import read_ledger_csv

    parsed = read_ledger_csv(path)  # a bad file is refused before any store is opened or created
    with _open(db, create=True) as ledger:
        rep = ledger.import_csv(parsed, replace=replace)
    console.print(
        f"imported {rep.added} analyses ({rep.rows} rows read), replaced {rep.replaced}, skipped {rep.skipped} already present"
        + (f", created {rep.baselines} baseline(s)" if rep.baselines else ""),
        markup=False,
    )


@ledger_app.command("info")
def info_cmd(db: Optional[str] = _db_option()) -> None:
    """Show the store (URL without password), its schema revision and counts."""
    with _open(db) as ledger:
        info = ledger.info()
        scanners = ledger.scanners()
    for k, v in info.items():
        console.print(f"{k:<13} {v}", markup=False)
    for s in scanners:
        protos = "; ".join(f"{p} ({n})" for p, n in s.protocols.items()) or "no analyses"
        console.print(f"scanner       {s.name} ({s.site}): {protos}", markup=False)


@ledger_app.command("remove")
def remove_cmd(analysis_id: int = typer.Argument(..., help="Analysis id (see ledger list)."), db: Optional[str] = _db_option()) -> None:
    """Remove one analysis and its measurements."""
    with _open(db) as ledger:
        if not ledger.remove(analysis_id):
            raise LedgerError(f"ledger {ledger.display_url}: no analysis #{analysis_id}; see phantometry ledger list")
    console.print(f"removed analysis #{analysis_id}", markup=False)
