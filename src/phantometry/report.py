"""``report.html``: one self-contained page per measurement or comparison.

Everything the page needs is inside the file: the style sheet is inline, pictures are PNGs
embedded as ``data:`` URIs (RFC 2397), there is no script and no external font, so the file can
be mailed, archived with the QC record or printed as it is.

Visual language: black text on white, rules instead of boxes, tabular figures right-aligned.
Colour is used only where it carries meaning, the verdict: a passing value on a pale green
ground with a tick and the word "pass", a failing one on a pale red ground, bold, with a cross
and "FAIL"; so the verdict also reads in greyscale print and for colour-blind readers. Every
value is shown with its standard uncertainty where one was estimated. The caution that the
results support, and do not replace, a qualified medical physicist heads every report.
"""

from __future__ import annotations

import base64
import html
import math
import os
import tempfile
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Sequence

from . import __version__
from .ranking import NOT_RANKED, KeyMetricColumns, by_label, key_metric_columns, short_roi_names
from .results import CAUTION, Measurement

if TYPE_CHECKING:  # pragma: no cover
    from .phantoms.base import Analysis, ResultGrid
    from .ranking import ComparisonResult

_CSS = """
:root { --ink: #161616; --muted: #555; --rule: #b8b8b8; --faint: #f3f3f3;
        --pass-bg: #dff0e1; --pass-ink: #145a1e; --fail-bg: #fbdde0; --fail-ink: #9b0019; }
* { box-sizing: border-box; }
html { background: #fff; }
body { font: 14px/1.45 "DejaVu Sans", "Segoe UI", Roboto, Helvetica, Arial, sans-serif; color: var(--ink);
       max-width: 1120px; margin: 1.5rem auto 3rem; padding: 0 1.25rem; }
header { border-bottom: 3px solid var(--ink); margin-bottom: 1rem; padding-bottom: .4rem; }
h1 { font-size: 1.55rem; margin: 0 0 .15rem; letter-spacing: .01em; }
h2 { font-size: 1.12rem; margin: 1.6rem 0 .5rem; padding-bottom: .15rem; border-bottom: 1px solid var(--ink); }
h3 { font-size: 1rem; margin: 1.1rem 0 .35rem; }
.meta { color: var(--muted); margin: 0; font-size: .9rem; }
.caution { border-left: 6px solid var(--ink); background: var(--faint); padding: .55rem .85rem; margin: 1rem 0; }
.summary { display: grid; grid-template-columns: repeat(auto-fit, minmax(320px, 1fr)); gap: .2rem 2rem; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1rem; margin: 0; }
dt { color: var(--muted); }
dd { margin: 0; overflow-wrap: anywhere; }
table { border-collapse: collapse; width: 100%; margin: .3rem 0 .8rem; font-variant-numeric: tabular-nums; }
caption { text-align: left; color: var(--muted); font-size: .88rem; padding-bottom: .25rem; }
th, td { border-bottom: 1px solid var(--rule); padding: .22rem .5rem; text-align: left; vertical-align: top; }
thead th { border-bottom: 2px solid var(--ink); font-weight: 600; white-space: nowrap; }
td.num, th.num { text-align: right; white-space: nowrap; }
td.v-pass { background: var(--pass-bg); color: var(--pass-ink); }
td.v-fail { background: var(--fail-bg); color: var(--fail-ink); font-weight: 700; }
td.v-na { color: var(--muted); }
.verdict-line { font-size: 1.05rem; margin: .4rem 0; }
.tag { display: inline-block; padding: 0 .4rem; border: 1px solid currentColor; border-radius: 2px; }
.tag.pass { background: var(--pass-bg); color: var(--pass-ink); }
.tag.fail { background: var(--fail-bg); color: var(--fail-ink); font-weight: 700; }
figure { margin: .5rem 0 1rem; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .86rem; margin-top: .25rem; }
ul.warnings li { margin-bottom: .2rem; }
.series-block { border-top: 1px solid var(--rule); padding-top: .4rem; margin-top: 1rem; }
footer { margin-top: 2.5rem; border-top: 1px solid var(--ink); padding-top: .4rem; color: var(--muted); font-size: .85rem; }
@media print {
  body { max-width: none; margin: 0; padding: 0; font-size: 10pt; }
  h2 { break-after: avoid; }
  figure, tr, .caution { break-inside: avoid; }
  td.v-pass, td.v-fail, .tag { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  .series-block { break-before: page; }
}
"""

