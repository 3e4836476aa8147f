"""Harmonising filter: which Gaussian post-filter brings a reconstruction inside the bands.

Sites that reconstruct with resolution modelling and few post-filters get recovery
coefficients above harmonisation bands; to take part in multicentre studies they add a
harmonised reconstruction, usually the same one with an extra Gaussian post-filter. The
published approach finds that filter on a phantom scan: filter the high-resolution
reconstruction until its phantom recovery coefficients meet the specification (Lasnon et al.,
Eur J Nucl Med Mol Imaging 2013;40:985-996; Quak et al., Eur J Nucl Med Mol Imaging 2015,
harmonisation of 517 patients' scans with filters found on the NEMA NU 2 phantom; Kaalep et
al., Eur J Nucl Med Mol Imaging 2018;45:1344-1361, the updated specification). A Gaussian
applied to the image composes with the system's point response, so one phantom scan answers
it for every filter width.

Method
------
1. The scan is analysed once, unfiltered (:func:`phantometry.measure.measure_volume`, the
   noise model and the effective-resolution fit included; no uncertainties yet): the phantom
   is located and every ROI placed. The band sets are checked against the template.
2. For every filter of the sweep (FWHM ``0, step, ..., max``): the image is filtered
   (:class:`phantometry.postfilter.PostFilter`, separable, anisotropic voxels in mm) *only on
   the boxes the banded metrics read* (:attr:`phantometry.phantoms.base.Reread.boxes`), into a
   zero image of the volume's shape (the system allocates only the pages written), and every
   banded metric is read again there with the ROIs where the analysis placed them (the
   spheres do not move): :meth:`phantometry.phantoms.base.Analysis.reread`. The values equal
   those of the same analysis on the whole filtered image (tested).
3. Uncertainties: the filter's effect on the noise autocovariance is known exactly
   (:func:`phantometry.postfilter.filtered_noise`); the recovery coefficients' Monte Carlo and
   the ROI means' quadratic forms of the body kind run with it
   (:meth:`phantometry.phantoms.body.BodyReread.uncertainties`) at every second millimetre
   of the sweep (:data:`UNCERTAINTY_NODE_STEP_MM`), its last filter and the recommended one;
   between them a monotone cubic (PCHIP) interpolates (the standard uncertainty changes
   smoothly with the filter; ``uncertainty_from`` in the CSV says which).
4. Verdicts: every band set's limits as ``measure --bands`` applies them
   (:func:`phantometry.bands.apply_bands`; verdicts of ROI sets the image does not confirm are
   withheld). A filter *passes* when every banded value passes every band set.
5. The recommendation: among the passing filters, the one whose banded values lie closest to
   the band centres, by the root-mean-square of ``(value - centre) / half-width`` over every
   two-sided band entry (0: all at the centre, 1: on average at a limit). The passing range is
   ``[lowest, highest]`` passing filter (with the runs listed should they not be contiguous);
   at each end the metrics failing at the next filter outside limit it. Each band set gets its
   own range and recommendation too.

Assumption and caution
----------------------
The filter modelled is a shift-invariant Gaussian applied *after* reconstruction. A scanner's
post-filter is such a filter, but iterative reconstructions are not linear: the same filter
inside or after another reconstruction, another count level or another object can give other
values. The recommendation is a starting point; the final check must be a real reconstruction
with that filter on the scanner, measured like any scan (``phantometry measure --bands``).
Filters narrower than about one voxel are represented by a sampled kernel with less variance
than nominal (:attr:`phantometry.postfilter.PostFilter.variance_mm2`); a warning says so.
"""

from __future__ import annotations

import dataclasses
import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from . import __version__
from .bands import BandEntry, BandSet, apply_bands, check_band_set, load_band_set, unit_of_metric
from .errors import InputError
from .fill import FillRecord
from .measure import judge, load_image, measure_volume, prepare_inputs
from .noise import NoiseModel
from .phantoms import kind_of, kinds
from .phantoms.base import Analysis, Reread
from .postfilter import FWHM_PER_SIGMA, PostFilter, check_filterable, filtered_noise
from .results import CAUTION, Measurement, _fmt, to_json
from .templates import Template
from .threads import fft_workers, threads
from .volume import Volume

__all__ = [
    "SCHEMA_VERSION",
    "DEFAULT_MAX_FWHM_MM",
    "DEFAULT_STEP_MM",
    "FILTER_CAUTION",
    "FilterStep",
    "PassingRange",
    "Harmonisation",
    "filter_grid",
    "check_harmonisable",
    "harmonise_analysis",
    "harmonise_volume",
    "harmonise",
    "harmonisation_json",
    "harmonisation_csv",
    "harmonisation_picture",
    "harmonisation_rows",
    "write_harmonisation",
    "filtered_volume",
    "write_filtered_image",
]

#: Version of the harmonisation.json layout (raised when a key changes meaning or goes away).
SCHEMA_VERSION = 1
#: Widest filter of the sweep by default (mm FWHM), and its step.
DEFAULT_MAX_FWHM_MM = 10.0
DEFAULT_STEP_MM = 0.25
#: Widest filter accepted (mm): beyond, a phantom's spheres blur into the background.
MAX_FWHM_LIMIT_MM = 40.0
#: Most filters in one sweep.
MAX_FILTERS = 401
#: Uncertainties are simulated at every multiple of this FWHM (mm) and interpolated between:
#: interpolating from 2 mm differs from simulating at the very filter by about as much as two
#: simulations differ (median 6 % at 100 draws, as from 1 mm; measured on a 4 mm FWHM scan).
UNCERTAINTY_NODE_STEP_MM = 2.0
#: Filters narrower than this many voxels (SD, on some axis) are not represented well by a
#: sampled kernel (its variance falls short of the nominal one).
SUBVOXEL_SIGMA = 0.7
#: Output file names.
JSON_NAME = "harmonisation.json"
CSV_NAME = "harmonisation.csv"
PICTURE_NAME = "harmonisation.png"
FILTERED_DICOM = "filtered"
FILTERED_NIFTI = "filtered.nii.gz"
#: Columns of harmonisation.csv (new columns are only ever appended).
#: ``applied_fwhm_mm``: the width the sampled kernel applies (FWHM of a Gaussian of its
#: variance): the nominal one for filters wider than about a voxel, less for narrower ones.
CSV_COLUMNS = ["filter_fwhm_mm", "roi", "metric", "value", "unit", "uncertainty", "uncertainty_from", "band", "band_low",
               "band_high", "verdict", "note", "applied_fwhm_mm"]
