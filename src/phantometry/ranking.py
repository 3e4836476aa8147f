"""What a comparison of reconstruction settings gives, and how its settings are ranked.

The result types of :func:`phantometry.compare.compare` (one :class:`SeriesJob` per series
found, its :class:`SeriesOutcome`, the :class:`RankEntry` of each measured setting, the whole
:class:`ComparisonResult`), the ranking itself (:func:`rank_settings`: a formula over the band
verdicts of the rows; only with bands), the ``values by setting`` columns
(:func:`key_metric_columns`), each setting's key numbers sorted by label (:func:`key_numbers`,
:func:`by_label`) and the text of ``ranking.csv``, ``key_numbers.csv`` and ``comparison.csv``. Plain data and pure functions: the outputs
(:mod:`phantometry.report`) read them without knowing how a comparison is run.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

from .results import CSV_COLUMNS, Measurement, _fmt
from .volume import Reconstruction

#: Columns of comparison.csv: measurements.csv's up to ``note``, then ``label``, then the
#: measurement columns added after ``label`` existed (columns are only ever appended).
COMPARISON_COLUMNS = [*CSV_COLUMNS[: CSV_COLUMNS.index("note") + 1], "label", *CSV_COLUMNS[CSV_COLUMNS.index("note") + 1 :]]

if TYPE_CHECKING:  # pragma: no cover
    from .outputs import WrittenFolder
    from .templates import Template

#: Exit code of ``phantometry compare`` when at least one series failed (the others succeeded).
EXIT_SERIES_FAILED = 4


# ============================================================================== data types
@dataclass(frozen=True)
class SeriesJob:
    """One series to measure (picklable; sent to a worker).

    Attributes
    ----------
    number : int
        Position in discovery order, 1-based: the setting number on charts and tables.
    kind : {"dicom", "nifti"}
    paths : tuple of str
        The files of the DICOM series, or the NIfTI file.
    series_uid, series_number, series_description
        From the DICOM headers (None for NIfTI).
    where : str
        How messages name the series.
    """

    number: int
    kind: str
    paths: tuple[str, ...]
    series_uid: str | None = None
    series_number: int | None = None
    series_description: str | None = None
    where: str = ""

    @property
    def folder_name(self) -> str:
        return f"series_{self.number:03d}"


@dataclass
class SeriesOutcome:
    """What measuring one series gave: rows, or the error that stopped it.

    Attributes
    ----------
    job : SeriesJob
    rows : list of Measurement
        Empty when the series failed.
    error : str or None
        One-line message of the failure (``None`` on success).
    error_type : str or None
        Exception class name (``PhantomNotFound``, ``InputError``, ...).
    internal : bool
        True when the failure was not an expected :class:`PhantometryError` (a bug to report).
    warnings : list of str
    series : dict or None
        ``Volume.summary()`` of the loaded series (no patient identity).
    reconstruction : Reconstruction or None
    localisation : dict or None
        ``Placement.as_dict()``.
    key_metrics : list of (roi, metric)
        What characterises the setting, as its phantom kind says
        (:meth:`phantometry.phantoms.base.Analysis.key_metrics`), in the kind's order.
    metric_titles : dict
        metric -> title of its column in the kind's report tables (where the kind gives one).
    label : str
        Assigned by the main process after all series are done.
    seconds : float
        Wall time in the worker.
    peak_traced_bytes, volume_bytes : int or None
        With memory tracing: peak of memory allocated during the task (tracemalloc) and the
        size of the float32 volume.
    peak_rss_bytes : int or None
        With memory tracing: the worker process's maximum resident set size so far.
    harmonisation : dict or None
        With ``compare --harmonise``: the setting's harmonising post-filter.
    """

    job: SeriesJob
    rows: list[Measurement] = field(default_factory=list)
    error: str | None = None
    error_type: str | None = None
    internal: bool = False
    warnings: list[str] = field(default_factory=list)
    series: dict[str, Any] | None = None
    reconstruction: Reconstruction | None = None
    localisation: dict[str, Any] | None = None
    key_metrics: list[tuple[str, str]] = field(default_factory=list)
    metric_titles: dict[str, str] = field(default_factory=dict)
    label: str = ""
    seconds: float = 0.0
    peak_traced_bytes: int | None = None
    volume_bytes: int | None = None
    peak_rss_bytes: int | None = None
    #: with ``compare --harmonise``: the harmonising filter found for this setting
    #: (``recommended_fwhm_mm``, ``passing_range_mm``, ``passing_range_reason``, ... ;
    #: :func:`phantometry.harmonise.summary`), or ``{"error": message}``
    harmonisation: dict[str, Any] | None = None

    @property
    def ok(self) -> bool:
        return self.error is None


@dataclass
class RankEntry:
    """One setting in the ranking.

    Attributes
    ----------
    rank : int
    label : str
    number : int
        Setting number (discovery order).
    series_uid : str or None
    meets_all_bands : bool or None
        None when no row carries a band verdict.
    checked, passed, failed : int
        Rows with a ``pass``/``fail`` verdict, and how many of each.
    distance : float or None
        Root-mean-square normalised distance from the band centres (0 = every value at the
        centre of its band, 1 = on average at a limit); None without two-sided bands.
    reasons : list of str
        Why the setting fails (one line per failing row).
    brief : list of str
        The same, short: ``sphere_10mm rc_mean high``.
    """

    rank: int
    label: str
    number: int
    series_uid: str | None
    meets_all_bands: bool | None
    checked: int
    passed: int
    failed: int
    distance: float | None
    reasons: list[str]
    brief: list[str] = field(default_factory=list)


@dataclass
class ComparisonResult:
    """Everything :func:`phantometry.compare.compare` measured and wrote."""

    out: Path
    outcomes: list[SeriesOutcome]
    ranking: list[RankEntry]
    template_name: str
    template_title: str
    fill: dict[str, Any]
    band_names: list[str]
    warnings: list[str] = field(default_factory=list)
    workers: int = 1
    seconds: float = 0.0
    #: the template the series were measured with
    template: "Template | None" = None
    #: (file name, caption) of the charts written (the phantom kind's comparison charts)
    charts: list[tuple[str, str]] = field(default_factory=list)
    #: what writing the folder did (replaced an earlier one?)
    written: "WrittenFolder | None" = None
    #: the settings' harmonising filters were searched (``compare --harmonise``)
    harmonised: bool = False

    @property
    def succeeded(self) -> list[SeriesOutcome]:
        return [o for o in self.outcomes if o.ok]

    @property
    def failed(self) -> list[SeriesOutcome]:
        return [o for o in self.outcomes if not o.ok]

    @property
    def exit_code(self) -> int:
        """0 when every series was measured, :data:`EXIT_SERIES_FAILED` otherwise."""
        return EXIT_SERIES_FAILED if self.failed else 0

    @property
    def ranked(self) -> bool:
        """Whether the settings were ranked: ranking needs acceptance bands (without them the
        settings are listed by label with their key numbers, :func:`key_numbers`)."""
        return bool(self.band_names)


# ============================================================================== ranking
def _band_distance(r: Measurement) -> float | None:
    lo, hi = r.band_low, r.band_high
    if lo is None or hi is None or not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return None
    return (r.value - 0.5 * (lo + hi)) / (0.5 * (hi - lo))


def _fail_reason(r: Measurement) -> str:
    lo, hi = r.band_low, r.band_high
    if lo is not None and math.isfinite(lo) and r.value < lo:
        side, limit = "below", lo
    elif hi is not None and math.isfinite(hi) and r.value > hi:
        side, limit = "above", hi
    else:
        side, limit = "outside", None
    band = f" ({r.band})" if r.band else ""
    text = f"{r.roi} {r.metric} {r.value:.3g} {side} the band{band}"
    if limit is not None:
        text += f" limit {limit:.3g}"
    if r.uncertainty is not None and math.isfinite(r.uncertainty) and limit is not None and abs(r.value - limit) < 2 * r.uncertainty:
        text += f", within 2 standard uncertainties ({r.uncertainty:.2g})"
    return text


def rank_settings(settings: Sequence[tuple[str, int, str | None, Sequence[Measurement]]]) -> list[RankEntry]:
    """Rank settings: those meeting every band first, then by distance from the band centres.

    Parameters
    ----------
    settings : list of (label, number, series_uid, rows)
        The measurement rows of each setting, with ``band_low``, ``band_high``, ``verdict``
        filled by the acceptance bands.

    Returns
    -------
    list of RankEntry
        Sorted by (fails any band, number of failing rows, distance, number). The distance is
        the root-mean-square over the rows with a two-sided band of
        ``(value - centre) / half-width`` (``centre = (low + high) / 2``,
        ``half-width = (high - low) / 2``), so 1 means "on average at a limit". Rows whose
        verdict is ``n/a`` or empty are not counted. Without any band verdict every setting
        gets ``meets_all_bands = None`` and the order is the setting number.
    """
    entries = []
    for label, number, uid, rows in settings:
        judged = [r for r in rows if r.verdict in ("pass", "fail")]
        fails = [r for r in judged if r.verdict == "fail"]
        dists = [d for d in (_band_distance(r) for r in judged) if d is not None and math.isfinite(d)]
        dist = math.sqrt(sum(d * d for d in dists) / len(dists)) if dists else None
        entries.append(
            RankEntry(
                rank=0,
                label=label,
                number=number,
                series_uid=uid,
                meets_all_bands=(not fails) if judged else None,
                checked=len(judged),
                passed=len(judged) - len(fails),
                failed=len(fails),
                distance=dist,
                reasons=[_fail_reason(r) for r in fails],
                brief=[f"{r.roi} {r.metric} {'low' if (r.band_low is not None and r.value < r.band_low) else 'high'}" for r in fails],
            )
        )
    entries.sort(key=lambda e: (e.meets_all_bands is False, e.failed, math.inf if e.distance is None else e.distance, e.number))
    for n, e in enumerate(entries, start=1):
        e.rank = n
    return entries


# ============================================================================== values by setting
@dataclass(frozen=True)
class KeyMetricColumns:
    """One table of values by setting: a key metric, and the ROIs that have it.

    Attributes
    ----------
    metric : str
    title : str
        The kind's title of the metric (its report tables), else the metric name.
    rois : list of str
        The columns, in the kind's order of its key metrics (the body: spheres smallest first).
    """

    metric: str
    title: str
    rois: list[str]


def key_metric_columns(outcomes: Sequence[SeriesOutcome]) -> list[KeyMetricColumns]:
    """The tables of values by setting: one per key metric of the measured settings, titled as
    the kind titles the metric (else in words: :func:`metric_heading`).

    Metrics and ROIs come in the order the phantom kind lists its key metrics
    (:attr:`SeriesOutcome.key_metrics`; the first setting's order, then anything only later
    settings have); a metric that no setting has a row of is left out.
    """
    rois_of: dict[str, list[str]] = {}
    titles: dict[str, str] = {}
    measured: set[str] = set()
    for o in outcomes:
        if not o.ok:
            continue
        measured.update(r.metric for r in o.rows)
        for metric, title in o.metric_titles.items():
            titles.setdefault(metric, title)
        for roi, metric in o.key_metrics:
            cols = rois_of.setdefault(metric, [])
            if roi not in cols:
                cols.append(roi)
    return [KeyMetricColumns(m, titles[m] if titles.get(m, m) != m else metric_heading(m), rois)
            for m, rois in rois_of.items() if m in measured]


#: words of metric names written as a reader expects them in a heading
_HEADING_WORDS = {"rc": "RC", "cv": "CV", "bv": "BV", "fwhm": "FWHM", "suv": "SUV", "pct": "(%)", "mm": "(mm)"}


def metric_heading(metric: str) -> str:
    """A heading for a metric its kind gives no title: words instead of the code name
    (``max_deviation_pct`` -> ``max deviation (%)``, ``voxel_cv_pct`` -> ``voxel CV (%)``)."""
    return " ".join(_HEADING_WORDS.get(w, w) for w in metric.split("_") if w)


def short_roi_names(rois: Sequence[str]) -> list[str]:
    """Column headings: the ROI names without the prefix (up to an ``_``) they all share.

    ``sphere_10mm, sphere_13mm`` -> ``10mm, 13mm``; a single name or names without a common
    prefix stay as they are.
    """
    if len(rois) < 2:
        return list(rois)
    common = os.path.commonprefix(list(rois))
    cut = common.rfind("_") + 1
    if cut == 0 or any(len(r) == cut for r in rois):
        return list(rois)
    return [r[cut:] for r in rois]


# ============================================================================== key numbers
#: What a comparison without bands says instead of a ranking.
NOT_RANKED = ("not ranked: ranking needs acceptance bands (--bands NAME, see phantometry bands list); "
              "each setting's key numbers are listed by label")


def natural_key(text: str) -> tuple:
    """Sort key reading digit runs as numbers: ``Gauss 5mm`` before ``Gauss 12mm``."""
    import re

    return tuple((0, int(part), "") if part.isdigit() else (1, 0, part.lower()) for part in re.split(r"(\d+)", text) if part)


def by_label(outcomes: Sequence[SeriesOutcome]) -> list[SeriesOutcome]:
    """The measured settings sorted by label (digit runs as numbers), then setting number."""
    return sorted((o for o in outcomes if o.ok), key=lambda o: (natural_key(o.label), o.job.number))


@dataclass(frozen=True)
class KeyNumber:
    """One key number of a comparison: an ROI's metric, as the phantom kind names it.

    Attributes
    ----------
    roi, metric : str
    title : str
        The kind's title of the metric (else the metric name).
    unit : str
        The unit of the rows (``1`` for ratios).
    """

    roi: str
    metric: str
    title: str
    unit: str

    @property
    def column(self) -> str:
        """The CSV column: ``sphere_10mm.rc_max``."""
        return f"{self.roi}.{self.metric}"


def key_numbers(outcomes: Sequence[SeriesOutcome]) -> list[KeyNumber]:
    """Every key number of the measured settings, in the kind's order (:func:`key_metric_columns`,
    each metric's ROIs in turn)."""
    units: dict[tuple[str, str], str] = {}
    for o in outcomes:
        if o.ok:
            for r in o.rows:
                units.setdefault((r.roi, r.metric), r.unit)
    return [KeyNumber(roi, t.metric, t.title, units[(roi, t.metric)])
            for t in key_metric_columns(outcomes) for roi in t.rois if (roi, t.metric) in units]


