"""Compare reconstruction settings: measure many series of one phantom scan and rank them.

Before a reconstruction protocol goes clinical, one phantom acquisition is reconstructed many
ways (iterations, subsets, filter, point-response modelling, time of flight, matrix).
:func:`compare` finds every PET series in the input, measures each with the same fill record
(:func:`phantometry.measure.measure_volume`) in parallel worker processes, applies the
acceptance bands, and writes:

``comparison.csv``
    The rows of ``measurements.csv`` of every series, with the columns of
    :data:`phantometry.results.CSV_COLUMNS` followed by ``label`` (the setting's label).
``ranking.csv``
    One line per setting, best first (see :func:`rank_settings`), then the failed series.
``summary.json``
    Inputs, labels, per-series status (error message of a failed series), warnings.
``contrast_noise.png``, ``recovery_curves.png``
    Percent contrast against background variability per sphere, one point per setting with
    standard-uncertainty bars; recovery coefficients of all settings over the bands.
``series/series_NNN/``
    For every series the result folder ``measure`` would write (CSV, JSON, overlay).
``report.html``
    With ``report=True``: the self-contained report (:mod:`phantometry.report`).

Workers
-------
A :class:`concurrent.futures.ProcessPoolExecutor` with the ``forkserver`` start method (``spawn``
where that is not available). A worker is given one series at a time and loads only that
series, so memory stays bounded by about one volume per worker; the main process keeps only
the measurement rows (while the workers start up, it measures series itself, one at a time).
The acceptance bands are applied in the worker, so each series folder carries its verdicts.
A series that fails (damaged file, wrong phantom, phantom not found) is
recorded with its error and does not stop the others.

Labels
------
By default a setting is labelled from its reconstruction attributes (DICOM Reconstruction
Method with iterations and subsets, Convolution Kernel; matrix and voxel size when they differ
between the series; the Series Description, then the Series Number, when labels would still
collide). A ``labels`` file (YAML mapping or two-column CSV ``series,label``) maps a Series
Instance UID, a Series Number or a NIfTI file name to a label.
"""

from __future__ import annotations

import csv
import io
import math
import multiprocessing
import os
import threading
import time
import warnings as _warnings
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

from . import __version__
from .errors import InputError, NoPETSeries, OutputError, PhantometryError
from .results import CAUTION, CSV_COLUMNS, Measurement, _fmt, to_json
from .threads import current_threads, set_threads
from .volume import Reconstruction

#: Exit code of ``phantometry compare`` when at least one series failed (the others succeeded).
EXIT_SERIES_FAILED = 4

_NIFTI_SUFFIXES = (".nii", ".nii.gz")


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
    label : str
        Assigned by the main process after all series are done.
    seconds : float
        Wall time in the worker.
    peak_traced_bytes, volume_bytes : int or None
        With memory tracing: peak of memory allocated during the task (tracemalloc) and the
        size of the float32 volume.
    peak_rss_bytes : int or None
        With memory tracing: the worker process's maximum resident set size so far.
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
    label: str = ""
    seconds: float = 0.0
    peak_traced_bytes: int | None = None
    volume_bytes: int | None = None
    peak_rss_bytes: int | None = None

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
    """Everything :func:`compare` measured and wrote."""

    out: Path
    outcomes: list[SeriesOutcome]
    ranking: list[RankEntry]
    template_name: str
    template_title: str
    fill: dict[str, Any]
    band_names: list[str]
    warnings: list[str] = field(default_factory=list)
    sphere_diameters_mm: dict[str, float] = field(default_factory=dict)
    hot_spheres: dict[str, bool] = field(default_factory=dict)
    workers: int = 1
    seconds: float = 0.0
    #: the template the series were measured with
    template: Any = None
    #: (file name, caption) of the charts written
    charts: list[tuple[str, str]] = field(default_factory=list)
    #: what writing the folder did (:class:`phantometry.outputs.WrittenFolder`: replaced an earlier one?)
    written: Any = None

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


# ============================================================================== discovery
def _is_nifti(path: Path) -> bool:
    return path.is_file() and path.name.lower().endswith(_NIFTI_SUFFIXES)