#: The caution every output of a harmonisation carries.
FILTER_CAUTION = (
    "The filter is a shift-invariant Gaussian applied after reconstruction. Iterative reconstructions are not linear: "
    "reconstruct the phantom on the scanner with this post-filter and measure that image before using it."
)

Key = tuple[str, str]


# ============================================================================== result types
@dataclass
class FilterStep:
    """One filter of the sweep: the banded rows judged, and whether it passes.

    Attributes
    ----------
    fwhm_mm : nominal FWHM of the filter (0: no filter).
    variance_mm2 : the variance its sampled kernel applies (mean over the axes).
    rows : one judged :class:`~phantometry.results.Measurement` per banded (roi, metric).
    uncertainty_from : key -> ``simulation`` (computed at this filter), ``interpolated`` or
        ``none``.
    passes : every banded value passes every band set.
    passes_by_set : band set name -> its entries all pass.
    distance : root-mean-square normalised distance from the band centres over every
        two-sided entry of every set (None without one).
    distance_by_set : the same per band set.
    """

    fwhm_mm: float
    variance_mm2: float
    rows: list[Measurement]
    uncertainty_from: dict[Key, str] = field(default_factory=dict)
    passes: bool = False
    passes_by_set: dict[str, bool] = field(default_factory=dict)
    distance: float | None = None
    distance_by_set: dict[str, float | None] = field(default_factory=dict)

    @property
    def applied_fwhm_mm(self) -> float:
        """FWHM (mm) of the Gaussian whose variance the sampled kernel applies."""
        return FWHM_PER_SIGMA * math.sqrt(max(self.variance_mm2, 0.0))

    def row(self, key: Key) -> Measurement:
        for r in self.rows:
            if (r.roi, r.metric) == key:
                return r
        raise KeyError(key)


@dataclass
class RangeEnd:
    """One end of a passing range and what limits it.

    ``beyond_mm`` is the first filter outside the range on that side (None at the sweep's
    end); ``limits`` the banded values failing there, the most outside first.
    """

    fwhm_mm: float
    beyond_mm: float | None
    limits: list[dict[str, Any]]
    text: str

    def as_dict(self) -> dict[str, Any]:
        return {"fwhm_mm": self.fwhm_mm, "next_filter_mm": self.beyond_mm, "limited_by": self.limits, "text": self.text}


@dataclass
class PassingRange:
    """The filters meeting a set of bands (all band sets, or one).

    Attributes
    ----------
    low_mm, high_mm : lowest and highest passing FWHM (None when none passes).
    intervals : the runs of consecutive passing filters, ``[(low, high), ...]``.
    recommended_mm : the passing filter closest to the band centres.
    distance : its root-mean-square normalised distance from the band centres.
    reason : why no filter passes (None when one does).
    low_end, high_end : what limits the range at each end.
    """

    low_mm: float | None = None
    high_mm: float | None = None
    intervals: list[tuple[float, float]] = field(default_factory=list)
    recommended_mm: float | None = None
    distance: float | None = None
    reason: str | None = None
    low_end: RangeEnd | None = None
    high_end: RangeEnd | None = None

    @property
    def found(self) -> bool:
        return self.low_mm is not None

    def as_dict(self) -> dict[str, Any]:
        return {
            "recommended_fwhm_mm": self.recommended_mm,
            "passing_range_mm": [self.low_mm, self.high_mm] if self.found else None,
            "passing_range_reason": self.reason,
            "passing_intervals_mm": [list(iv) for iv in self.intervals],
            "distance_from_band_centres": None if self.distance is None else round(self.distance, 4),
            "lower_end": self.low_end.as_dict() if self.low_end else None,
            "upper_end": self.high_end.as_dict() if self.high_end else None,
        }


@dataclass
class Harmonisation:
    """Everything a harmonising-filter sweep found (see the module notes)."""

    analysis: Analysis
    band_sets: list[BandSet]
    keys: list[Key]
    steps: list[FilterStep]
    overall: PassingRange
    by_set: dict[str, PassingRange]
    nodes_mm: list[float]
    n_draws: int | None
    warnings: list[str] = field(default_factory=list)
    #: where the filtered image was written (relative to the folder), and its format
    filtered_image: dict[str, Any] | None = None
    #: the result folder written (phantometry.outputs.WrittenFolder)
    written: Any = None

    @property
    def fwhms(self) -> list[float]:
        return [s.fwhm_mm for s in self.steps]

    @property
    def max_fwhm_mm(self) -> float:
        return self.steps[-1].fwhm_mm

    @property
    def step_mm(self) -> float:
        return self.steps[1].fwhm_mm - self.steps[0].fwhm_mm if len(self.steps) > 1 else 0.0

    @property
    def recommended(self) -> FilterStep | None:
        if self.overall.recommended_mm is None:
            return None
        return self.steps[self.fwhms.index(self.overall.recommended_mm)]


# ============================================================================== the sweep
def filter_grid(max_fwhm_mm: float = DEFAULT_MAX_FWHM_MM, step_mm: float = DEFAULT_STEP_MM) -> list[float]:
    """The sweep's filter widths (mm FWHM): ``0, step, 2 step, ...`` up to ``max_fwhm_mm``.

    Raises
    ------
    InputError
        A width or step that is not a positive number, a maximum above
        :data:`MAX_FWHM_LIMIT_MM`, a step above the maximum, or more than :data:`MAX_FILTERS`
        filters.
    """
    mx, st = float(max_fwhm_mm), float(step_mm)
    if not (math.isfinite(mx) and mx > 0):
        raise InputError(f"--max-fwhm {max_fwhm_mm:g}: give the widest filter to try as a positive number of mm, e.g. 10")
    if mx > MAX_FWHM_LIMIT_MM:
        raise InputError(f"--max-fwhm {mx:g}: at most {MAX_FWHM_LIMIT_MM:g} mm (wider filters blur the spheres into the background)")
    if not (math.isfinite(st) and st > 0):
        raise InputError(f"--step {step_mm:g}: give the step between filters as a positive number of mm, e.g. 0.25")
    if st > mx:
        raise InputError(f"--step {st:g}: larger than --max-fwhm {mx:g}; give a smaller step")
    n = int(math.floor(mx / st + 1e-9)) + 1
    if n > MAX_FILTERS:
        raise InputError(f"--step {st:g} with --max-fwhm {mx:g} makes {n} filters (at most {MAX_FILTERS}); give a larger step")
    return [round(i * st, 9) for i in range(n)]