def row_of(outcome: SeriesOutcome, roi: str, metric: str) -> Measurement | None:
    """The measurement of one ROI's metric in a setting (None when it has none)."""
    for r in outcome.rows:
        if r.roi == roi and r.metric == metric:
            return r
    return None


def key_numbers_csv(result: ComparisonResult) -> str:
    """``key_numbers.csv``: one line per setting, sorted by label (failed series last), with
    ``setting, label, series_uid, status``, then for every key number its value and standard
    uncertainty (columns ``ROI.METRIC`` and ``ROI.METRIC.u``, in the units of ``comparison.csv``)."""
    numbers = key_numbers(result.outcomes)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["setting", "label", "series_uid", "status", *(c for k in numbers for c in (k.column, f"{k.column}.u"))])
    for o in by_label(result.outcomes):
        cells = []
        for k in numbers:
            r = row_of(o, k.roi, k.metric)
            cells += [_fmt(r.value if r is not None else None), _fmt(r.uncertainty if r is not None else None)]
        w.writerow([o.job.number, o.label, o.job.series_uid or "", "measured", *cells])
    for o in result.failed:
        w.writerow([o.job.number, o.label, o.job.series_uid or "", "error", *([""] * (2 * len(numbers)))])
    return buf.getvalue()


def key_numbers_json(result: ComparisonResult) -> dict[str, Any]:
    """The ``key_numbers`` section of ``summary.json``: the key numbers (ROI, metric, title,
    unit) and, per measured setting sorted by label, each value with its standard uncertainty."""
    numbers = key_numbers(result.outcomes)

    def entry(o: SeriesOutcome) -> dict[str, Any]:
        values = {}
        for k in numbers:
            r = row_of(o, k.roi, k.metric)
            if r is not None:
                values[k.column] = {"value": _finite_or_none(r.value), "uncertainty": _finite_or_none(r.uncertainty)}
        return {"setting": o.job.number, "label": o.label, "values": values}

    return {
        "numbers": [{"column": k.column, "roi": k.roi, "metric": k.metric, "title": k.title, "unit": k.unit} for k in numbers],
        "settings": [entry(o) for o in by_label(result.outcomes)],
    }