_VERDICT = {
    "pass": ("v-pass", "&#10003; pass"),
    "fail": ("v-fail", "&#10007; FAIL"),
    "n/a": ("v-na", "&ndash; n/a"),
}


# ============================================================================== small helpers
def esc(value: Any) -> str:
    """HTML-escaped text of any value ("" for None)."""
    return "" if value is None else html.escape(str(value), quote=True)


def png_data_uri(data: bytes) -> str:
    """A ``data:image/png;base64,...`` URI (RFC 2397) of PNG bytes."""
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _finite(v: Any) -> bool:
    return isinstance(v, (int, float)) and math.isfinite(v)


def _decimals(unit: str | None, value: float | None = None) -> int:
    if unit == "1":
        return 3
    if unit == "Bq/mL":
        return 0
    if unit == "%":
        return 2
    if unit == "mm":
        return 2
    return 3


def format_value(value: float | None, unit: str | None = None, uncertainty: float | None = None) -> str:
    """``0.812 ± 0.014`` (or ``–`` for a missing value), digits by unit."""
    if not _finite(value):
        return "&ndash;"
    nd = _decimals(unit, value)
    text = f"{value:.{nd}f}"
    if _finite(uncertainty):
        text += f" &plusmn; {uncertainty:.{nd}f}"
    return text


def verdict_cell(verdict: str | None) -> str:
    """A table cell for a verdict: class for colour, symbol and word for greyscale."""
    if verdict in _VERDICT:
        cls, text = _VERDICT[verdict]
        return f'<td class="{cls}">{text}</td>'
    return '<td class="v-na"></td>'


def _worst(verdicts: Iterable[str | None]) -> str | None:
    vs = [v for v in verdicts if v]
    if "fail" in vs:
        return "fail"
    if "pass" in vs:
        return "pass"
    if "n/a" in vs:
        return "n/a"
    return None


def _dl(items: Sequence[tuple[str, Any]]) -> str:
    rows = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in items if v not in (None, ""))
    return f"<dl>{rows}</dl>"


def _figure(png: bytes | None, alt: str, caption: str) -> str:
    if not png:
        return ""
    return (f'<figure><img src="{png_data_uri(png)}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def _page(title: str, subtitle: str, body: str) -> str:
    generated = datetime.now(timezone.utc).replace(microsecond=0).isoformat()
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<meta name=\"generator\" content=\"phantometry {esc(__version__)}\">"
        f"<title>{esc(title)}</title><style>{_CSS}</style></head><body>"
        f"<header><h1>{esc(title)}</h1><p class=\"meta\">{esc(subtitle)}</p>"
        f"<p class=\"meta\">phantometry {esc(__version__)} &middot; generated {esc(generated)}</p></header>"
        f"<aside class=\"caution\" id=\"caution\"><strong>Caution.</strong> {esc(CAUTION)}</aside>"
        f"{body}"
        f"<footer>phantometry {esc(__version__)}. {esc(CAUTION)}</footer>"
        "</body></html>\n"
    )


