"""``phantometry bands list|show``: the acceptance band sets (thin wiring over phantometry.bands)."""

from __future__ import annotations

import json
from typing import List, Optional

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from . import APP_SETTINGS, app

console = Console(highlight=False)
bands_app = typer.Typer(no_args_is_help=True, **APP_SETTINGS, help="List and show acceptance band sets (limits per ROI and metric).")
app.add_typer(bands_app, name="bands")


@bands_app.command("list")
def bands_list(dirs: Optional[List[str]] = typer.Option(None, "--dir", metavar="DIR", help="Extra folder of band sets; repeatable.")) -> None:
    """List the band sets found (extra folders, $PHANTOMETRY_BANDS, then the built-in ones)."""
    from ..bands import list_band_sets, load_band_set_file
    from ..errors import PhantometryError

    found = list_band_sets(dirs or [])
    if not found:
        console.print("no band sets found", markup=False)
    for name, path in found.items():
        try:
            bs = load_band_set_file(path)
            desc = f"{bs.title}  [template {bs.template}, {len(bs.entries)} limits"
            desc += f", {bs.activity_ratio:g}:1]" if bs.activity_ratio else "]"
        except PhantometryError as exc:
            desc = f"(invalid: {exc})"
        console.print(f"{name:<20} {desc}  ({path})", markup=False)


@bands_app.command("show")
def bands_show(
    name: str = typer.Argument(..., help="Band set name or YAML file."),
    dirs: Optional[List[str]] = typer.Option(None, "--dir", metavar="DIR", help="Extra folder of band sets; repeatable."),
    as_json: bool = typer.Option(False, "--json", help="Print the validated band set as JSON."),
) -> None:
    """Show a band set, validated against its template: source, notes and every limit."""
    from ..bands import load_band_set
    from ..phantoms import check_band_file

    bs = load_band_set(name, dirs or [])
    check_band_file(bs)
    if as_json:
        console.print_json(json.dumps(bs.summary()))
        return
    console.print(f"[bold]{escape(bs.name)}[/bold]: {escape(bs.title)}")
    console.print(f"source: {bs.source}", markup=False)
    ratio = f"{bs.activity_ratio:g}:1" if bs.activity_ratio else "not stated"
    console.print(f"template: {bs.template}; activity ratio assumed: {ratio}; file: {bs.path}", markup=False)
    for n in bs.notes:
        console.print(f"  note: {n}", markup=False)
    def lim(v):
        if v is None:
            return "-"
        return f"{v:.2f}" if round(v, 2) == v and abs(v) < 1e4 else f"{v:.6g}"

    t = Table()
    for col in ("ROI", "metric", "kind", "low", "high", "recalled", "note"):
        t.add_column(col, justify="right" if col in ("low", "high") else "left")
    for e in bs.entries:
        t.add_row(escape(e.roi), escape(e.metric), e.kind, lim(e.low), lim(e.high),
                  "yes: verify" if e.recalled else "no", escape(e.note or ""))
    console.print(t)