def discover_jobs(inputs: Sequence[str | os.PathLike] | str | os.PathLike) -> tuple[list[SeriesJob], list[str]]:
    """Every PET series under the inputs: DICOM series (searched recursively) and NIfTI files.

    Parameters
    ----------
    inputs : path or list of paths
        Folders and/or files.

    Returns
    -------
    (jobs, notes)
        Jobs in discovery order (DICOM by Series Number then UID, then NIfTI files by path),
        and notes about series that were skipped (non-PET modalities).

    Raises
    ------
    InputError
        A path does not exist.
    NoPETSeries
        No PET series anywhere in the inputs.
    """
    from .io.dicom import discover_series

    paths = [Path(p) for p in ([inputs] if isinstance(inputs, (str, os.PathLike)) else inputs)]
    if not paths:
        raise InputError("no input given: name a folder of reconstructions or the series to compare")
    for p in paths:
        if not p.exists():
            raise InputError(f"{p}: no such file or folder")
    nifti: list[Path] = []
    dicom_roots: list[Path] = []
    for p in paths:
        if _is_nifti(p):
            nifti.append(p)
        else:
            dicom_roots.append(p)
            if p.is_dir():
                nifti.extend(q for q in p.rglob("*") if _is_nifti(q))
    notes: list[str] = []
    jobs: list[SeriesJob] = []
    if dicom_roots:
        infos = discover_series(dicom_roots)
        for info in infos:
            if info.modality != "PT":
                notes.append(f"skipped series {info.label()}: modality {info.modality or 'unknown'}, not PET")
                continue
            folders = {f.parent for f in info.files}
            where = str(folders.pop()) if len(folders) == 1 else f"series {info.series_uid}"
            jobs.append(
                SeriesJob(
                    number=len(jobs) + 1,
                    kind="dicom",
                    paths=tuple(str(f) for f in info.files),
                    series_uid=info.series_uid,
                    series_number=info.series_number,
                    series_description=info.series_description,
                    where=where,
                )
            )
    for p in sorted(set(nifti)):
        jobs.append(SeriesJob(number=len(jobs) + 1, kind="nifti", paths=(str(p),), where=str(p)))
    if not jobs:
        where = ", ".join(map(str, paths))
        raise NoPETSeries(f"{where}: no PET series (DICOM PT or NIfTI) found; give the folder holding the reconstructions")
    return jobs, notes


# ============================================================================== labels
def load_labels(path: str | os.PathLike) -> dict[str, str]:
    """Read a labels file: series UID, series number or NIfTI file name -> label.

    YAML: a mapping ``{key: label}`` (optionally under a top-level ``labels:`` key).
    CSV: a header line with a key column (``series``, ``series_uid``, ``series_number`` or
    ``file``) and ``label``.

    Raises
    ------
    InputError
        Missing file, malformed content, empty labels.
    """
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: labels file not found; give a YAML or CSV file mapping series to labels")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{p}: the labels file is not UTF-8 text; save it as UTF-8") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read the labels file ({exc.strerror or exc})") from None
    out: dict[str, str] = {}
    if p.suffix.lower() == ".csv":
        rows = list(csv.DictReader(io.StringIO(text)))
        if not rows:
            raise InputError(f"{p}: no rows; expected a header 'series,label' and one line per series")
        keys = [k for k in ("series", "series_uid", "series_number", "file") if k in rows[0]]
        if not keys or "label" not in rows[0]:
            raise InputError(f"{p}: header must name a key column (series, series_uid, series_number or file) and label; found {', '.join(rows[0])}")
        for n, row in enumerate(rows, start=2):
            key = (row.get(keys[0]) or "").strip()
            label = (row.get("label") or "").strip()
            if not key or not label:
                raise InputError(f"{p}: line {n}: empty {keys[0] if not key else 'label'}; give both the series and its label")
            out[key] = label
        return out
    from .yamlfile import parse_yaml_text

    data = parse_yaml_text(text, str(p), InputError)
    if isinstance(data, dict) and set(data) == {"labels"}:
        data = data["labels"]
    if not isinstance(data, dict) or not data:
        raise InputError(f"{p}: expected a mapping 'series UID or number: label', got {type(data).__name__}")
    for key, label in data.items():
        if label is None or str(label).strip() == "":
            raise InputError(f"{p}: {key}: empty label; give a label or remove the line")
        out[str(key).strip()] = str(label).strip()
    return out


def _core_label(rec: Reconstruction | None) -> str:
    if rec is None:
        return ""
    head = " ".join(x for x in (rec.method, f"{rec.iterations or '?'}i{rec.subsets or '?'}s" if (rec.iterations or rec.subsets) else None) if x)
    return ", ".join(x for x in (head, rec.filter) if x)


def _geometry_label(rec: Reconstruction | None) -> str:
    if rec is None:
        return ""
    parts = []
    if any(rec.matrix):
        parts.append(f"{rec.matrix[0]}x{rec.matrix[1]}")
    if any(rec.voxel_size_mm):
        parts.append("x".join(f"{v:.3g}" for v in rec.voxel_size_mm) + " mm")
    return ", ".join(parts)