def _verdict_summary(rows: Sequence[Measurement]) -> str:
    counts = {v: sum(1 for r in rows if r.verdict == v) for v in ("pass", "fail", "n/a")}
    if not any(counts.values()):
        return '<p class="verdict-line">No acceptance bands were applied: values without verdicts.</p>'
    overall = ('<span class="tag fail">&#10007; FAIL</span>' if counts["fail"]
               else '<span class="tag pass">&#10003; all banded values pass</span>')
    return (f'<p class="verdict-line" id="overall-verdict">{overall} &nbsp; {counts["pass"]} pass, '
            f'{counts["fail"]} fail, {counts["n/a"]} not applicable.</p>')


def _measurements_table(rows: Sequence[Measurement], table_id: str = "measurements") -> str:
    head = ("<thead><tr><th>ROI</th><th>metric</th><th class=\"num\">value &plusmn; u</th><th class=\"num\">u (fill)</th><th>unit</th>"
            "<th>band</th><th class=\"num\">limits</th><th>verdict</th><th>note</th></tr></thead>")
    body = []
    for r in rows:
        limits = ""
        if _finite(r.band_low) or _finite(r.band_high):
            nd = _decimals(r.unit)
            lo = f"{r.band_low:.{nd}f}" if _finite(r.band_low) else "&minus;&infin;"
            hi = f"{r.band_high:.{nd}f}" if _finite(r.band_high) else "&infin;"
            limits = f"{lo} &ndash; {hi}"
        body.append(
            f"<tr><td>{esc(r.roi)}</td><td>{esc(r.metric)}</td><td class=\"num\">{format_value(r.value, r.unit, r.uncertainty)}</td>"
            f"<td class=\"num\">{_fill_u(r)}</td><td>{esc(r.unit)}</td><td>{esc(r.band)}</td><td class=\"num\">{limits}</td>{verdict_cell(r.verdict)}<td>{esc(r.note)}</td></tr>"
        )
    return f'<table id="{esc(table_id)}"><caption>Every (ROI, metric) row, as in measurements.csv; u is the standard uncertainty from the image, u (fill) the one from the fill record\'s stated uncertainties (verdicts are on the value).</caption>{head}<tbody>{"".join(body)}</tbody></table>'


def _fill_u(row: Measurement) -> str:
    """The row's standard uncertainty from the fill record, formatted like its value ('' if none)."""
    u = getattr(row, "uncertainty_fill", None)
    if not _finite(u):
        return ""
    return f"{u:.{_decimals(row.unit, u)}f}"


def _protocol_table(checks: Sequence[Any]) -> str:
    """The protocol checks (:mod:`phantometry.protocol`) as a table; '' when there are none."""
    if not checks:
        return ""
    body = "".join(
        f'<tr><td>{esc(c.check)}</td><td class="{"v-fail" if c.status == "warning" else ""}">{esc(c.status)}</td>'
        f"<td>{esc(c.message)}</td><td>{esc(c.source)}</td></tr>"
        for c in checks
    )
    return ('<section id="protocol"><h2>Protocol checks</h2><table id="protocol-checks"><caption>Acquisition conditions against '
            "the standard or band set (information and warnings, never errors).</caption><thead><tr><th>check</th><th>status</th>"
            f"<th>what</th><th>recommended by</th></tr></thead><tbody>{body}</tbody></table></section>")