def _nodes(fwhms: Sequence[float], node_step_mm: float) -> list[int]:
    """Indices of the filters whose uncertainties are simulated: the first, the last and the
    one nearest every multiple of ``node_step_mm``."""
    arr = np.asarray(fwhms, float)
    out = {0, len(arr) - 1}
    for m in np.arange(0.0, arr[-1] + 1e-9, node_step_mm):
        out.add(int(np.argmin(np.abs(arr - m))))
    return sorted(out)


class _Worker:
    """One thread's zero image of the volume's shape, into which filtered boxes are written."""

    def __init__(self, volume: Volume) -> None:
        self.data = np.zeros(volume.shape, np.float32)  # pages are allocated only where written
        self.volume = volume.with_data(self.data)


def _filtered_reading(volume: Volume, reread: Reread, post_filter: PostFilter, noise: NoiseModel | None, n_draws: int | None,
                      local: threading.local, with_uncertainties: bool) -> tuple[dict[Key, float], dict[Key, float | None] | None]:
    """Filter the boxes, read the values (and their uncertainties) at one filter."""
    w = getattr(local, "worker", None)
    if w is None:
        w = local.worker = _Worker(volume)
    for box in reread.boxes:
        w.data[box] = post_filter.filter_box(volume.data, box)
    values, state = reread.read(w.volume, post_filter.variance_mm2)
    us = None
    if with_uncertainties and noise is not None:
        us = reread.uncertainties(w.volume, filtered_noise(noise, post_filter), post_filter.variance_mm2, state, n_draws=n_draws)
    return values, us


def _run_filters(volume: Volume, reread: Reread, filters: list[PostFilter], tasks: list[tuple[int, bool]], noise: NoiseModel | None,
                 n_draws: int | None) -> dict[int, tuple[dict[Key, float], dict[Key, float | None] | None]]:
    """Run ``(filter index, with uncertainties)`` tasks, in threads (each thread one FFT
    worker and single-threaded BLAS; numpy and the FFTs release the interpreter lock)."""
    from threadpoolctl import threadpool_limits

    local = threading.local()
    n_threads = max(1, min(fft_workers(), len(tasks)))

    def run(task: tuple[int, bool]):
        i, with_u = task
        with threads(1):
            return i, _filtered_reading(volume, reread, filters[i], noise, n_draws, local, with_u)

    with threadpool_limits(limits=1, user_api="blas"):
        # the expensive tasks (with a simulation) first, so the threads end together
        order = sorted(tasks, key=lambda t: (not t[1], t[0]))
        if n_threads == 1:
            return dict(run(t) for t in order)
        with ThreadPoolExecutor(n_threads) as pool:
            return dict(pool.map(run, order))


def _interpolate(xs: Sequence[float], ys: Sequence[float | None], at: Sequence[float]) -> list[float | None]:
    """Monotone cubic (PCHIP) interpolation of the node values; None where nodes lack a value."""
    pts = [(x, y) for x, y in zip(xs, ys) if y is not None and math.isfinite(y)]
    if not pts:
        return [None] * len(at)
    if len(pts) == 1:
        return [pts[0][1]] * len(at)
    from scipy.interpolate import PchipInterpolator

    px, py = np.array(pts).T
    out = PchipInterpolator(px, py, extrapolate=True)(np.asarray(at, float))
    return [float(max(v, 0.0)) for v in out]


def _judge_step(analysis: Analysis, band_sets: Sequence[BandSet], keys: list[Key], values: dict[Key, float],
                uncertainties: dict[Key, float | None], units: dict[Key, str]) -> tuple[list[Measurement], list[str]]:
    """The banded rows of one filter, judged as ``measure --bands`` judges them."""
    proto = analysis.rows[0] if analysis.rows else None
    measured = analysis.values()

    def note(roi: str, metric: str) -> str | None:
        if (roi, metric) in measured:
            return None
        if metric.startswith("rc_") and analysis.fill.is_cold(roi):
            return "not measured: the insert is cold (no recovery coefficient)"
        return "not measured"

    rows = [Measurement(series_uid=proto.series_uid if proto else analysis.volume.series_uid,
                        acquired_at=proto.acquired_at if proto else None,
                        template=analysis.template.name, roi=roi, metric=metric, value=float(values.get((roi, metric), math.nan)),
                        unit=units[(roi, metric)], uncertainty=uncertainties.get((roi, metric)), note=note(roi, metric))
            for roi, metric in keys]
    judged, warns = apply_bands(rows, band_sets, fill=analysis.fill)
    doubtful = {key: c for c in analysis.placement_checks if not c.confirmed for key in c.rows}
    for i, r in enumerate(judged):
        check = doubtful.get((r.roi, r.metric))
        if check is not None and r.verdict in ("pass", "fail"):
            extra = f"verdict withheld: {check.roi_set} ROIs not confirmed in the image ({check.note or 'see placement_quality'})"
            judged[i] = dataclasses.replace(r, verdict="n/a", note=extra if not r.note else f"{r.note}; {extra}")
    order = {k: i for i, k in enumerate(keys)}
    judged.sort(key=lambda r: order.get((r.roi, r.metric), len(order)))
    return judged, warns


def _entry_distance(e: BandEntry, value: float) -> float | None:
    if e.low is None or e.high is None or not e.high > e.low or not math.isfinite(value):
        return None
    return (value - 0.5 * (e.low + e.high)) / (0.5 * (e.high - e.low))


def _rms(ds: list[float]) -> float | None:
    return math.sqrt(sum(d * d for d in ds) / len(ds)) if ds else None


def _status(step: FilterStep, entries: Sequence[tuple[BandSet, BandEntry]]) -> dict[Key, str]:
    """Per banded key: ``pass``, ``low``, ``high`` or ``n/a`` against the given entries (the
    worst of them; a withheld verdict is ``n/a``)."""
    out: dict[Key, str] = {}
    rank = {"n/a": 0, "low": 1, "high": 1, "pass": 2}
    for bs, e in entries:
        key = (e.roi, e.metric)
        r = step.row(key)
        if r.verdict == "n/a" or not math.isfinite(r.value):
            s = "n/a"
        elif e.low is not None and r.value < e.low:
            s = "low"
        elif e.high is not None and r.value > e.high:
            s = "high"
        else:
            s = "pass"
        if key not in out or rank[s] < rank[out[key]]:
            out[key] = s
    return out