def _finite_or_none(v: float | None) -> float | None:
    return float(v) if v is not None and math.isfinite(v) else None


# ============================================================================== CSV text
RANKING_COLUMNS = [
    "rank",
    "setting",
    "label",
    "series_uid",
    "status",
    "meets_all_bands",
    "rows_checked",
    "rows_passed",
    "rows_failed",
    "distance_from_band_centres",
    "reasons",
    "folder",
]


#: Columns appended to ranking.csv by ``compare --harmonise``.
HARMONISATION_COLUMNS = ["recommended_filter_fwhm_mm", "passing_filter_low_mm", "passing_filter_high_mm", "filter_note"]


def harmonisation_cells(h: dict[str, Any] | None) -> list[Any]:
    """The :data:`HARMONISATION_COLUMNS` of one setting (empty cells without a harmonisation)."""
    if not h:
        return [None, None, None, None]
    if h.get("error"):
        return [None, None, None, h["error"]]
    rng = h.get("passing_range_mm") or [None, None]
    return [h.get("recommended_fwhm_mm"), rng[0], rng[1], h.get("passing_range_reason") or ""]


def harmonisation_text(h: dict[str, Any] | None) -> str:
    """One setting's harmonising filter in a few words: ``6.75 mm (5.75-7.75)`` or ``none``."""
    if not h:
        return "-"
    if h.get("error"):
        return "not found (error)"
    if h.get("recommended_fwhm_mm") is None:
        return "none"
    lo, hi = h["passing_range_mm"]
    return f"{h['recommended_fwhm_mm']:g} mm ({lo:g}-{hi:g})"