def _grid_table(rows: Sequence[Measurement], grid: "ResultGrid") -> str:
    """A :class:`~phantometry.phantoms.base.ResultGrid` as an HTML table (value &plusmn; u, verdict marks)."""
    by: dict[tuple[str, str], list[Measurement]] = {}
    for r in rows:
        by.setdefault((r.roi, r.metric), []).append(r)
    head = ("<thead><tr><th>ROI</th>" + "".join(f"<th>{esc(t)}</th>" for t in grid.descriptor_titles)
            + "".join(f"<th class=\"num\">{esc(t)}</th>" for _, t in grid.metrics) + "<th>verdict</th></tr></thead>")
    body = []
    for roi, descriptors in grid.rois:
        cells = []
        verdicts = []
        for metric, _ in grid.metrics:
            rs = by.get((roi, metric), [])
            if not rs:
                cells.append('<td class="num">&ndash;</td>')
                continue
            v = _worst(r.verdict for r in rs)
            verdicts.append(v)
            mark = " &#10007;" if v == "fail" else ""
            cls = ' v-fail' if v == "fail" else ""
            fill_u = f' <span class="fill-u">(fill &plusmn; {_fill_u(rs[0])})</span>' if _finite(rs[0].uncertainty_fill) else ""
            cells.append(f'<td class="num{cls}">{format_value(rs[0].value, rs[0].unit, rs[0].uncertainty)}{fill_u}{mark}</td>')
        body.append(f"<tr><td>{esc(roi)}</td>" + "".join(f"<td>{esc(d)}</td>" for d in descriptors)
                    + f"{''.join(cells)}{verdict_cell(_worst(verdicts))}</tr>")
    return f'<table id="{esc(grid.table_id)}"><caption>{grid.caption}</caption>{head}<tbody>{"".join(body)}</tbody></table>'


#: Captions of the kinds' extra pictures in the report (by file name).
_PICTURE_CAPTIONS = {
    "recovery_curve.png": "Measured recovery coefficients with the fitted blurred-sphere model at the effective FWHM; bars: standard uncertainty.",
}


def _png_of(draw) -> bytes:
    """Run ``draw(path)`` into a temporary PNG file and return its bytes."""
    fd, name = tempfile.mkstemp(suffix=".png", prefix="phantometry-report-")
    os.close(fd)
    try:
        draw(Path(name))
        return Path(name).read_bytes()
    finally:
        os.unlink(name)


def _read(path: Path) -> bytes | None:
    return path.read_bytes() if path.is_file() else None


