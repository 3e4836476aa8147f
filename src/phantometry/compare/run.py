"""Running a comparison: the pool of worker processes, handing them the series, and
:func:`compare` itself (check the inputs, discover, measure, label, rank, write)."""

from __future__ import annotations

import multiprocessing
import os
import threading
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Sequence

from ..errors import InputError, OutputError
from ..ranking import ComparisonResult, SeriesJob, SeriesOutcome, rank_settings
from ..threads import current_threads, set_threads
from .discover import discover_jobs
from .labels import assign_labels, load_labels
from .worker import _WORKER_MODULES, _load_bands, _warm_up, measure_series
from .write import write_files

if TYPE_CHECKING:  # pragma: no cover
    from ..fill import FillRecord
    from ..templates import Template

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
    harmonise: bool | dict[str, Any] = False,
    timezone: str | None = None,
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
    harmonise : bool or dict
        Also find every setting's harmonising Gaussian post-filter against ``bands``
        (:func:`phantometry.harmonise.harmonise_analysis`; a dict gives its keyword arguments,
        e.g. ``{"max_fwhm_mm": 8}``): the passing range and recommendation join
        comparison.csv (ROI ``harmonisation``), ranking.csv, the ranking table and the report,
        and each series folder gets harmonisation.json and harmonisation.csv. Needs ``bands``.
    timezone : str, optional
        The site's IANA zone (``--timezone``), one for all series: scanner times written
        without a UTC offset are read in it (:mod:`phantometry.sitetime`).

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
    from ..fill import load_fill_record
    from ..outputs import KIND_COMPARE, check_output_folder, existing_inputs, output_folder
    from ..phantoms import load_template

    t_start = time.perf_counter()
    dirs = [str(d) for d in (templates_dirs or [])]
    input_paths = existing_inputs(inputs, fill, template, list(bands), labels, dirs)
    check_output_folder(out, KIND_COMPARE, inputs=input_paths, overwrite=overwrite)
    if timezone is not None:
        from ..timeutil import zone_from_name

        zone_from_name(timezone)  # refused here, before any series is measured
        measure_options = {**(measure_options or {}), "timezone": timezone}
    tpl = load_template(template, dirs)
    fill_record = load_fill_record(fill)
    band_sets = _load_bands(list(bands), tpl)  # refuse bad band sets before any work
    harmonise_options: dict[str, Any] | None = None
    if harmonise is not False and harmonise is not None:
        from ..harmonise import check_harmonisable

        harmonise_options = dict(harmonise) if isinstance(harmonise, dict) else {}
        check_harmonisable(tpl, list(bands), harmonise_options)
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
                       tuple(str(b) for b in bands), measure_options, harmonise_options)
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
            result.harmonised = harmonise_options is not None
            result.out = out
            write_files(result, tmp, report, executor if run.pool_usable and total > 1 else None)
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
                 measure_options: dict[str, Any] | None = None, harmonise: dict[str, Any] | None = None) -> None:
        self.bands = bands
        self.harmonise = harmonise
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
                                         measure_options=self.measure_options, harmonise=self.harmonise))

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
                                          measure_options=self.measure_options, harmonise=self.harmonise)
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
    tpl: Template,
    fill_record: FillRecord,
    band_sets: list[Any],
    band_names: list[str],
    mapping: dict[str, str] | None,
    notes: list[str],
    tmp: Path,
    n_workers: int,
) -> ComparisonResult:
    warnings_out = list(notes)
    warnings_out += assign_labels(outcomes, mapping)
    # ranking needs bands: without them the settings are listed by label (ranking.by_label)
    ranking = rank_settings([(o.label, o.job.number, o.job.series_uid, o.rows) for o in outcomes if o.ok]) if band_names else []
    return ComparisonResult(
        out=tmp,
        outcomes=outcomes,
        ranking=ranking,
        template_name=tpl.name,
        template_title=tpl.title,
        fill=fill_record.to_dict(),
        band_names=band_names,
        warnings=warnings_out,
        workers=n_workers,
        template=tpl,
    )


__all__ = ["ProgressCallback", "compare", "worker_pool"]