def assign_labels(outcomes: Sequence[SeriesOutcome], mapping: dict[str, str] | None = None) -> list[str]:
    """Label every outcome in place and return warnings (unused or duplicate labels).

    A mapping entry matches a Series Instance UID, a Series Number or a NIfTI file name (with
    or without its extension). Other series are labelled from their reconstruction attributes
    (see the module notes; matrix and voxel size are added when they differ between the
    measured series); labels are made unique by adding the Series Description, then
    ``#number``.
    """
    mapping = dict(mapping or {})
    used: set[str] = set()
    notes: list[str] = []

    def mapped(o: SeriesOutcome) -> str | None:
        j = o.job
        keys = []
        if j.series_uid:
            keys.append(j.series_uid)
        if j.series_number is not None:
            keys.append(str(j.series_number))
        if j.kind == "nifti":
            name = Path(j.paths[0]).name
            keys += [name, name.split(".")[0]]
        for k in keys:
            if k in mapping:
                used.add(k)
                return mapping[k]
        return None

    measured = [o for o in outcomes if o.ok and o.reconstruction is not None] or [o for o in outcomes if o.reconstruction is not None]
    geometries = {_geometry_label(o.reconstruction) for o in measured}
    with_geometry = len(geometries) > 1
    auto: dict[int, str] = {}
    for o in outcomes:
        m = mapped(o)
        if m is not None:
            o.label = m
            continue
        parts = [_core_label(o.reconstruction)]
        if with_geometry or not parts[0]:
            parts.append(_geometry_label(o.reconstruction))
        text = ", ".join(p for p in parts if p)
        auto[id(o)] = text or (o.job.series_description or Path(o.job.paths[0]).name)
        o.label = auto[id(o)]
    # make automatic labels unique: add the description, then the number
    for step in ("description", "number"):
        counts: dict[str, int] = {}
        for o in outcomes:
            counts[o.label] = counts.get(o.label, 0) + 1
        for o in outcomes:
            if counts[o.label] > 1 and id(o) in auto:
                if step == "description" and o.job.series_description and o.job.series_description not in o.label:
                    o.label = f"{o.label} [{o.job.series_description}]"
                elif step == "number":
                    o.label = f"{o.label} #{o.job.series_number if o.job.series_number is not None else o.job.number}"
    counts = {}
    for o in outcomes:
        counts[o.label] = counts.get(o.label, 0) + 1
    for label, n in counts.items():
        if n > 1:
            notes.append(f"label {label!r} is given to {n} series; tell them apart in the labels file")
    unused = sorted(set(mapping) - used)
    if unused:
        notes.append(f"labels file entries match no series: {', '.join(unused)}")
    return notes


# ============================================================================== the worker
#: Modules a worker needs; imported once by the fork server (or by each spawned worker at start).
_WORKER_MODULES = ["phantometry.compare", "phantometry.measure", "phantometry.noise", "phantometry.metrics.resolution", "phantometry.io.dicom",
                   "phantometry.phantoms.body", "phantometry.phantoms.small_animal", "phantometry.phantoms.inserts",
                   "phantometry.io.nifti", "phantometry.figures", "phantometry._agg"]


_CACHE: dict[tuple, Any] = {}


def _mtime(path: str) -> int:
    try:
        return os.stat(path).st_mtime_ns
    except OSError:
        return -1


def _cached_template(template: str, templates_dirs: tuple[str, ...]):
    """The template, parsed once per process (and again when its file changes)."""
    from .phantoms import load_template

    key = ("template", template, templates_dirs, _mtime(template))
    if key not in _CACHE:
        _CACHE[key] = load_template(template, list(templates_dirs))
    return _CACHE[key]


def _cached_fill(fill_path: str):
    """The fill record, parsed once per process (and again when the file changes)."""
    from .fill import load_fill_record

    key = ("fill", fill_path, _mtime(fill_path))
    if key not in _CACHE:
        _CACHE[key] = load_fill_record(fill_path)
    return _CACHE[key]


def _cached_bands(names: tuple[str, ...]) -> list[Any]:
    """The band sets, loaded once per process."""
    key = ("bands", names, tuple(_mtime(n) for n in names))
    if key not in _CACHE:
        _CACHE[key] = _load_bands(list(names))
    return _CACHE[key]


def _warm_up(template: str = "iec-body", templates_dirs: tuple[str, ...] = ()) -> int:
    """Run in each worker at start: imports and first-use costs (fonts, template) while discovery runs."""
    import importlib
    import io as _io

    for name in _WORKER_MODULES:
        importlib.import_module(name)
    from .figures import _plt

    plt = _plt()
    fig = plt.figure(figsize=(1, 1))
    fig.text(0.5, 0.5, "warm", fontsize=8)
    fig.savefig(_io.BytesIO(), format="png", dpi=20)
    plt.close(fig)
    try:
        _cached_template(template, templates_dirs)
    except PhantometryError:
        pass
    return os.getpid()