# ============================================================================== measure report
def measure_report_html(analysis: "Analysis", *, folder: str | os.PathLike | None = None) -> str:
    """The report of one measurement as an HTML string.

    Parameters
    ----------
    analysis : Analysis
        From :func:`phantometry.measure.measure_volume` (bands applied if any), of any kind.
    folder : path, optional
        The result folder; its ``overlay.png`` and the kind's other pictures are embedded
        from it, otherwise they are drawn here.
    """
    from .figures import overlay_picture

    vol = analysis.volume
    tpl = analysis.template
    fill = analysis.fill
    rows = analysis.rows
    folder = Path(folder) if folder is not None else None
    overlay = _read(folder / "overlay.png") if folder else None
    if overlay is None:
        overlay = _png_of(lambda p: overlay_picture(analysis.overlay(), p))
    extra = []
    for name, draw in analysis.pictures().items():
        png = _read(folder / name) if folder else None
        extra.append((name, png if png is not None else _png_of(draw)))
    rec = vol.reconstruction
    scanner = " ".join(x for x in (vol.scanner.manufacturer, vol.scanner.model) if x)
    series_items = [
        ("description", vol.series_description),
        ("series UID", vol.series_uid),
        ("series number", vol.series_number),
        ("scanner", scanner or None),
        ("station", vol.scanner.station),
        ("reconstruction", rec.label()),
        ("reference time", vol.acquired_at.isoformat() if vol.acquired_at else None),
        ("scan start", vol.scan_start.isoformat() if getattr(vol, "scan_start", None) else None),
        ("time basis", (f"{vol.time_basis}, {vol.time_zone}" if vol.time_zone else vol.time_basis) if getattr(vol, "time_basis", None) else None),
        ("decay reference", getattr(vol, "decay_reference", None)),
        ("frame duration", f"{vol.frame_duration_s / 60:.3g} min" if getattr(vol, "frame_duration_s", None) else None),
        ("nuclide", vol.nuclide),
        ("source units", vol.original_units),
        ("matrix (z, y, x)", " x ".join(str(n) for n in vol.shape)),
        ("voxel (z, y, x) mm", " x ".join(f"{s:.3g}" for s in vol.spacing_mm)),
        ("source", vol.source),
    ]
    true_bg = analysis.true_background_bq_ml
    hot_ratios = sorted({round(c / true_bg, 3) for c in analysis.true_insert_bq_ml.values() if _finite(true_bg) and true_bg > 0 and c > true_bg})
    ratio = ", ".join(f"{r:g} : 1" for r in hot_ratios) or None
    fill_items = [
        ("fill record", fill.source),
        ("nuclide", fill.nuclide.name),
        ("background at scan time", f"{analysis.true_background_bq_ml / 1000:.3f} kBq/mL" if _finite(getattr(analysis, "true_background_bq_ml", None)) else None),
        ("hot inserts : background", ratio),
        ("cold inserts", ", ".join(fill.cold) if fill.cold else "none"),
        ("true background uncertainty", f"{100 * analysis.fill_uncertainty.background_rel:.2g} % (k = 1, from the fill record)"
         if getattr(analysis, "fill_uncertainty", None) is not None else None),
        ("site", getattr(fill, "site", None)),
        ("phantom", getattr(fill, "phantom", None)),
        ("note", getattr(fill, "operator_note", None)),
    ]
    pl = analysis.placement.as_dict()
    loc_items = [
        ("axis tilt", f"{pl['axis_tilt_deg']:.2f} deg"),
        ("ring match score", pl.get("ring_score")),
        ("translation (mm)", ", ".join(f"{v:.1f}" for v in pl["translation_mm"])),
    ]
    fits = "".join(
        f"<tr><td>{esc(n)}</td><td class=\"num\">{format_value(f.get('residual_mm'), 'mm')}</td>"
        f"<td class=\"num\">{format_value(f.get('signal_to_noise'), '%')}</td><td>{esc(f.get('source'))}</td></tr>"
        for n, f in pl["inserts"].items()
    )
    fit_table = ('<table id="fits"><caption>Insert fit: distance of each refined centre from the rigid fit.</caption>'
                 "<thead><tr><th>insert</th><th class=\"num\">residual (mm)</th><th class=\"num\">signal / noise</th><th>source</th></tr></thead>"
                 f"<tbody>{fits}</tbody></table>") if fits else ""
    warn = "".join(f"<li>{esc(w)}</li>" for w in analysis.warnings)
    body = (
        '<section id="verdict"><h2>Verdict</h2>' + _verdict_summary(rows) + "</section>"
        '<section id="summary" class="summary">'
        f'<div><h2>Series</h2>{_dl(series_items)}</div><div><h2>Fill record</h2>{_dl(fill_items)}</div></section>'
        f'<section id="placement"><h2>ROI placement</h2>{_dl(loc_items)}'
        + _figure(overlay, "ROI overlay", "Every ROI where it was measured, on the image planes named above each view; the key and "
                    "the lines under the picture say what each outline is.")
        + fit_table + "</section>"
        '<section id="results"><h2>Results</h2>' + "".join(_grid_table(rows, g) for g in analysis.result_grids())
        + "".join(_figure(png, name, analysis.picture_captions().get(name) or _PICTURE_CAPTIONS.get(name, name)) for name, png in extra)
        + f"<h2>All measurements</h2>{_measurements_table(rows)}</section>"
        + _protocol_table(getattr(analysis, "protocol_checks", []))
        + (f'<section id="warnings"><h2>Warnings</h2><ul class="warnings">{warn}</ul></section>' if warn else "")
    )
    title = "Phantom image-quality report"
    from .phantoms.base import series_name

    subtitle = f"{tpl.title} | {series_name(vol)} | {rec.label()}"
    return _page(title, subtitle, body)


def write_measure_report(analysis: "Analysis", path: str | os.PathLike, *, folder: str | os.PathLike | None = None) -> Path:
    """Write :func:`measure_report_html` to ``path`` (UTF-8)."""
    out = Path(path)
    out.write_text(measure_report_html(analysis, folder=folder), encoding="utf-8")
    return out