def _limits_at(step: FilterStep, entries: Sequence[tuple[BandSet, BandEntry]]) -> list[dict[str, Any]]:
    """The banded values outside their bands at one filter, the most outside first."""
    out = []
    for bs, e in entries:
        r = step.row((e.roi, e.metric))
        if r.verdict == "n/a" or not math.isfinite(r.value):
            out.append({"roi": e.roi, "metric": e.metric, "value": None, "band": bs.name, "side": "n/a", "limit": None,
                        "excess": math.inf, "note": r.note})
            continue
        if e.low is not None and r.value < e.low:
            side, limit = "below", e.low
        elif e.high is not None and r.value > e.high:
            side, limit = "above", e.high
        else:
            continue
        half = 0.5 * (e.high - e.low) if e.low is not None and e.high is not None and e.high > e.low else max(abs(limit), 1e-12)
        out.append({"roi": e.roi, "metric": e.metric, "value": r.value, "band": bs.name, "side": side, "limit": limit,
                    "excess": abs(r.value - limit) / half, "note": None})
    out.sort(key=lambda d: -d["excess"])
    for d in out:
        d["excess"] = None if not math.isfinite(d["excess"]) else round(d["excess"], 4)
    return out


def _limit_text(d: dict[str, Any], at_mm: float) -> str:
    if d["side"] == "n/a":
        return f"{d['roi']} {d['metric']} cannot be judged at {at_mm:g} mm ({d['note'] or 'no value'})"
    return f"{d['roi']} {d['metric']} {d['value']:.3f} {d['side']} {d['limit']:g} ({d['band']}) at {at_mm:g} mm"


def _passing_range(steps: list[FilterStep], passes: list[bool], distances: list[float | None],
                   entries: Sequence[tuple[BandSet, BandEntry]]) -> PassingRange:
    """The passing range, its recommendation and what limits it (module notes, step 5)."""
    fwhms = [s.fwhm_mm for s in steps]
    idx = [i for i, p in enumerate(passes) if p]
    if not idx:
        return PassingRange(reason=_no_pass_reason(steps, entries))
    runs: list[tuple[int, int]] = []
    for i in idx:
        if runs and runs[-1][1] == i - 1:
            runs[-1] = (runs[-1][0], i)
        else:
            runs.append((i, i))
    scored = [(distances[i], fwhms[i], i) for i in idx if distances[i] is not None]
    if scored:
        best = min(scored)[2]
    else:  # no two-sided band: the middle of the widest run
        lo, hi = max(runs, key=lambda r: (r[1] - r[0], -r[0]))
        best = (lo + hi) // 2
    first, last = idx[0], idx[-1]
    if first == 0:
        low_end = RangeEnd(fwhms[0], None, [], "no filter needed: the image meets every band without one")
    else:
        lim = _limits_at(steps[first - 1], entries)
        low_end = RangeEnd(fwhms[first], fwhms[first - 1], lim, "narrower filters fail: " + "; ".join(_limit_text(d, fwhms[first - 1]) for d in lim[:3]))
    if last == len(steps) - 1:
        high_end = RangeEnd(fwhms[last], None, [], f"the widest filter tried ({fwhms[last]:g} mm, --max-fwhm); wider ones were not tried")
    else:
        lim = _limits_at(steps[last + 1], entries)
        high_end = RangeEnd(fwhms[last], fwhms[last + 1], lim, "wider filters fail: " + "; ".join(_limit_text(d, fwhms[last + 1]) for d in lim[:3]))
    return PassingRange(fwhms[first], fwhms[last], [(fwhms[a], fwhms[b]) for a, b in runs], fwhms[best], distances[best], None, low_end, high_end)


def _no_pass_reason(steps: list[FilterStep], entries: Sequence[tuple[BandSet, BandEntry]]) -> str:
    """Why no filter of the sweep meets every band (the first that applies of: values that
    cannot be judged, values already below their bands, values above them even at the widest
    filter, bands that are never met together)."""
    first, last = steps[0], steps[-1]
    span = f"no filter from {first.fwhm_mm:g} to {last.fwhm_mm:g} mm meets every band"
    statuses = [_status(s, entries) for s in steps]
    keys = list(statuses[0])
    never = [k for k in keys if all(st[k] == "n/a" for st in statuses)]
    if never:
        notes = []
        for k in never[:3]:
            note = first.row(k).note
            notes.append(f"{k[0]} {k[1]}" + (f" ({note})" if note else ""))
        more = f" and {len(never) - 3} more" if len(never) > 3 else ""
        return f"{span}: {', '.join(notes)}{more} cannot be judged at any filter"
    low = [k for k in keys if all(st[k] == "low" for st in statuses)]
    if low:
        lim = [d for d in _limits_at(first, entries) if (d["roi"], d["metric"]) in set(low)]
        rc = all(k[1].startswith("rc_") for k in low)
        why = ("the unfiltered image already recovers too little, and a post-filter only lowers recovery further: the "
               "reconstruction itself must change (e.g. more iterations or resolution modelling)") if rc else \
            "and no filter brings them inside"
        return f"{span}: already without a filter " + "; ".join(_limit_text(d, first.fwhm_mm) for d in lim[:3]) + f"; {why}"
    high = [k for k in keys if all(st[k] == "high" for st in statuses)]
    if high:
        lim = [d for d in _limits_at(last, entries) if (d["roi"], d["metric"]) in set(high)]
        return (f"{span}: even the widest filter leaves " + "; ".join(_limit_text(d, last.fwhm_mm) for d in lim[:3])
                + "; try a larger --max-fwhm")
    # the bands are never met together: the filter with the fewest values outside
    best = min(steps, key=lambda s: (sum(v != "pass" for v in _status(s, entries).values()),
                                     math.inf if s.distance is None else s.distance, s.fwhm_mm))
    lim = _limits_at(best, entries)
    return (f"{span}: the bands are never met together; closest at {best.fwhm_mm:g} mm, where "
            + "; ".join(_limit_text(d, best.fwhm_mm) for d in lim[:3]) + (f" (and {len(lim) - 3} more)" if len(lim) > 3 else ""))