def measure_series(
    job: SeriesJob,
    template: str,
    fill_path: str,
    templates_dirs: Sequence[str] = (),
    out_dir: str | None = None,
    trace_memory: bool = False,
    overlay: bool = True,
    bands: Sequence[str] = (),
    measure_options: dict[str, Any] | None = None,
) -> SeriesOutcome:
    """Load and measure one series; never raises for a bad series (the error is returned).

    Parameters
    ----------
    job : SeriesJob
    template : str
        Template name or file.
    fill_path : str
        Fill record file (the same for every series).
    templates_dirs : list of str
        Extra template folders.
    out_dir : str, optional
        Folder to write this series' ``measurements.csv``, ``measurements.json`` and
        ``overlay.png`` into (as ``measure`` would).
    trace_memory : bool
        Record the peak memory allocated during the task (``tracemalloc``, which counts numpy
        buffers) and the process's maximum resident set size (``resource.getrusage``).
    overlay : bool
        Draw the ROI overlay picture.
    bands : list of str
        Acceptance band sets (names or files) to judge the rows with.
    measure_options : dict, optional
        Keyword arguments for :func:`phantometry.measure.measure_volume` (e.g.
        ``{"uncertainties": False}``).

    Returns
    -------
    SeriesOutcome
    """
    import resource
    import tracemalloc

    t0 = time.perf_counter()
    outcome = SeriesOutcome(job=job)
    if trace_memory:
        tracemalloc.start()
    try:
        with _warnings.catch_warnings(record=True) as caught:
            _warnings.simplefilter("always")
            _measure_into(outcome, job, template, fill_path, templates_dirs, out_dir, overlay, tuple(bands), measure_options)
        outcome.warnings.extend(str(w.message) for w in caught if issubclass(w.category, UserWarning))
    except PhantometryError as exc:
        outcome.error = str(exc).replace("\n", " ")
        outcome.error_type = type(exc).__name__
        outcome.rows = []
    except Exception as exc:  # a bug in one series must not stop the others; say it is one
        outcome.error = f"internal error ({type(exc).__name__}: {exc}); please report it"
        outcome.error_type = type(exc).__name__
        outcome.internal = True
        outcome.rows = []
    finally:
        if trace_memory:
            outcome.peak_traced_bytes = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            outcome.peak_rss_bytes = int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024
    outcome.seconds = time.perf_counter() - t0
    return outcome


def _measure_into(
    outcome: SeriesOutcome,
    job: SeriesJob,
    template: str,
    fill_path: str,
    templates_dirs: Sequence[str],
    out_dir: str | None,
    overlay: bool,
    bands: tuple[str, ...] = (),
    measure_options: dict[str, Any] | None = None,
) -> None:
    from .measure import judge, measure_volume, write_results

    tpl = _cached_template(template, tuple(templates_dirs))
    fill = _cached_fill(fill_path)
    if job.kind == "nifti":
        from .io.nifti import load_nifti

        volume = load_nifti(job.paths[0])
    else:
        from .io.dicom import load_dicom

        volume = load_dicom([Path(p) for p in job.paths], series=job.series_uid)
    outcome.volume_bytes = int(volume.data.nbytes)
    outcome.series = volume.summary()
    outcome.reconstruction = volume.reconstruction
    analysis = measure_volume(volume, tpl, fill, where=job.where, **(measure_options or {}))
    if bands:
        judge(analysis, _cached_bands(bands))
    outcome.rows = analysis.rows
    outcome.warnings.extend(analysis.warnings)
    outcome.localisation = analysis.placement.as_dict()
    if out_dir is not None:
        folder = Path(out_dir)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            write_results(analysis, folder, overlay=overlay, pictures=False)
        except OSError as exc:  # no space, file-size limit ...: the whole comparison stops (see compare)
            if exc.errno is None:
                raise
            raise OutputError(f"series/{folder.name}: {exc.strerror or os.strerror(exc.errno)}") from None


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


def ranking_csv(result: ComparisonResult) -> str:
    """``ranking.csv``: :data:`RANKING_COLUMNS`; failed series last with status ``error``."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(RANKING_COLUMNS)
    for e in result.ranking:
        meets = "" if e.meets_all_bands is None else ("yes" if e.meets_all_bands else "no")
        w.writerow([e.rank, e.number, e.label, e.series_uid or "", "measured", meets, e.checked, e.passed, e.failed,
                    _fmt(e.distance), "; ".join(e.reasons), f"series/series_{e.number:03d}"])
    for o in result.failed:
        w.writerow(["", o.job.number, o.label, o.job.series_uid or "", "error", "", 0, 0, 0, "", o.error, ""])
    return buf.getvalue()


def comparison_csv(outcomes: Sequence[SeriesOutcome]) -> str:
    """``comparison.csv``: the measurement columns plus ``label``, every measured series."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow([*CSV_COLUMNS, "label"])
    for o in outcomes:
        for r in o.rows:
            d = r.as_dict()
            w.writerow([*(_fmt(d[c]) for c in CSV_COLUMNS), o.label])
    return buf.getvalue()


def read_comparison_csv(path: str | os.PathLike) -> list[tuple[str, Measurement]]:
    """Read ``comparison.csv`` back as ``(label, Measurement)`` pairs."""
    from .results import measurement_from_record

    out = []
    with open(path, newline="", encoding="utf-8") as fh:
        for rec in csv.DictReader(fh):
            out.append((rec["label"], measurement_from_record(rec)))
    return out


