"""What a worker process of a comparison runs: load one series, measure it with the shared
template, fill record and band sets (each parsed once per process), write its result folder,
and return a :class:`~phantometry.ranking.SeriesOutcome` (never raising for a bad series)."""

from __future__ import annotations

import os
import time
import warnings as _warnings
from pathlib import Path
from typing import Any, Sequence

from ..errors import OutputError, PhantometryError
from ..ranking import SeriesJob, SeriesOutcome

#: Modules a worker needs; imported once by the fork server (or by each spawned worker at start).
#: ``phantometry.compare.worker`` brings its package (all of :mod:`phantometry.compare`, as the
#: single ``compare`` module did before) and :mod:`phantometry.ranking`; the rest is measuring.
_WORKER_MODULES = ["phantometry.compare.worker", "phantometry.measure", "phantometry.harmonise", "phantometry.noise", "phantometry.metrics.resolution", "phantometry.io.dicom",
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
    from ..phantoms import load_template

    key = ("template", template, templates_dirs, _mtime(template))
    if key not in _CACHE:
        _CACHE[key] = load_template(template, list(templates_dirs))
    return _CACHE[key]


def _cached_fill(fill_path: str):
    """The fill record, parsed once per process (and again when the file changes)."""
    from ..fill import load_fill_record

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
    from ..figures import _plt

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
    harmonise: dict[str, Any] | None = None,
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
    harmonise : dict, optional
        Also find the setting's harmonising post-filter against ``bands``
        (:func:`phantometry.harmonise.harmonise_analysis`; the dict holds its keyword
        arguments, e.g. ``{}``): ``outcome.harmonisation`` is set, the rows of
        :func:`phantometry.harmonise.harmonisation_rows` join ``outcome.rows``, and the series
        folder gets harmonisation.json, harmonisation.csv (and harmonisation.png with ``overlay``).

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
            _measure_into(outcome, job, template, fill_path, templates_dirs, out_dir, overlay, tuple(bands), measure_options, harmonise)
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
    harmonise: dict[str, Any] | None = None,
) -> None:
    from ..measure import judge, measure_volume, write_results

    tpl = _cached_template(template, tuple(templates_dirs))
    fill = _cached_fill(fill_path)
    from ..sitetime import site_clock

    clock = site_clock(fill, (measure_options or {}).get("timezone"))
    if job.kind == "nifti":
        from ..io.nifti import load_nifti

        volume = load_nifti(job.paths[0], site_clock=clock)
    else:
        from ..io.dicom import load_dicom

        volume = load_dicom([Path(p) for p in job.paths], series=job.series_uid, site_clock=clock)
    outcome.volume_bytes = int(volume.data.nbytes)
    outcome.series = volume.summary()
    outcome.reconstruction = volume.reconstruction
    analysis = measure_volume(volume, tpl, fill, where=job.where, **(measure_options or {}))
    if bands:
        judge(analysis, _cached_bands(bands))
    outcome.rows = analysis.rows
    outcome.warnings.extend(analysis.warnings)
    outcome.localisation = analysis.placement.as_dict()
    outcome.key_metrics = analysis.key_metrics()
    outcome.metric_titles = analysis.metric_titles()
    h = None
    if harmonise is not None and bands:
        from ..harmonise import harmonisation_rows, harmonise_analysis, summary

        try:
            h = harmonise_analysis(analysis, _cached_bands(bands), **harmonise)
        except PhantometryError as exc:  # the measurement stands; the filter search says why it failed
            outcome.harmonisation = {"error": str(exc).replace("\n", " ")}
            outcome.warnings.append(f"harmonising filter not found: {outcome.harmonisation['error']}")
        else:
            outcome.harmonisation = summary(h)
            outcome.rows = list(analysis.rows) + harmonisation_rows(h)
            outcome.warnings.extend(w for w in h.warnings if w not in outcome.warnings)
    if out_dir is not None:
        folder = Path(out_dir)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            write_results(analysis, folder, overlay=overlay, pictures=False)
            if h is not None:
                from ..harmonise import write_harmonisation

                write_harmonisation(h, folder, picture=overlay)
        except OSError as exc:  # no space, file-size limit ...: the whole comparison stops (see compare)
            if exc.errno is None:
                raise
            raise OutputError(f"series/{folder.name}: {exc.strerror or os.strerror(exc.errno)}") from None


def _load_bands(names: Sequence[str], template: Any = None) -> list[Any]:
    """Band sets by name or file; checked against the template when one is given."""
    if not names:
        return []
    from ..bands import check_band_set, load_band_set

    sets = [load_band_set(n) for n in names]
    if template is not None:
        from ..phantoms import known_metrics

        known = known_metrics(template)
        for bs in sets:
            check_band_set(bs, template.name, known)
    return sets


__all__ = ["measure_series"]