def harmonise_analysis(
    analysis: Analysis,
    band_sets: Sequence[BandSet | str | os.PathLike],
    *,
    max_fwhm_mm: float = DEFAULT_MAX_FWHM_MM,
    step_mm: float = DEFAULT_STEP_MM,
    n_draws: int | None = None,
    node_step_mm: float = UNCERTAINTY_NODE_STEP_MM,
    uncertainties: bool = True,
) -> Harmonisation:
    """The sweep of Gaussian post-filters on an analysed scan (module notes).

    Parameters
    ----------
    analysis : an analysis of the unfiltered image by a kind that can re-read its metrics
        (:attr:`~phantometry.phantoms.base.PhantomKind.supports_reread`), with its noise model
        (for uncertainties) and, for the body kind, the effective-resolution fit.
    band_sets : band sets (objects, names or files); checked against the template.
    max_fwhm_mm, step_mm : the sweep (:func:`filter_grid`).
    n_draws : Monte Carlo draws per simulated filter (default: the body kind's).
    node_step_mm : uncertainties are simulated at multiples of this width (and interpolated).
    uncertainties : False: values and verdicts only.

    Returns
    -------
    Harmonisation
    """
    fwhms = filter_grid(max_fwhm_mm, step_mm)
    tpl = analysis.template
    kind = kind_of(tpl)
    where = analysis.volume.source or "image"
    _check_kind(tpl)
    sets = [load_band_set(b) for b in band_sets]
    if not sets:
        raise InputError("harmonise needs at least one band set (--bands NAME; phantometry bands list)")
    known = kind.known_metrics(tpl)
    for bs in sets:
        check_band_set(bs, tpl.name, known)
    sets = list({bs.name: bs for bs in reversed(sets)}.values())[::-1]  # each set once, the first given kept
    check_filterable(analysis.volume, where)
    keys: list[Key] = []
    for bs in sets:
        for e in bs.entries:
            if (e.roi, e.metric) not in keys:
                keys.append((e.roi, e.metric))
    reread = analysis.reread(keys)
    if reread is None:  # pragma: no cover - guarded by _check_kind
        raise InputError(f"template {tpl.name}: analysis kind {kind.name} cannot re-read its metrics on a filtered image")
    volume = analysis.volume
    filters = [PostFilter.for_volume(f, volume) for f in fwhms]
    noise = analysis.noise if uncertainties else None
    nodes = _nodes(fwhms, node_step_mm) if noise is not None else []
    results = _run_filters(volume, reread, filters, [(i, i in nodes) for i in range(len(fwhms))], noise, n_draws)
    units = {(r.roi, r.metric): r.unit for r in analysis.rows}
    units = {k: units.get(k, unit_of_metric(k[1])) for k in keys}
    # uncertainties: simulated at the nodes, interpolated between
    u_at: dict[int, dict[Key, float | None]] = {}
    u_from: dict[int, dict[Key, str]] = {}
    for i in range(len(fwhms)):
        u_at[i] = {}
        u_from[i] = {}
    if nodes:
        for k in keys:
            node_u = [results[n][1].get(k) if results[n][1] is not None else None for n in nodes]
            interp = _interpolate([fwhms[n] for n in nodes], node_u, fwhms)
            for i in range(len(fwhms)):
                if i in nodes:
                    u_at[i][k] = node_u[nodes.index(i)]
                    u_from[i][k] = "simulation" if u_at[i][k] is not None else "none"
                else:
                    u_at[i][k] = interp[i] if math.isfinite(results[i][0].get(k, math.nan)) else None
                    u_from[i][k] = "interpolated" if u_at[i][k] is not None else "none"
    warnings: list[str] = []
    steps = []
    for i, pf in enumerate(filters):
        rows, warns = _judge_step(analysis, sets, keys, results[i][0], u_at[i], units)
        warnings.extend(w for w in warns if w not in warnings)
        steps.append(FilterStep(pf.fwhm_mm, pf.variance_mm2, rows, {k: u_from[i].get(k, "none") for k in keys}))
    entries_all = [(bs, e) for bs in sets for e in bs.entries]
    for s in steps:
        st_all = _status(s, entries_all)
        s.passes = bool(st_all) and all(v == "pass" for v in st_all.values())
        ds_all: list[float] = []
        for bs in sets:
            ents = [(bs, e) for e in bs.entries]
            st = _status(s, ents)
            s.passes_by_set[bs.name] = all(v == "pass" for v in st.values())
            ds = [d for d in (_entry_distance(e, s.row((e.roi, e.metric)).value) for _, e in ents) if d is not None]
            s.distance_by_set[bs.name] = _rms(ds)
            ds_all += ds
        s.distance = _rms(ds_all)
    overall = _passing_range(steps, [s.passes for s in steps], [s.distance for s in steps], entries_all)
    by_set = {bs.name: _passing_range(steps, [s.passes_by_set[bs.name] for s in steps], [s.distance_by_set[bs.name] for s in steps],
                                      [(bs, e) for e in bs.entries]) for bs in sets}
    # the recommendation's uncertainties simulated at that very filter
    rec = overall.recommended_mm
    if rec is not None and noise is not None:
        i = fwhms.index(rec)
        if i not in nodes:
            res = _run_filters(volume, reread, filters, [(i, True)], noise, n_draws)[i][1] or {}
            step = steps[i]
            step.rows = [dataclasses.replace(r, uncertainty=res.get((r.roi, r.metric), r.uncertainty)) for r in step.rows]
            step.uncertainty_from = {k: ("simulation" if res.get(k) is not None else v) for k, v in step.uncertainty_from.items()}
    if analysis.noise is None and uncertainties:
        warnings.append("no uncertainties: the image's noise could not be estimated")
    warnings += _filter_warnings(volume, overall)
    if len(overall.intervals) > 1:
        warnings.append("the passing filters are not contiguous: " + ", ".join(f"{a:g}-{b:g} mm" for a, b in overall.intervals))
    return Harmonisation(analysis, sets, keys, steps, overall, by_set, [fwhms[n] for n in nodes],
                         n_draws if n_draws is not None else _default_draws(), warnings)


def _default_draws() -> int:
    from .metrics.recovery import BOOTSTRAP_DRAWS

    return BOOTSTRAP_DRAWS


def _filter_warnings(volume: Volume, overall: PassingRange) -> list[str]:
    out = []
    rec = overall.recommended_mm
    if rec is not None and rec > 0:
        pf = PostFilter.for_volume(rec, volume)
        if min(pf.sigma_vox) < SUBVOXEL_SIGMA:
            out.append(
                f"the recommended filter ({rec:g} mm) is narrow for the voxels ({' x '.join(f'{d:g}' for d in volume.spacing_mm[::-1])} mm): "
                f"sampled on this grid it acts as a Gaussian of {math.sqrt(pf.variance_mm2) * 2.0 * math.sqrt(2.0 * math.log(2.0)):.2f} mm; "
                "the scanner's own filter of that nominal width may smooth more or less"
            )
    return out