# ============================================================================== compare report
def _value_cell(rows: Sequence[Measurement], metric: str) -> str:
    """One table cell: the value of an ROI's metric with its uncertainty, ticked or crossed
    against its band when it has one; a dash when the setting has no such value."""
    if not rows:
        return f'<td class="num" data-metric="{esc(metric)}">&ndash;</td>'
    v = _worst(r.verdict for r in rows)
    mark = " &#10007;" if v == "fail" else (" &#10003;" if v == "pass" else "")
    cls = " v-fail" if v == "fail" else (" v-pass" if v == "pass" else "")
    r = rows[0]
    return f'<td class="num{cls}" data-metric="{esc(metric)}">{format_value(r.value, r.unit, r.uncertainty)}{mark}</td>'


def _rows_by(outcome, metric: str) -> dict[str, list[Measurement]]:
    by: dict[str, list[Measurement]] = {}
    for r in outcome.rows:
        if r.metric == metric:
            by.setdefault(r.roi, []).append(r)
    return by


def _listed_settings(result: "ComparisonResult") -> list:
    """The settings as the value tables list them: by number when ranked (the ranking is
    above), by label when not."""
    return result.succeeded if result.ranked else by_label(result.outcomes)


def _caption(result: "ComparisonResult", columns: str) -> str:
    if result.ranked:
        return f"Rows: settings; columns: {columns}; &#10003; inside / &#10007; outside the band."
    return f"Rows: settings, by label; columns: {columns}; values &plusmn; standard uncertainty."


def _settings_matrix(result: "ComparisonResult", table: KeyMetricColumns) -> str:
    """Values of one key metric: one row per measured setting, one column per ROI that has it."""
    metric, rois = table.metric, table.rois
    head = "<thead><tr><th class=\"num\">#</th><th>setting</th>" + "".join(
        f"<th class=\"num\">{esc(name)}</th>" for name in short_roi_names(rois)) + "</tr></thead>"
    body = []
    for o in _listed_settings(result):
        by = _rows_by(o, metric)
        cells = "".join(_value_cell(by.get(roi, []), metric) for roi in rois)
        body.append(f"<tr><td class=\"num\">{o.job.number}</td><td>{esc(o.label)}</td>{cells}</tr>")
    tid = "matrix-" + metric.replace("_", "-")
    title = table.title if table.title == metric else f"{table.title} ({metric})"
    return (f'<h3>{esc(title)}</h3><table id="{esc(tid)}"><caption>{_caption(result, "ROIs")}</caption>{head}'
            f'<tbody>{"".join(body)}</tbody></table>')


def _per_setting_table(result: "ComparisonResult", tables: Sequence[KeyMetricColumns]) -> str:
    """The key metrics of a single ROI (the effective FWHM, the insert residual, the activity
    recovery, the contrast of the smallest sphere ...) side by side: one row per setting, one
    column per metric."""
    single = [t for t in tables if len(t.rois) == 1]
    if not single:
        return ""
    named: dict[str, str] = {}  # an ROI the matrices show (a sphere) is named in the heading
    for t in tables:
        if len(t.rois) > 1:
            named.update(zip(t.rois, short_roi_names(t.rois)))
    head = "<thead><tr><th class=\"num\">#</th><th>setting</th>" + "".join(
        f'<th class="num" data-metric="{esc(t.metric)}" title="{esc(t.rois[0])}.{esc(t.metric)}">'
        f'{esc(t.title + (" " + named[t.rois[0]] if t.rois[0] in named else ""))}</th>' for t in single) + "</tr></thead>"
    body = []
    for o in _listed_settings(result):
        cells = "".join(_value_cell(_rows_by(o, t.metric).get(t.rois[0], []), t.metric) for t in single)
        body.append(f"<tr><td class=\"num\">{o.job.number}</td><td>{esc(o.label)}</td>{cells}</tr>")
    return (f'<h3>Key numbers per setting</h3><table id="per-setting"><caption>{_caption(result, "metrics")}</caption>'
            f'{head}<tbody>{"".join(body)}</tbody></table>')


