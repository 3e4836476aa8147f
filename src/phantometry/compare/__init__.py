"""Compare reconstruction settings: measure many series of one phantom scan and rank them.

Before a reconstruction protocol goes clinical, one phantom acquisition is reconstructed many
ways (iterations, subsets, filter, point-response modelling, time of flight, matrix).
:func:`compare` finds every PET series in the input, measures each with the same template and
fill record (the pipeline of :mod:`phantometry.measure`, for any phantom kind) in parallel
worker processes, applies the acceptance bands, and writes:

``comparison.csv``
    The rows of ``measurements.csv`` of every series, with the columns of
    :data:`phantometry.results.CSV_COLUMNS` followed by ``label`` (the setting's label).
``ranking.csv``
    With bands: one line per setting, best first (see :func:`phantometry.ranking.rank_settings`),
    then the failed series. Without bands nothing is ranked and the file is not written.
``key_numbers.csv``
    One line per setting sorted by label, failed series last: each key number of the phantom
    kind (:meth:`phantometry.phantoms.base.Analysis.key_metrics`) with its standard uncertainty.
``summary.json``
    Inputs, labels, per-series status (error message of a failed series), warnings, whether
    the settings were ranked, the ranking, and the key numbers by setting.
the phantom kind's charts
    :meth:`phantometry.phantoms.base.PhantomKind.comparison_charts` (the body phantom:
    ``contrast_noise.png``, percent contrast against background variability per sphere, one
    point per setting with standard-uncertainty bars; ``recovery_curves.png``, recovery
    coefficients of all settings over the bands).
``series/series_NNN/``
    For every series the result folder ``measure`` would write (CSV, JSON, overlay).
``report.html``
    With ``report=True``: the self-contained report (:mod:`phantometry.report`).

Modules
-------
:mod:`.discover` finds the series (:func:`discover_jobs`), :mod:`.labels` names the settings
(:func:`load_labels`, :func:`assign_labels`), :mod:`.worker` is what a worker process runs
(:func:`measure_series`), :mod:`.run` the pool and :func:`compare`, :mod:`.write` the
comparison's own files. The result types and the ranking are in :mod:`phantometry.ranking`,
which the outputs read.

Workers
-------
A :class:`concurrent.futures.ProcessPoolExecutor` with the ``forkserver`` start method (``spawn``
where that is not available). A worker is given one series at a time and loads only that
series, so memory stays bounded by about one volume per worker; the main process keeps only
the measurement rows (it measures series itself only should the pool break). The acceptance
bands are applied in the worker, so each series folder carries its verdicts. A series that
fails (damaged file, wrong phantom, phantom not found) is recorded with its error and does not
stop the others.

Labels
------
By default a setting is labelled from its reconstruction attributes (DICOM Reconstruction
Method with iterations and subsets, Convolution Kernel; matrix and voxel size when they differ
between the series; the Series Description, then the Series Number, when labels would still
collide). A ``labels`` file (YAML mapping or two-column CSV ``series,label``) maps a Series
Instance UID, a Series Number or a NIfTI file name to a label.
"""

from __future__ import annotations

from ..ranking import (
    EXIT_SERIES_FAILED,
    RANKING_COLUMNS,
    ComparisonResult,
    RankEntry,
    SeriesJob,
    SeriesOutcome,
    comparison_csv,
    rank_settings,
    ranking_csv,
    read_comparison_csv,
)
from .discover import discover_jobs
from .labels import assign_labels, load_labels
from .run import ProgressCallback, compare, worker_pool
from .worker import measure_series
from .write import summary_json

__all__ = [
    "EXIT_SERIES_FAILED",
    "RANKING_COLUMNS",
    "SeriesJob",
    "SeriesOutcome",
    "RankEntry",
    "ComparisonResult",
    "ProgressCallback",
    "compare",
    "worker_pool",
    "discover_jobs",
    "load_labels",
    "assign_labels",
    "measure_series",
    "rank_settings",
    "comparison_csv",
    "read_comparison_csv",
    "ranking_csv",
    "summary_json",
]