def ranking_csv(result: ComparisonResult) -> str:
    """``ranking.csv``: :data:`RANKING_COLUMNS` (and :data:`HARMONISATION_COLUMNS` for a
    harmonised comparison); failed series last with status ``error``."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    extra = result.harmonised
    w.writerow(RANKING_COLUMNS + (HARMONISATION_COLUMNS if extra else []))
    by_number = {o.job.number: o for o in result.outcomes}
    for e in result.ranking:
        meets = "" if e.meets_all_bands is None else ("yes" if e.meets_all_bands else "no")
        h = by_number[e.number].harmonisation if e.number in by_number else None
        w.writerow([e.rank, e.number, e.label, e.series_uid or "", "measured", meets, e.checked, e.passed, e.failed,
                    _fmt(e.distance), "; ".join(e.reasons), f"series/series_{e.number:03d}"]
                   + ([_fmt(v) for v in harmonisation_cells(h)] if extra else []))
    for o in result.failed:
        w.writerow(["", o.job.number, o.label, o.job.series_uid or "", "error", "", 0, 0, 0, "", o.error, ""] + (["", "", "", ""] if extra else []))
    return buf.getvalue()


def comparison_csv(outcomes: Sequence[SeriesOutcome]) -> str:
    """``comparison.csv``: the measurement columns plus ``label``, every measured series."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COMPARISON_COLUMNS)
    for o in outcomes:
        for r in o.rows:
            d = r.as_dict()
            w.writerow([o.label if c == "label" else _fmt(d[c]) for c in COMPARISON_COLUMNS])
    return buf.getvalue()


def read_comparison_csv(path: str | os.PathLike) -> list[tuple[str, Measurement]]:
    """Read ``comparison.csv`` back as ``(label, Measurement)`` pairs."""
    from .results import measurement_from_record

    out = []
    with open(path, newline="", encoding="utf-8") as fh:
        for rec in csv.DictReader(fh):
            out.append((rec["label"], measurement_from_record(rec)))
    return out


__all__ = [
    "EXIT_SERIES_FAILED",
    "SeriesJob",
    "SeriesOutcome",
    "RankEntry",
    "ComparisonResult",
    "KeyMetricColumns",
    "KeyNumber",
    "NOT_RANKED",
    "by_label",
    "key_numbers",
    "key_numbers_csv",
    "key_numbers_json",
    "metric_heading",
    "natural_key",
    "row_of",
    "rank_settings",
    "key_metric_columns",
    "short_roi_names",
    "RANKING_COLUMNS",
    "HARMONISATION_COLUMNS",
    "harmonisation_cells",
    "harmonisation_text",
    "ranking_csv",
    "comparison_csv",
    "read_comparison_csv",
]