def _check_kind(template: Template) -> None:
    """Refuse a template whose kind cannot re-read its metrics on a filtered image."""
    kind = kind_of(template)
    if not kind.supports_reread:
        able = sorted(k.name for k in kinds().values() if k.supports_reread)
        raise InputError(
            f"template {template.name}: harmonise works with analysis kind {', '.join(able)} (e.g. iec-body), whose recovery "
            f"coefficients it reads again on filtered copies of the image; analysis kind {kind.name} cannot do that (yet)"
        )


def check_harmonisable(template: Template, bands: Sequence[Any], options: dict[str, Any] | None = None) -> None:
    """Refuse, before any work, a harmonisation that cannot run: a template whose kind has no
    recovery coefficients, no band set, or a sweep (``options``: ``max_fwhm_mm``, ``step_mm``)
    that is not a positive range of widths."""
    opts = dict(options or {})
    filter_grid(opts.get("max_fwhm_mm", DEFAULT_MAX_FWHM_MM), opts.get("step_mm", DEFAULT_STEP_MM))
    _check_kind(template)
    if not list(bands):
        raise InputError("--harmonise needs at least one band set to aim for: --bands NAME (phantometry bands list)")


def harmonise_volume(
    volume: Volume,
    template: Template,
    fill: FillRecord,
    band_sets: Sequence[BandSet | str | os.PathLike],
    *,
    max_fwhm_mm: float = DEFAULT_MAX_FWHM_MM,
    step_mm: float = DEFAULT_STEP_MM,
    overrides: dict[str, np.ndarray] | None = None,
    where: str | None = None,
    n_draws: int | None = None,
    timezone: str | None = None,
) -> Harmonisation:
    """Analyse a loaded volume once (no uncertainties) and sweep the filters on it
    (:func:`harmonise_analysis`); the unfiltered analysis is judged by the bands too.
    ``timezone``: the site's zone for a volume loaded without one, as
    :func:`phantometry.measure.measure_volume` takes it."""
    filter_grid(max_fwhm_mm, step_mm)
    _check_kind(template)
    sets = [load_band_set(b) for b in band_sets]
    check_filterable(volume, where or volume.source or "image")
    analysis = measure_volume(volume, template, fill, overrides=overrides, where=where, uncertainties=False, timezone=timezone)
    if sets:
        judge(analysis, sets)
    return harmonise_analysis(analysis, sets, max_fwhm_mm=max_fwhm_mm, step_mm=step_mm, n_draws=n_draws)


# ============================================================================== outputs
def harmonisation_json(h: Harmonisation) -> dict[str, Any]:
    """The harmonisation.json document (``schema_version`` :data:`SCHEMA_VERSION`)."""
    a = h.analysis
    rec = h.recommended
    at_rec = None
    if rec is not None:
        at_rec = [{**_row_dict(r), "uncertainty_from": rec.uncertainty_from.get((r.roi, r.metric)),
                   "verdict_by_band": _verdicts_by_set(h, rec, (r.roi, r.metric))} for r in rec.rows]
    return {
        "schema_version": SCHEMA_VERSION,
        "tool": {"name": "phantometry", "version": __version__},
        "caution": CAUTION,
        "filter_caution": FILTER_CAUTION,
        "series": a.volume.summary(),
        "template": {"name": a.template.name, "title": a.template.title, "source": a.template.source_path,
                     "analysis_kind": a.template.analysis.kind},
        "fill_record": a.fill.to_dict(),
        "bands": [{k: v for k, v in b.summary().items() if k != "entries"} for b in h.band_sets],
        "method": {
            "filter": "isotropic 3-D Gaussian applied after reconstruction, separable along the voxel axes (sigma in mm per axis), "
                      "sampled kernel truncated at 4 sigma, image borders reflected (as scipy.ndimage.gaussian_filter)",
            "fwhm_mm": {"from": h.fwhms[0], "to": h.max_fwhm_mm, "step": h.step_mm, "count": len(h.steps)},
            "rois": "placed once on the unfiltered image and kept for every filter",
            "recommendation": "among filters meeting every band, the closest to the band centres by the root-mean-square of "
                              "(value - centre) / half-width over every two-sided band entry",
            "uncertainties": {
                "noise": "the image's noise autocovariance convolved with the filter's autocorrelation",
                "simulated_at_mm": h.nodes_mm + ([h.overall.recommended_mm] if h.overall.recommended_mm is not None
                                                 and h.overall.recommended_mm not in h.nodes_mm else []),
                "between": "monotone cubic (PCHIP) interpolation of the simulated values",
                "monte_carlo_draws": h.n_draws,
            },
        },
        **h.overall.as_dict(),
        "band_sets": {name: pr.as_dict() for name, pr in h.by_set.items()},
        "at_recommendation": at_rec,
        "unfiltered": [_row_dict(r) for r in h.steps[0].rows],
        "localisation": a.placement.as_dict(),
        "placement_quality": [c.as_dict() for c in a.placement_checks],
        "filtered_image": h.filtered_image,
        "warnings": list(dict.fromkeys([*a.warnings, *h.warnings])),
    }


def _row_dict(r: Measurement) -> dict[str, Any]:
    d = r.as_dict()
    return {k: d[k] for k in ("roi", "metric", "value", "unit", "uncertainty", "band", "band_low", "band_high", "verdict", "note")}


def _verdicts_by_set(h: Harmonisation, step: FilterStep, key: Key) -> dict[str, str]:
    out = {}
    r = step.row(key)
    for bs in h.band_sets:
        e = bs.entry(*key)
        if e is not None:
            out[bs.name] = "n/a" if r.verdict == "n/a" else e.judge(r.value)
    return out


def harmonisation_csv(h: Harmonisation) -> str:
    """harmonisation.csv: one row per (filter, roi, metric), :data:`CSV_COLUMNS`."""
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for s in h.steps:
        for r in s.rows:
            d = r.as_dict()
            w.writerow([_fmt(s.fwhm_mm), r.roi, r.metric, _fmt(d["value"]), r.unit, _fmt(d["uncertainty"]),
                        s.uncertainty_from.get((r.roi, r.metric), "none"), _fmt(r.band), _fmt(d["band_low"]), _fmt(d["band_high"]),
                        _fmt(r.verdict), _fmt(r.note), _fmt(round(s.applied_fwhm_mm, 4))])
    return buf.getvalue()