def _harmonisation_cell(outcome: Any) -> str:
    """A ranking-table cell: the setting's harmonising filter and passing range, or why none."""
    h = getattr(outcome, "harmonisation", None) or {}
    if h.get("error"):
        return f'<td class="v-na">not found: {esc(h["error"])}</td>'
    if h.get("recommended_fwhm_mm") is None:
        return f'<td class="v-fail">none: {esc(h.get("passing_range_reason") or "")}</td>' if h else "<td>&ndash;</td>"
    lo, hi = h["passing_range_mm"]
    return f'<td class="v-pass">{h["recommended_fwhm_mm"]:g} mm (every band met {lo:g}&ndash;{hi:g} mm)</td>'


def compare_report_html(result: "ComparisonResult", *, folder: str | os.PathLike | None = None) -> str:
    """The report of a comparison as an HTML string.

    Parameters
    ----------
    result : ComparisonResult
    folder : path, optional
        Where the comparison files are (default ``result.out``): the charts and each series'
        ``series/series_NNN/overlay.png`` are embedded from there.
    """
    base = Path(folder) if folder is not None else Path(result.out)
    n_ok, n_bad = len(result.succeeded), len(result.failed)
    fill = result.fill
    bg = fill.get("background", {})
    spheres_fill = fill.get("spheres") or fill.get("rods") or {}
    summary_items = [
        ("series found", len(result.outcomes)),
        ("measured", n_ok),
        ("failed", n_bad),
        ("template", f"{result.template_name} ({result.template_title})"),
        ("bands", ", ".join(result.band_names) if result.band_names else "none (settings not ranked)"),
        ("worker processes", result.workers),
    ]
    fill_items = [
        ("nuclide", fill.get("nuclide")),
        ("background", f"{bg.get('concentration_kbq_ml')} kBq/mL at {bg.get('measured_at')}" if bg.get("concentration_kbq_ml") else None),
        ("sphere : background", spheres_fill.get("ratio_to_background")),
        ("cold inserts", ", ".join(fill.get("cold", [])) or "none"),
        ("site", fill.get("site")),
        ("phantom", fill.get("phantom")),
    ]
    rank_rows = []
    outcomes = {o.job.number: o for o in result.outcomes}
    for e in result.ranking:
        if e.meets_all_bands is None:
            meets = '<td class="v-na">&ndash; no bands</td>'
        elif e.meets_all_bands:
            meets = '<td class="v-pass">&#10003; meets all</td>'
        else:
            meets = '<td class="v-fail">&#10007; FAILS</td>'
        reasons = "<br>".join(esc(r) for r in e.reasons)
        dist = f"{e.distance:.2f}" if e.distance is not None else "&ndash;"
        rank_rows.append(
            f"<tr><td class=\"num\">{e.rank}</td><td class=\"num\">{e.number}</td><td>{esc(e.label)}</td>{meets}"
            f"<td class=\"num\">{e.passed}/{e.checked}</td><td class=\"num\">{dist}</td><td>{reasons}</td>"
            + (_harmonisation_cell(outcomes.get(e.number)) if result.harmonised else "") + "</tr>"
        )
    ranking = (
        '<table id="ranking"><caption>Settings meeting every band first, then by root-mean-square distance from the band '
        "centres (0: all values at the centre of their band, 1: on average at a limit)."
        + (" Harmonising filter: the Gaussian post-filter (mm FWHM) closest to the band centres among those meeting every "
           "band, and the range meeting every band; a Gaussian applied after reconstruction, to be confirmed by a real "
           "reconstruction with that filter." if result.harmonised else "")
        + "</caption><thead><tr><th class=\"num\">rank</th><th class=\"num\">#</th><th>setting</th><th>bands</th>"
        "<th class=\"num\">passed</th><th class=\"num\">distance</th><th>reasons for failing</th>"
        + ("<th>harmonising filter</th>" if result.harmonised else "") + "</tr></thead>"
        f"<tbody>{''.join(rank_rows)}</tbody></table>"
    )
    failed = ""
    if result.failed:
        frows = "".join(
            f"<tr><td class=\"num\">{o.job.number}</td><td>{esc(o.job.where)}</td><td>{esc(o.error_type)}</td>"
            f'<td class="v-fail">&#10007; {esc(o.error)}</td></tr>'
            for o in result.failed
        )
        failed = ('<section id="failures"><h2>Series that could not be measured</h2><table id="failed">'
                  "<thead><tr><th class=\"num\">#</th><th>source</th><th>error</th><th>message</th></tr></thead>"
                  f"<tbody>{frows}</tbody></table></section>")
    charts = "".join(_figure(_read(base / name), name, caption) for name, caption in result.charts)
    tables = key_metric_columns(result.succeeded)
    matrices = _per_setting_table(result, tables) + "".join(_settings_matrix(result, t) for t in tables if len(t.rois) > 1)
    blocks = []
    for o in result.succeeded:
        rec = (o.series or {}).get("reconstruction") or {}
        items = [
            ("label", o.label),
            ("series UID", o.job.series_uid),
            ("series number", o.job.series_number),
            ("description", o.job.series_description),
            ("reconstruction", rec.get("label")),
            ("source", o.job.where),
            ("results", f"series/{o.job.folder_name}/"),
        ]
        warn = "".join(f"<li>{esc(w)}</li>" for w in o.warnings)
        blocks.append(
            f'<div class="series-block" id="setting-{o.job.number}"><h3>#{o.job.number} &middot; {esc(o.label)}</h3>{_dl(items)}'
            + (f'<ul class="warnings">{warn}</ul>' if warn else "")
            + _figure(_read(base / "series" / o.job.folder_name / "overlay.png"), f"ROI overlay of setting {o.job.number}",
                      "ROIs as placed in this series.")
            + "</div>"
        )
    warn_all = "".join(f"<li>{esc(w)}</li>" for w in result.warnings)
    body = (
        '<section id="summary" class="summary">'
        f"<div><h2>Comparison</h2>{_dl(summary_items)}</div><div><h2>Fill record</h2>{_dl(fill_items)}</div></section>"
        + (f'<section id="ranking-section"><h2>Ranking</h2>{ranking}</section>' if result.ranked else
           f'<section id="ranking-section"><h2>Ranking</h2><p id="not-ranked" class="note">{esc(NOT_RANKED[0].upper() + NOT_RANKED[1:])} '
           '(Values by setting, below).</p></section>')
        + failed
        + f'<section id="charts"><h2>Charts</h2>{charts}</section>'
        + f'<section id="values"><h2>Values by setting</h2>{matrices}</section>'
        + (f'<section id="warnings"><h2>Warnings</h2><ul class="warnings">{warn_all}</ul></section>' if warn_all else "")
        + f'<section id="series"><h2>Series and ROI placement</h2>{"".join(blocks)}</section>'
    )
    return _page("Reconstruction-setting comparison", f"{result.template_title} | {len(result.outcomes)} series | one fill record", body)


def write_compare_report(result: "ComparisonResult", path: str | os.PathLike, *, folder: str | os.PathLike | None = None) -> Path:
    """Write :func:`compare_report_html` to ``path`` (UTF-8)."""
    out = Path(path)
    out.write_text(compare_report_html(result, folder=folder), encoding="utf-8")
    return out


__all__ = [
    "esc",
    "png_data_uri",
    "format_value",
    "verdict_cell",
    "measure_report_html",
    "write_measure_report",
    "compare_report_html",
    "write_compare_report",
]