# ============================================================================== bands
def _load_bands(names: Sequence[str], template: Any = None) -> list[Any]:
    """Band sets by name or file; checked against the template when one is given."""
    if not names:
        return []
    from .bands import check_band_set, load_band_set

    sets = [load_band_set(n) for n in names]
    if template is not None:
        from .phantoms import known_metrics

        known = known_metrics(template)
        for bs in sets:
            check_band_set(bs, template.name, known)
    return sets


# ============================================================================== main entry
ProgressCallback = Callable[[int, int, "SeriesOutcome | None"], None]


def _context() -> multiprocessing.context.BaseContext:
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(list(_WORKER_MODULES))
        return ctx
    return multiprocessing.get_context("spawn")


def worker_pool(n_workers: int) -> ProcessPoolExecutor:
    """The pool of worker processes :func:`compare` measures in.

    Each worker gets its share of the CPUs (at least one thread) for its FFTs, simulations
    and BLAS/LAPACK calls (:func:`phantometry.threads.set_threads`), so the machine is not
    oversubscribed; workers are forked from a fork server that has the measuring modules
    imported (where the platform has one).
    """
    n_cpu = os.cpu_count() or 1
    return ProcessPoolExecutor(max_workers=n_workers, mp_context=_context(),
                               initializer=set_threads, initargs=(max(1, n_cpu // n_workers),))


def compare(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    fill: str | os.PathLike,
    out: str | os.PathLike,
    template: str = "iec-body",
    bands: Sequence[str] = (),
    labels: str | os.PathLike | dict[str, str] | None = None,
    workers: int | None = None,
    report: bool = False,
    templates_dirs: Sequence[str] | None = None,
    progress: ProgressCallback | None = None,
    trace_memory: bool = False,
    overlays: bool = True,
    measure_options: dict[str, Any] | None = None,
    overwrite: bool = False,
) -> ComparisonResult:
    """Measure every PET series in ``inputs`` with one fill record and rank the settings.

    Parameters
    ----------
    inputs : path or list of paths
        A folder of reconstructions (searched recursively; DICOM series and NIfTI files) or
        the series themselves.
    fill : path
        Fill record of the phantom (the same acquisition for every series).
    out : path
        Result folder, written atomically (see the module notes for its contents).
    template : str
        Template name or file (``iec-body``).
    bands : list of str
        Acceptance band sets (:func:`phantometry.bands.load_band_set`) applied to every series.
    labels : path or dict, optional
        Labels file (:func:`load_labels`) or mapping.
    workers : int, optional
        Worker processes (default: one per CPU). ``1`` measures in this process, one series
        at a time. This process lists the series while the workers start.
    report : bool
        Also write ``report.html``.
    templates_dirs : list of str, optional
        Extra template folders.
    progress : callable, optional
        ``progress(done, total, outcome)``: called with ``(0, total, None)`` once the series
        are found, then after every series.
    trace_memory : bool
        Record per-series peak memory in the workers (for benchmarks; slower).
    overlays : bool
        Draw each series' ROI overlay picture.
    measure_options : dict, optional
        Keyword arguments passed to :func:`phantometry.measure.measure_volume` for every
        series (e.g. ``{"resolution": False}``).
    overwrite : bool
        Replace ``out`` when it holds earlier phantometry results (``--overwrite``).

    Returns
    -------
    ComparisonResult
        ``exit_code`` is :data:`EXIT_SERIES_FAILED` when any series failed.

    Raises
    ------
    InputError, NoPETSeries, TemplateError, FillRecordError, BandError
        Problems with the inputs common to all series (nothing is written).
    OutputRefused
        ``out`` may not be written (:mod:`phantometry.outputs`; checked before anything is
        loaded): an existing file, a folder phantometry did not write, earlier results
        without ``overwrite``, or a folder that is, lies inside or contains an input.
    OutputError
        A system error while writing (nothing is left behind).
    """
    from .fill import load_fill_record
    from .outputs import KIND_COMPARE, check_output_folder, existing_inputs, output_folder
    from .phantoms import load_template

    t_start = time.perf_counter()
    dirs = [str(d) for d in (templates_dirs or [])]
    input_paths = existing_inputs(inputs, fill, template, list(bands), labels, dirs)
    check_output_folder(out, KIND_COMPARE, inputs=input_paths, overwrite=overwrite)
    tpl = load_template(template, dirs)
    fill_record = load_fill_record(fill)
    band_sets = _load_bands(list(bands), tpl)  # refuse bad band sets before any work
    mapping = labels if isinstance(labels, dict) else (load_labels(labels) if labels is not None else None)

    executor = None
    starter = None
    warm: list[Any] = []
    started = threading.Event()  # set once the pool's workers exist
    handoff = threading.Lock()
    current: dict[str, _Run] = {}
    n_cpu = os.cpu_count() or 1
    if workers is not None and workers < 1:
        raise InputError(f"--workers {workers}: give 1 or more worker processes")
    if workers is None or workers > 1:
        # start the workers now so that their imports overlap the header scan below
        # (from a thread: with the fork server, starting a worker waits for its module preload)
        n_workers = workers or n_cpu
        # each worker gets its share of the CPUs (worker_pool), and this process (which only
        # measures should the pool break) one thread: no oversubscription, and one
        # measurement's working memory per process
        executor = worker_pool(n_workers)
        threads_before = current_threads()
        set_threads(1)

        def start_pool() -> None:
            try:
                warm.extend(executor.submit(_warm_up, str(template), tuple(dirs)) for _ in range(n_workers))
            finally:
                with handoff:
                    started.set()
                    run = current.get("run")
                if run is not None:  # hand the pool its first series at once
                    run.top_up(executor)

        starter = threading.Thread(target=start_pool, daemon=True)
        starter.start()
    try:
        jobs, notes = discover_jobs(inputs)
        total = len(jobs)
        if progress:
            progress(0, total, None)
        out = Path(out)
        with output_folder(out, KIND_COMPARE, inputs=input_paths, overwrite=overwrite) as staging:
            tmp = staging.path
            run = _Run(jobs, (str(template), str(Path(fill)), dirs), tmp / "series", trace_memory, overlays, progress,
                       tuple(str(b) for b in bands), measure_options)
            if executor is None or total == 1:
                n_used = 1
                outcomes = run.in_process()
            else:
                n_used = min(executor._max_workers, total)  # type: ignore[attr-defined]
                with handoff:
                    current["run"] = run
                outcomes = run.with_pool(executor, started)
            ordered = [outcomes[j.number] for j in jobs]
            for o in ordered:
                if o.error_type == "OutputError":  # the folder would be incomplete: nothing is kept
                    raise OutputError(f"{out}: cannot write the results ({o.error})")
            result = _finish(ordered, tpl, fill_record, band_sets, list(bands), mapping, notes, tmp, n_used)
            result.out = out
            _write_outputs(result, tmp, report, executor if run.pool_usable and total > 1 else None)
            result.seconds = time.perf_counter() - t_start
        result.written = staging.written
    finally:
        if starter is not None:
            starter.join()
        if executor is not None:
            for w in warm:
                w.cancel()
            executor.shutdown(wait=True, cancel_futures=True)
            set_threads(threads_before)
    return result


class _Run:
    """Hands the series to the workers, one at a time each.

    Worker processes are forked from a fork server that has imported numpy, scipy,
    matplotlib and phantometry once (one to two seconds, while this process lists the
    series); the thread that starts the pool hands it its first series as soon as it is up,
    and the main process only dispatches (measuring here as well only made the workers
    slower: 13.2 s against 12.4 s for 20 series on 2 cores). Should the pool break, the main
    process measures the rest itself. At most ``workers + 1`` series are handed to the pool at
    once, so every process holds about one volume at a time.
    """

    def __init__(self, jobs, args, series_root: Path, trace_memory: bool, overlays: bool, progress, bands: tuple[str, ...] = (),
                 measure_options: dict[str, Any] | None = None) -> None:
        self.bands = bands
        self.measure_options = dict(measure_options or {})
        self.pending = list(jobs)
        self.args = args
        self.series_root = series_root
        self.trace_memory = trace_memory
        self.overlays = overlays
        self.progress = progress
        self.total = len(jobs)
        self.outcomes: dict[int, SeriesOutcome] = {}
        self.pool_usable = True
        self.in_flight: dict[Any, SeriesJob] = {}
        self.lock = threading.Lock()

    def _record(self, job: SeriesJob, outcome: SeriesOutcome) -> None:
        self.outcomes[job.number] = outcome
        if self.progress:
            self.progress(len(self.outcomes), self.total, outcome)

    def _here(self, job: SeriesJob) -> None:
        self._record(job, measure_series(job, *self.args, out_dir=str(self.series_root / job.folder_name),
                                         trace_memory=self.trace_memory, overlay=self.overlays, bands=self.bands,
                                         measure_options=self.measure_options))

    def in_process(self) -> dict[int, SeriesOutcome]:
        while self.pending:
            self._here(self.pending.pop(0))
        return self.outcomes

    def top_up(self, executor: ProcessPoolExecutor) -> None:
        """Keep ``workers + 1`` series in the pool (thread-safe)."""
        n_workers = executor._max_workers  # type: ignore[attr-defined]
        with self.lock:
            while self.pool_usable and self.pending and len(self.in_flight) < n_workers + 1:
                job = self.pending[0]
                try:
                    fut = executor.submit(measure_series, job, *self.args, out_dir=str(self.series_root / job.folder_name),
                                          trace_memory=self.trace_memory, overlay=self.overlays, bands=self.bands,
                                          measure_options=self.measure_options)
                except Exception:  # a broken pool: the rest is measured here
                    self.pool_usable = False
                    return
                self.pending.pop(0)
                self.in_flight[fut] = job

    def _harvest(self, done) -> None:
        for fut in done:
            with self.lock:
                job = self.in_flight.pop(fut)
            try:
                o = fut.result()
            except Exception as exc:  # the worker process died (e.g. out of memory)
                self.pool_usable = False
                o = SeriesOutcome(job=job, error=f"worker process failed ({type(exc).__name__}: {exc})",
                                  error_type=type(exc).__name__, internal=True)
            self._record(job, o)

    def with_pool(self, executor: ProcessPoolExecutor, started: threading.Event) -> dict[int, SeriesOutcome]:
        from concurrent.futures import FIRST_COMPLETED, wait

        while True:
            if started.is_set():
                self.top_up(executor)
            if not started.is_set():
                # the workers are being started (about a second and a half, the fork server's
                # imports): measuring here meanwhile only slows them down on a busy machine
                started.wait(0.05)
                continue
            with self.lock:
                job = self.pending.pop() if self.pending and not self.pool_usable else None
                flying = list(self.in_flight)
            if job is not None:
                self._here(job)  # from the end; the workers take from the front
                self._harvest([f for f in flying if f.done()])
                continue
            if not flying:
                with self.lock:
                    if not self.pending and not self.in_flight:
                        return self.outcomes
                continue
            done, _ = wait(flying, return_when=FIRST_COMPLETED)
            self._harvest(done)


def _finish(
    outcomes: list[SeriesOutcome],
    tpl: Any,
    fill_record: Any,
    band_sets: list[Any],
    band_names: list[str],
    mapping: dict[str, str] | None,
    notes: list[str],
    tmp: Path,
    n_workers: int,
) -> ComparisonResult:
    warnings_out = list(notes)
    warnings_out += assign_labels(outcomes, mapping)
    ranking = rank_settings([(o.label, o.job.number, o.job.series_uid, o.rows) for o in outcomes if o.ok])
    return ComparisonResult(
        out=tmp,
        outcomes=outcomes,
        ranking=ranking,
        template_name=tpl.name,
        template_title=tpl.title,
        fill=fill_record.to_dict(),
        band_names=band_names,
        warnings=warnings_out,
        sphere_diameters_mm={s.name: float(s.diameter_mm) for s in tpl.spheres},
        hot_spheres={s.name: not fill_record.is_cold(s.name) for s in tpl.spheres},
        workers=n_workers,
        template=tpl,
    )


def summary_json(result: ComparisonResult) -> dict[str, Any]:
    """The ``summary.json`` document."""
    return {
        "tool": {"name": "phantometry", "version": __version__},
        "caution": CAUTION,
        "template": result.template_name,
        "fill_record": result.fill,
        "bands": result.band_names,
        "workers": result.workers,
        "series_total": len(result.outcomes),
        "series_failed": len(result.failed),
        "warnings": result.warnings,
        "series": [
            {
                "setting": o.job.number,
                "label": o.label,
                "status": "measured" if o.ok else "error",
                "series_uid": o.job.series_uid,
                "series_number": o.job.series_number,
                "series_description": o.job.series_description,
                "source": o.job.where,
                "reconstruction": (o.series or {}).get("reconstruction"),
                "error": o.error,
                "error_type": o.error_type,
                "warnings": o.warnings,
                "folder": f"series/{o.job.folder_name}" if o.ok else None,
                "seconds": round(o.seconds, 3),
            }
            for o in result.outcomes
        ],
        "ranking": [
            {"rank": e.rank, "setting": e.number, "label": e.label, "meets_all_bands": e.meets_all_bands,
             "rows_checked": e.checked, "rows_failed": e.failed, "distance_from_band_centres": e.distance, "reasons": e.reasons}
            for e in result.ranking
        ],
    }


def _write_outputs(result: ComparisonResult, tmp: Path, report: bool, executor: ProcessPoolExecutor | None = None) -> None:
    from .fill import FillRecord
    from .phantoms import kind_of
    from .phantoms.base import ComparedSetting

    (tmp / "comparison.csv").write_text(comparison_csv(result.outcomes), encoding="utf-8")
    (tmp / "ranking.csv").write_text(ranking_csv(result), encoding="utf-8")
    (tmp / "summary.json").write_text(to_json(summary_json(result)), encoding="utf-8")
    settings = [ComparedSetting(o.job.number, o.label, o.rows) for o in result.succeeded]
    if settings:
        tpl = result.template
        charts = kind_of(tpl).comparison_charts(tpl, FillRecord.from_dict(result.fill), settings)
        result.charts = [(c.file_name, c.caption) for c in charts]
        futures = []
        if executor is not None:  # the workers are warm: draw the charts side by side
            try:
                futures = [executor.submit(c.function, *c.args, tmp / c.file_name, **c.kwargs) for c in charts]
                for f in futures:
                    f.result()
            except Exception:
                futures = []
        if not futures:
            for c in charts:
                c.draw(tmp)
    if report:
        from .report import write_compare_report

        write_compare_report(result, tmp / "report.html", folder=tmp)


# ============================================================================== synthetic family
def write_synthetic_family(
    out_dir: str | os.PathLike,
    settings: Sequence[dict[str, Any]],
    *,
    voxel_mm: float = 3.0,
    matrix: tuple[int, int, int] | None = None,
    rotation_deg: tuple[float, float, float] = (1.0, -1.0, 20.0),
    shift_mm: tuple[float, float, float] = (3.0, -2.0, 1.0),
    sphere_ratio: float = 4.0,
    cold: Sequence[str] = (),
    seed: int = 0,
) -> dict[str, Any]:
    """Write one invented phantom acquisition "reconstructed" several ways, one DICOM series each.

    The phantom is rasterised once (:func:`phantometry.synth.rasterise`); every setting blurs it
    with its own Gaussian PSF and adds correlated noise (the model of :mod:`phantometry.synth`).
    By default every setting filters the *same* white-noise realisation (``seed``), as
    reconstructions of one acquisition share its counts. All series share the Study and Frame
    of Reference UIDs, as reconstructions of one acquisition do.

    Parameters
    ----------
    out_dir : path
        Folder; series go to ``out_dir/recon_NN/``, the fill record to ``out_dir/fill.yaml``.
    settings : list of dict
        Each with ``fwhm_mm`` (PSF FWHM, mm) and ``noise_cv`` (background voxel CV); optional
        ``seed`` (default: the common ``seed``), ``method`` (Reconstruction Method, e.g. ``"OSEM 3i21s"``), ``filter``
        (Convolution Kernel) and ``description``.
    voxel_mm, matrix, rotation_deg, shift_mm, sphere_ratio, cold
        As in :class:`phantometry.synth.SynthSpec`.
    seed : int
        Seed of the white noise shared by the settings.

    Returns
    -------
    dict
        ``fill`` (path), ``series`` (list of folders), ``truth`` (the synthesizer's truth).
    """
    import dataclasses

    import numpy as np
    import yaml

    from .io.dicom import parse_iterations_subsets
    from .io.dicom_write import write_dicom_series
    from .synth import SynthSpec, auto_matrix, correlated_unit_noise, gaussian_blur, phantom_pose, synthesize
    from .templates import load_template
    from .volume import Reconstruction as _Recon

    spec = SynthSpec(voxel_mm=(voxel_mm,) * 3, matrix=matrix, psf_fwhm_mm=0.0, noise_cv=0.0, rotation_deg=rotation_deg,
                     shift_mm=shift_mm, sphere_ratio=sphere_ratio, cold=list(cold))
    if matrix is None:  # leave room for the widest PSF of the family
        widest = SynthSpec(**{**spec.__dict__, "psf_fwhm_mm": max(float(s["fwhm_mm"]) for s in settings)})
        tpl = load_template(spec.phantom)
        spec.matrix = auto_matrix(widest, tpl, *phantom_pose(widest, tpl))
    base = synthesize(spec)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    truth_img = base.volume.data.astype(np.float64)
    bg = base.truth["background_bq_ml"]
    spacing = base.volume.spacing_mm
    from pydicom.uid import generate_uid

    study_uid, frame_uid = generate_uid(), generate_uid()
    folders = []
    for n, s in enumerate(settings, start=1):
        fwhm, cv = float(s["fwhm_mm"]), float(s["noise_cv"])
        img = gaussian_blur(truth_img, fwhm, spacing)
        if cv > 0:
            rng = np.random.default_rng(int(s.get("seed", seed)))
            img += cv * np.sqrt(np.clip(img, 0, None) * bg) * correlated_unit_noise(img.shape, fwhm, spacing, rng)
        method_text = s.get("method", "OSEM 3i21s")
        method, iters, subsets = parse_iterations_subsets(method_text)
        recon = _Recon(method=method, iterations=iters, subsets=subsets, filter=s.get("filter", f"Gauss {fwhm:g}mm"),
                       matrix=base.volume.reconstruction.matrix, voxel_size_mm=base.volume.reconstruction.voxel_size_mm)
        vol = dataclasses.replace(base.volume, data=img.astype(np.float32), reconstruction=recon)
        folder = out / f"recon_{n:02d}"
        write_dicom_series(vol, folder, series_number=n, study_uid=study_uid, frame_of_reference_uid=frame_uid,
                           series_description=s.get("description", f"QC phantom recon {n} (synthetic)"),
                           patient_weight_kg=10.0)
        folders.append(folder)
        del img
    fill_path = out / "fill.yaml"
    fill_path.write_text(yaml.safe_dump(base.fill_record, sort_keys=False), encoding="utf-8")
    return {"fill": fill_path, "series": folders, "truth": base.truth}


__all__ = [
    "EXIT_SERIES_FAILED",
    "SeriesJob",
    "SeriesOutcome",
    "RankEntry",
    "ComparisonResult",
    "compare",
    "discover_jobs",
    "load_labels",
    "assign_labels",
    "measure_series",
    "rank_settings",
    "comparison_csv",
    "read_comparison_csv",
    "ranking_csv",
    "summary_json",
    "write_synthetic_family",
]