def harmonisation_rows(h: Harmonisation) -> list[Measurement]:
    """The outcome as measurement rows (ROI ``harmonisation``), for comparisons:
    ``recommended_filter_fwhm_mm``, ``passing_filter_low_mm``, ``passing_filter_high_mm``
    (NaN with the reason in the note when no filter passes)."""
    a = h.analysis
    proto = a.rows[0] if a.rows else None
    o = h.overall
    note = o.reason
    bands = "+".join(bs.name for bs in h.band_sets)

    def row(metric: str, value: float | None, extra: str | None = None) -> Measurement:
        text = "; ".join(t for t in (f"bands {bands}", extra, note) if t)
        return Measurement(series_uid=proto.series_uid if proto else a.volume.series_uid, acquired_at=proto.acquired_at if proto else None,
                           template=a.template.name, roi="harmonisation", metric=metric,
                           value=math.nan if value is None else float(value), unit="mm", note=text)

    return [
        row("recommended_filter_fwhm_mm", o.recommended_mm, "Gaussian post-filter closest to the band centres among those meeting every band"),
        row("passing_filter_low_mm", o.low_mm, o.low_end.text if o.low_end else None),
        row("passing_filter_high_mm", o.high_mm, o.high_end.text if o.high_end else None),
    ]


def summary(h: Harmonisation) -> dict[str, Any]:
    """A short JSON-ready summary (a comparison's per-setting record)."""
    o = h.overall
    return {
        "recommended_fwhm_mm": o.recommended_mm,
        "passing_range_mm": [o.low_mm, o.high_mm] if o.found else None,
        "passing_range_reason": o.reason,
        "lower_end": o.low_end.text if o.low_end else None,
        "upper_end": o.high_end.text if o.high_end else None,
        "band_sets": {name: {"recommended_fwhm_mm": pr.recommended_mm, "passing_range_mm": [pr.low_mm, pr.high_mm] if pr.found else None}
                      for name, pr in h.by_set.items()},
    }


def harmonisation_picture(h: Harmonisation, path: str | os.PathLike) -> Path:
    """harmonisation.png: every banded metric against the filter FWHM, one panel per (roi,
    metric): the value with its standard uncertainty, the bands shaded, the passing range and
    the recommendation marked."""
    from .figures import finish_figure, pyplot

    plt = pyplot()
    metrics: list[str] = []
    rois: list[str] = []
    for roi, metric in h.keys:
        if metric not in metrics:
            metrics.append(metric)
        if roi not in rois:
            rois.append(roi)
    ncol = min(len(rois), 6)
    panels = [(m, r) for m in metrics for r in rois if (r, m) in h.keys]
    nrow = int(math.ceil(len(panels) / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(2.35 * ncol + 0.6, 2.05 * nrow + 1.0), squeeze=False, sharex=True)
    x = np.array(h.fwhms)
    o = h.overall
    for ax in axes.ravel()[len(panels):]:
        ax.axis("off")
    for ax, (metric, roi) in zip(axes.ravel(), panels):
        key = (roi, metric)
        v = np.array([s.row(key).value for s in h.steps], float)
        u = np.array([np.nan if s.row(key).uncertainty is None else s.row(key).uncertainty for s in h.steps], float)
        if o.found:
            for lo, hi in o.intervals:
                ax.axvspan(lo - 0.5 * h.step_mm, hi + 0.5 * h.step_mm, color="#2ca02c", alpha=0.12, lw=0)
        for n, bs in enumerate(h.band_sets):
            e = bs.entry(roi, metric)
            if e is None:
                continue
            if n == 0:  # the first set shaded, the others as dashed limits
                ax.axhspan(-1e30 if e.low is None else e.low, 1e30 if e.high is None else e.high, color="#7f7f7f", alpha=0.22, lw=0)
            else:
                for b in (e.low, e.high):
                    if b is not None:
                        ax.axhline(b, color="#555555", ls=(0, (4, 2)), lw=0.8)
        ok = np.isfinite(u)
        if ok.any():
            ax.fill_between(x[ok], (v - u)[ok], (v + u)[ok], color="#1f77b4", alpha=0.25, lw=0)
        ax.plot(x, v, color="#1f77b4", lw=1.4)
        if o.recommended_mm is not None:
            ax.axvline(o.recommended_mm, color="#d62728", ls="--", lw=1.1)
        ax.set_title(f"{roi} {metric}", fontsize=8)
        ax.tick_params(labelsize=7)
        if np.isfinite(v).any():
            band_vals = [b for bs in h.band_sets for e in [bs.entry(roi, metric)] if e is not None for b in (e.low, e.high) if b is not None]
            lo = np.nanmin([np.nanmin(v - np.nan_to_num(u)), *band_vals])
            hi = np.nanmax([np.nanmax(v + np.nan_to_num(u)), *band_vals])
            pad = 0.08 * (hi - lo if hi > lo else 1.0)
            ax.set_ylim(lo - pad, hi + pad)
    for ax in axes[-1]:
        ax.set_xlabel("filter FWHM (mm)", fontsize=8)
    if o.found:
        head = (f"recommended {o.recommended_mm:g} mm (red dashed); every band met from {o.low_mm:g} to {o.high_mm:g} mm (green); "
                f"grey: {h.band_sets[0].name}" + (" (dashed: " + ", ".join(bs.name for bs in h.band_sets[1:]) + ")" if len(h.band_sets) > 1 else "")
                + "; blue: value +- standard uncertainty")
    else:
        head = "no filter meets every band; grey: band; blue: value +- standard uncertainty"
    fig.suptitle(f"Gaussian post-filter sweep | {h.analysis.template.title}\n{head}", fontsize=9)
    fig.text(0.5, 0.035, "A Gaussian applied after reconstruction; confirm with a real reconstruction using the filter.",
             ha="center", fontsize=7, color="#444444")
    return finish_figure(fig, path, dpi=100)


def filtered_volume(h: Harmonisation, fwhm_mm: float | None = None) -> Volume:
    """The whole image filtered at ``fwhm_mm`` (default: the recommendation), with a series
    description naming the filter (``scipy.ndimage.gaussian_filter``, the sweep's kernel)."""
    from scipy import ndimage

    vol = h.analysis.volume
    f = h.overall.recommended_mm if fwhm_mm is None else float(fwhm_mm)
    if f is None:
        raise InputError("no filter meets every band: there is no recommended filter to apply")
    pf = PostFilter.for_volume(f, vol)
    data = vol.data if pf.is_identity else ndimage.gaussian_filter(vol.data, pf.sigma_vox, truncate=pf.truncate, mode="reflect", output=np.float32)
    desc = f"{(vol.series_description or 'PET')[:30]} + Gaussian {f:g} mm (harmonise)"
    rec = dataclasses.replace(vol.reconstruction, filter=((vol.reconstruction.filter + " + ") if vol.reconstruction.filter else "")
                              + f"Gaussian {f:g} mm")
    return dataclasses.replace(vol, data=data, series_description=desc, series_uid=None, reconstruction=rec, warnings=())


def write_filtered_image(h: Harmonisation, folder: Path, fmt: str) -> dict[str, Any] | None:
    """Write the image filtered at the recommendation into ``folder``: a new DICOM series
    (``filtered/``: derived image, new series and instance UIDs, same study and frame of
    reference) or NIfTI (``filtered.nii.gz`` with its sidecar). None when nothing passes."""
    if h.overall.recommended_mm is None:
        return None
    f = h.overall.recommended_mm
    vol = filtered_volume(h)
    src = h.analysis.volume
    if fmt == "dicom":
        from .io.dicom_write import write_dicom_series

        # Convolution Kernel holds 16 characters: the source's stays, the filter is in the
        # series and derivation descriptions
        write_dicom_series(
            dataclasses.replace(vol, reconstruction=src.reconstruction), folder / FILTERED_DICOM,
            decay_correction="NONE" if src.decay_correction == "NONE" else "START",
            study_uid=src.study_uid, frame_of_reference_uid=src.frame_of_reference_uid,
            series_number=(src.series_number or 0) + 1000, series_description=vol.series_description,
            image_type=("DERIVED", "SECONDARY"),
            derivation_description=f"Isotropic Gaussian post-filter of {f:g} mm FWHM applied by phantometry harmonise to series "
                                   f"{src.series_uid or src.source or ''}",
        )
        out = {"path": FILTERED_DICOM + "/", "format": "dicom"}
    else:
        from .io.nifti import write_nifti

        write_nifti(vol, folder / FILTERED_NIFTI)
        out = {"path": FILTERED_NIFTI, "format": "nifti"}
    return {**out, "fwhm_mm": f, "series_description": vol.series_description}


def write_harmonisation(h: Harmonisation, folder: str | os.PathLike, *, picture: bool = True) -> list[str]:
    """Write harmonisation.json, harmonisation.csv and (``picture``) harmonisation.png into a folder."""
    folder = Path(folder)
    (folder / CSV_NAME).write_text(harmonisation_csv(h), encoding="utf-8")
    names = [JSON_NAME, CSV_NAME]
    if picture:
        harmonisation_picture(h, folder / PICTURE_NAME)
        names.append(PICTURE_NAME)
    (folder / JSON_NAME).write_text(to_json(harmonisation_json(h)), encoding="utf-8")
    return names


def harmonise(
    inputs: Sequence[str | os.PathLike] | str | os.PathLike,
    *,
    fill: str | os.PathLike,
    bands: Sequence[str | os.PathLike],
    out: str | os.PathLike,
    template: str = "iec-body",
    series: str | None = None,
    centres: Sequence[str] | None = None,
    units: str | None = None,
    acquired_at: Any = None,
    nuclide: str | None = None,
    calibration_factor: float | None = None,
    templates_dirs: Sequence[str] | None = None,
    max_fwhm_mm: float = DEFAULT_MAX_FWHM_MM,
    step_mm: float = DEFAULT_STEP_MM,
    write_filtered: bool = False,
    overwrite: bool = False,
    timezone: str | None = None,
) -> Harmonisation:
    """Find the harmonising filter of a phantom scan from files and write ``out/``.

    ``timezone`` (``--timezone``, an IANA name) is the site's zone, in which scanner times
    written without a UTC offset are read, as :func:`phantometry.measure.measure` reads them.

    ``out`` follows the rules of :mod:`phantometry.outputs` (the same as ``measure``; marker
    kind ``harmonise``), checked before anything is loaded. The folder holds
    harmonisation.json, harmonisation.csv, harmonisation.png and, with ``write_filtered``,
    the image filtered at the recommendation (DICOM input: a new series in ``filtered/``;
    NIfTI: ``filtered.nii.gz``).

    Raises
    ------
    OutputRefused, OutputError
        As :func:`phantometry.measure.measure`.
    InputError, BandError, TemplateError, FillRecordError
        Bad inputs (nothing written): no band set, a band set for another template, a
        template whose kind has no recovery coefficients, a sweep that is not a positive
        range of widths.
    """
    from .outputs import KIND_HARMONISE, check_output_folder, existing_inputs, output_folder

    band_list = list(bands or [])
    input_paths = existing_inputs(inputs, fill, template, band_list, list(templates_dirs or []))
    check_output_folder(out, KIND_HARMONISE, inputs=input_paths, overwrite=overwrite)
    filter_grid(max_fwhm_mm, step_mm)
    if not band_list:
        raise InputError("harmonise needs at least one band set to aim for: --bands NAME (phantometry bands list)")
    p = prepare_inputs(inputs, template=template, fill=fill, bands=band_list, centres=centres, templates_dirs=templates_dirs,
                       timezone=timezone, check_template=_check_kind)
    tpl, fill_record, overrides, sets, where = p.template, p.fill, p.overrides, p.band_sets, p.where
    volume = load_image(inputs, series=series, units=units, acquired_at=acquired_at, nuclide=nuclide, calibration_factor=calibration_factor,
                        site_clock=p.clock)
    check_filterable(volume, where)
    h = harmonise_volume(volume, tpl, fill_record, sets, max_fwhm_mm=max_fwhm_mm, step_mm=step_mm, overrides=overrides, where=where,
                         timezone=timezone)
    fmt = "nifti" if (volume.source or "").lower().endswith((".nii", ".nii.gz")) else "dicom"
    with output_folder(out, KIND_HARMONISE, inputs=input_paths, overwrite=overwrite) as staging:
        if write_filtered:
            h.filtered_image = write_filtered_image(h, staging.path, fmt)
            if h.filtered_image is None:
                h.warnings.append("no filtered image written: no filter meets every band")
        write_harmonisation(h, staging.path)
    h.written = staging.written
    return h
