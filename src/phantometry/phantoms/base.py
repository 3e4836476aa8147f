"""One shape for every phantom analysis.

A *phantom kind* (one module in :mod:`phantometry.phantoms`, named by a template's
``analysis.kind``) knows three things: the options its templates carry, how to analyse a
volume (locate -> ROIs -> metrics -> :class:`~phantometry.results.Measurement` rows), and how
its result describes itself to the outputs. The outputs (terminal table, JSON, pictures,
report, DICOM SEG, ledger, comparison) only ever talk to the types of this module, so a new
kind is one new module plus a template.

Types
-----
:class:`Analysis`
    Everything measured on one scan: the volume, template, fill record, placement, rows,
    warnings, band sets applied, and the output hooks (:meth:`Analysis.summary_table`,
    :meth:`Analysis.overlay`, :meth:`Analysis.pictures`, :meth:`Analysis.json_extras`,
    :meth:`Analysis.roi_masks`).
:class:`PhantomKind`
    The plug-in: ``name``, ``Options`` (a pydantic model of the template's ``analysis:``
    block), :meth:`PhantomKind.check_template`, :meth:`PhantomKind.known_metrics`,
    :meth:`PhantomKind.analyse`, :meth:`PhantomKind.comparison_charts`.
:class:`Overlay`, :class:`View`, :class:`Shape`
    What an overlay picture shows, in plane coordinates (mm), drawn by
    :func:`phantometry.figures.overlay_picture` the same way for every kind.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, ClassVar, Literal, Sequence

import numpy as np
from pydantic import BaseModel, ConfigDict, ValidationError

from ..errors import FillRecordError, InputError, TemplateError
from ..fill import FillRecord
from ..locate import Placement
from ..results import Measurement
from ..rois import PlaneImage
from ..templates import Template
from ..volume import Volume

if TYPE_CHECKING:  # pragma: no cover
    from ..bands import BandSet
    from ..noise import NoiseModel

#: Relative deviation of the measured background (or reference region) from the fill record
#: that raises a warning: a calibration check (common practice: +-10 %).
CALIBRATION_WARNING_FRACTION = 0.10


class KindOptions(BaseModel):
    """Base of every kind's ``analysis:`` options (strict: unknown keys are refused)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    kind: str


# ===================================================================================== outputs
ShapeRole = Literal["hot", "cold", "background", "insert", "voi", "peak", "search", "guide", "outline", "isocontour", "slice",
                   "reference", "axis"]


@dataclass
class Shape:
    """One thing drawn on a view, in the view's plane coordinates (mm).

    Attributes
    ----------
    kind : ``circle`` (``centre_uv``, ``size_mm`` = diameter), ``rect`` (``centre_uv``,
        ``size_mm`` = (width, height)), ``marker`` (``centre_uv``), ``hline`` (a line across
        the view at ``centre_uv[1]``), ``contour`` (``points_uv`` (n, 2), a closed outline),
        ``line`` (``points_uv`` (n, 2), an open polyline), ``mask`` (``mask``, a boolean array
        of the view's pixel grid, drawn as the exact outline of its pixels: what a VOI holds).
    role : what it is; the picture's colour and line style follow from it, and its legend
        entry (:attr:`Overlay.legend`).
    label : text drawn beside it, if any (placed where it overlaps no other text or outline).
    label_below : prefer the place below the shape for the label.
    """

    kind: Literal["circle", "rect", "marker", "hline", "contour", "line", "mask"]
    role: ShapeRole
    centre_uv: np.ndarray | None = None
    size_mm: float | tuple[float, float] | None = None
    points_uv: np.ndarray | None = None
    label: str | None = None
    label_below: bool = False
    mask: np.ndarray | None = None
    #: a name tests and callers can find the drawn shape by (e.g. ``sphere_37mm A50``)
    name: str | None = None


@dataclass
class View:
    """A plane of the image with shapes drawn on it.

    Every view gets a colour bar (its label, e.g. ``Bq/mL``), a scale bar and orientation
    letters at its edges (from the plane's world directions and :attr:`Overlay.frame`).
    """

    plane: PlaneImage
    title: str
    shapes: list[Shape] = field(default_factory=list)
    #: display range upper limit (Bq/mL); None: a high percentile of the plane
    vmax: float | None = None
    #: label of the colour bar beside the view (the grey scale); None: no colour bar
    colorbar: str | None = "Bq/mL"
    #: length (mm) of the scale bar drawn in the view's lower left corner; None: chosen from
    #: the view's width; 0: none
    scale_bar_mm: float | None = None
    #: the first row of the plane on top (an image as displayed: rows downwards), else at the bottom
    rows_down: bool = False
    #: how the display window was chosen, in words (shown on the colour bar), e.g. "2.5 x background"
    window_note: str | None = None


@dataclass
class Overlay:
    """An overlay picture: one or more views with a title line, a legend of the shapes' roles
    in words and a caption.

    Attributes
    ----------
    frame : the world frame of the planes' directions (``LPS`` or ``RAS``, the volume's), for
        the orientation letters; None: no letters.
    legend : role -> what it is, in words (overrides the renderer's default words); a role
        mapped to ``""`` gets no legend entry.
    caption : sentences under the legend (what the figures in the title mean, what was
        moved or dropped).
    """

    views: list[View]
    title: str
    #: kept for older callers; the views are sized by their planes (equal heights, mm to scale)
    width_ratios: list[float] | None = None
    frame: str | None = None
    legend: dict[str, str] = field(default_factory=dict)
    caption: list[str] = field(default_factory=list)


@dataclass
class FailureSketch:
    """What a localisation saw before it failed, for the picture of a failed run
    (:func:`phantometry.figures.diagnostic_picture`); every part is optional.

    Attributes
    ----------
    inside_body : world points (..., 3) -> bool: inside the body found (above half its level).
    body_centre_mm : the body's centre (world mm).
    level_bq_ml : the body's level (its median above the air/phantom threshold), Bq/mL.
    axis_point_mm, axis_direction : the phantom axis found (world mm, unit vector).
    plane_point_mm : the sphere plane searched for (a point on it; normal: the axis).
    notes : what was found, and where the search stopped, in words.
    """

    inside_body: Callable[[np.ndarray], np.ndarray] | None = None
    body_centre_mm: np.ndarray | None = None
    level_bq_ml: float | None = None
    axis_point_mm: np.ndarray | None = None
    axis_direction: np.ndarray | None = None
    plane_point_mm: np.ndarray | None = None
    notes: list[str] = field(default_factory=list)


@dataclass
class SummaryTable:
    """A table of the key results (terminal and report): strings, already formatted."""

    title: str
    columns: list[str]
    rows: list[list[str]]
    #: lines printed after the table (e.g. background level, insert residual)
    lines: list[str] = field(default_factory=list)


@dataclass
class ResultGrid:
    """A table of results for the report: one row per ROI, one column per metric; every cell
    shows the value with its standard uncertainty and its verdict.

    Attributes
    ----------
    table_id : HTML id of the table.
    caption : what the table shows.
    rois : (roi, descriptive cells) per row, e.g. ``("sphere_10mm", ["10", "hot"])``.
    descriptor_titles : titles of the descriptive cells.
    metrics : (metric, column title) per column.
    """

    table_id: str
    caption: str
    rois: list[tuple[str, list[str]]]
    descriptor_titles: list[str]
    metrics: list[tuple[str, str]]


@dataclass
class RoiKindMask:
    """One segment of a DICOM SEG export: a binary mask (z, y, x) of every ROI of one kind.

    Attributes
    ----------
    kind : short identifier (``hot_spheres``), the segment's tracking ID.
    label : the segment label (``hot spheres``).
    mask : bool (z, y, x) on the volume grid.
    roi_names : the ROIs it holds.
    segment_type : the segmented property type, a DCM code meaning of DICOM PS3.16 that
        highdicom's ``codes.DCM`` knows (``Sphere``, ``Background``, ``Phantom``).
    """

    kind: str
    label: str
    mask: np.ndarray
    roi_names: list[str]
    segment_type: str = "Phantom"

    @property
    def voxel_count(self) -> int:
        return int(np.count_nonzero(self.mask))


@dataclass
class RoiSetCheck:
    """How well the image confirms one set of ROIs (placement quality, in every result).

    Attributes
    ----------
    roi_set : name of the set (``background_37mm``, ``spheres``, ``spillover_vois``, ...).
    planned : ROIs the template plans.
    used : ROIs actually measured (moved ones count, dropped ones do not).
    min_inside_fraction : the smallest fraction of a measured ROI inside the region it is meant
        to sample, as found in this image (1.0: every ROI wholly inside).
    min_edge_distance_mm : the smallest distance of a measured ROI's edge from the edge of that
        region (negative: it crosses it); None where not applicable.
    confirmed : the image confirms the set (every measured ROI wholly inside its region and
        keeping its clearances).
    note : what was done or seen (moved, dropped, unconfirmed), in words.
    rows : (roi, metric) of the measurements that depend on this set; when the set is not
        confirmed, their band verdicts are ``n/a`` (never a pass or fail on a doubtful ROI).
    """

    roi_set: str
    planned: int
    used: int
    min_inside_fraction: float
    min_edge_distance_mm: float | None = None
    confirmed: bool = True
    note: str | None = None
    rows: list[tuple[str, str]] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return {
            "roi_set": self.roi_set,
            "planned": self.planned,
            "used": self.used,
            "min_inside_fraction": round(float(self.min_inside_fraction), 4) if math.isfinite(self.min_inside_fraction) else None,
            "min_edge_distance_mm": (None if self.min_edge_distance_mm is None or not math.isfinite(self.min_edge_distance_mm)
                                     else round(float(self.min_edge_distance_mm), 2)),
            "confirmed": self.confirmed,
            "note": self.note,
        }


@dataclass
class AnalysisSettings:
    """Options of the analysis step that are not in the template.

    Attributes
    ----------
    uncertainties : estimate the image noise and give every metric it can its standard
        uncertainty.
    resolution : fit the effective resolution (kinds that have a model for it).
    variance_power : ``p`` of the noise level law ``var ~ level^p`` (1: Poisson-like).
    progress : called with a short text as each long step starts (``"estimating the
        uncertainties"``); None: silent. A kind announces its steps with :meth:`step`.
    """

    uncertainties: bool = True
    resolution: bool = True
    variance_power: float = 1.0
    progress: Callable[[str], None] | None = None

    def step(self, text: str) -> None:
        """Announce a step of the analysis (nothing without a ``progress`` callable)."""
        if self.progress is not None:
            self.progress(text)


@dataclass
class Analysis(ABC):
    """Everything measured on one scan, and how it shows itself (base of every kind's result).

    Attributes
    ----------
    volume, template, fill, placement : the inputs and where the phantom was found.
    rows : the measurements (the one currency of every output).
    true_background_bq_ml : the background (or uniform solution) at the image reference time.
    true_insert_bq_ml : insert name -> true concentration at the reference time.
    warnings : everything the user must know about these numbers.
    band_sets : acceptance band sets applied to the rows (:func:`phantometry.measure.judge`).
    noise : the image-noise model behind the uncertainties, when estimated.
    """

    kind: ClassVar[str] = ""

    volume: Volume
    template: Template
    fill: FillRecord
    placement: Placement
    rows: list[Measurement]
    true_background_bq_ml: float
    true_insert_bq_ml: dict[str, float] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    band_sets: list["BandSet"] = field(default_factory=list)
    noise: "NoiseModel | None" = None
    #: placement quality of each ROI set, as the image confirms it
    placement_checks: list[RoiSetCheck] = field(default_factory=list)
    #: the result folder written (phantometry.outputs.WrittenFolder), once ``measure`` wrote one
    written: Any = None
    #: acquisition conditions against the standard (phantometry.protocol.ProtocolCheck)
    protocol_checks: list[Any] = field(default_factory=list)
    #: what the fill record's stated uncertainties mean for the truth (phantometry.fill.FillUncertainty)
    fill_uncertainty: Any = None

    # ---------------------------------------------------------------- queries
    def value(self, roi: str, metric: str) -> float | None:
        """The value of one row, or None when the analysis has no such row."""
        for r in self.rows:
            if r.roi == roi and r.metric == metric:
                return r.value
        return None

    def values(self) -> dict[tuple[str, str], float]:
        return {(r.roi, r.metric): r.value for r in self.rows}

    # ---------------------------------------------------------------- output hooks
    def summary_table(self) -> SummaryTable:
        """The key results as a table; the default lists every row that is not a position."""
        rows = [[r.roi, r.metric, fmt_number(r.value, r.unit)] for r in self.rows if not r.metric.startswith("centre_")]
        return SummaryTable(self.template.title, ["ROI", "metric", "value"], rows)

    def result_grids(self) -> list[ResultGrid]:
        """Tables of the report; the default: one row per ROI, one column per metric (positions left out)."""
        rois: list[str] = []
        metrics: list[str] = []
        for r in self.rows:
            if r.metric.startswith("centre_"):
                continue
            if r.roi not in rois:
                rois.append(r.roi)
            if r.metric not in metrics:
                metrics.append(r.metric)
        return [ResultGrid("results", "Results by ROI; values &plusmn; standard uncertainty.", [(r, []) for r in rois], [],
                           [(m, m) for m in metrics])]

    @abstractmethod
    def overlay(self) -> Overlay:
        """What the overlay picture shows (every kind draws its ROIs on its own planes)."""

    def pictures(self) -> dict[str, Callable[[Path], Path]]:
        """Extra pictures of the result folder: file name -> function drawing it to a path."""
        return {}

    def picture_captions(self) -> dict[str, str]:
        """Captions of the extra pictures in the report (file name -> caption); the report
        falls back on the file name."""
        return {}

    def json_extras(self) -> dict[str, Any]:
        """Kind-specific sections of ``measurements.json`` (added after the common ones)."""
        return {"noise": self.noise.as_dict() if self.noise is not None else None}

    def roi_masks(self) -> list[RoiKindMask]:
        """Masks of every ROI kind for a DICOM SEG export (kinds with ``supports_seg``)."""
        raise InputError(f"template {self.template.name}: ROI export as DICOM SEG is not available for analysis kind {self.kind}")

    def fill_sensitivity(self, row: Measurement) -> tuple[str, str | None, float] | None:
        """How a row's value depends on the fill record, for its ``uncertainty_fill``.

        Returns ``(kind, insert, factor)`` or None when the value does not depend on it:

        * ``("background", None, f)``: ``u_fill = f * u_rel(true background)``;
        * ``("insert", name, f)``: ``u_fill = f * u_rel(true concentration of name)``;
        * ``("ratio", name, f)``: ``u_fill = f * u(activity ratio of name)``.

        The default follows the metric names every kind shares: ``activity_recovery`` (C/C_true:
        ``f = |value|``), ``calibration_error_pct`` (100 (C/C_true - 1): ``f = |100 + value|``),
        ``rc_max``/``rc_mean``/``rc_peak`` of an insert with a true concentration (C/C_true:
        ``f = |value|``), and the NEMA NU 2 hot-sphere ``percent_contrast``
        ``Q = (C_H/C_B - 1)/(r - 1) 100``, whose only fill input is the activity ratio r:
        ``dQ/dr = -Q/(r - 1)``, so ``f = |Q|/(r - 1)``. Kinds with other fill-dependent
        metrics override it.
        """
        m = row.metric
        v = row.value
        if not math.isfinite(v):
            return None
        if m == "activity_recovery":
            return ("background", None, abs(v))
        if m == "calibration_error_pct":
            return ("background", None, abs(100.0 + v))
        true = self.true_insert_bq_ml.get(row.roi)
        if m in ("rc_max", "rc_mean", "rc_peak") and true:
            return ("insert", row.roi, abs(v))
        if m == "percent_contrast" and true and not self.fill.is_cold(row.roi):
            ratio = float(self.fill.activity_ratio(row.roi))
            if ratio > 1.0:
                return ("ratio", row.roi, abs(v) / (ratio - 1.0))
        return None

    def key_metrics(self) -> list[tuple[str, str]]:
        """(roi, metric) pairs that characterise a setting when comparing without bands."""
        return [(r.roi, r.metric) for r in self.rows if not r.metric.startswith("centre_")]

    def metric_titles(self) -> dict[str, str]:
        """metric -> its title in tables (``rc_max`` -> ``RC max``); the default: the titles
        of the kind's report tables (:meth:`result_grids`)."""
        titles: dict[str, str] = {}
        for grid in self.result_grids():
            for metric, title in grid.metrics:
                titles.setdefault(metric, title)
        return titles

    def reread(self, keys: Sequence[tuple[str, str]]) -> "Reread | None":
        """How to read the metrics ``keys`` again on images derived from this one by a
        shift-invariant Gaussian post-filter, every ROI kept where this analysis placed it
        (:mod:`phantometry.harmonise`); None when the kind cannot (the default)."""
        return None


class Reread(ABC):
    """Some metrics of an analysis read again on filtered copies of its image.

    The ROIs stay where the analysis placed them (a filter does not move the phantom). Made
    by :meth:`Analysis.reread`.

    Attributes
    ----------
    keys : the (roi, metric) pairs read.
    boxes : array boxes of the image that the metrics read; a filtered copy needs to be
        right only there (every other voxel may hold anything).
    """

    keys: list[tuple[str, str]]
    boxes: list[tuple[slice, slice, slice]]

    @abstractmethod
    def read(self, volume: Volume, blur_variance_mm2: float) -> tuple[dict[tuple[str, str], float], Any]:
        """The values on ``volume`` (the image after an isotropic Gaussian of variance
        ``blur_variance_mm2`` per axis, right on :attr:`boxes`); returns ``(values, state)``,
        ``state`` being what :meth:`uncertainties` needs of this reading."""

    @abstractmethod
    def uncertainties(self, volume: Volume, noise: "NoiseModel", blur_variance_mm2: float, state: Any, *,
                      n_draws: int | None = None) -> dict[tuple[str, str], float | None]:
        """Standard uncertainties of the values of :meth:`read` (``state``), with ``noise`` the
        noise model of the filtered image."""


@dataclass
class Chart:
    """A chart of a comparison: ``function(*args, path, **kwargs)`` draws it (a module-level
    function, so a worker process can draw it)."""

    file_name: str
    caption: str
    function: Callable[..., Path]
    args: tuple = ()
    kwargs: dict[str, Any] = field(default_factory=dict)

    def draw(self, folder: Path) -> Path:
        return self.function(*self.args, folder / self.file_name, **self.kwargs)


@dataclass
class ComparedSetting:
    """One measured setting of a comparison, as the kind's comparison charts see it."""

    number: int
    label: str
    rows: Sequence[Measurement]
    #: why the setting could not be measured (no rows then); charts list such settings
    error: str | None = None


class PhantomKind(ABC):
    """A phantom analysis kind (subclass per module; one instance, ``KIND``, registered).

    Subclasses set :attr:`name` (the templates' ``analysis.kind``), :attr:`Options` and
    :attr:`summary`, and implement :meth:`analyse`.
    """

    name: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    Options: ClassVar[type[KindOptions]] = KindOptions
    #: the ROIs can be exported as DICOM SEG (:meth:`Analysis.roi_masks`)
    supports_seg: ClassVar[bool] = False
    #: the metrics can be read again on post-filtered copies of the image (:meth:`Analysis.reread`;
    #: ``phantometry harmonise``)
    supports_reread: ClassVar[bool] = False

    # ---------------------------------------------------------------- template
    def options(self, template: Template) -> KindOptions:
        """The template's ``analysis:`` block validated as this kind's :attr:`Options`.

        Raises
        ------
        TemplateError
            Naming the template file, each key at fault and what is allowed.
        """
        cached = template.kind_options
        if isinstance(cached, self.Options):
            return cached
        try:
            opts = self.Options.model_validate(template.analysis.raw())
        except ValidationError as err:
            from ..templates import format_validation_error

            raise TemplateError(format_validation_error(template.source_path or template.name, err, prefix="analysis")) from None
        for key in self.insert_references(opts):
            ref = getattr(opts, key, None)
            if ref is not None and ref not in {i.name for i in template.inserts}:
                raise TemplateError(
                    f"{template.source_path or template.name}: invalid template: analysis.{key} names unknown insert {ref!r}; "
                    f"inserts: {', '.join(i.name for i in template.inserts)}"
                )
        template.set_kind_options(opts)
        return opts

    def insert_references(self, options: Any) -> tuple[str, ...]:
        """Names of option keys that name an insert (checked against the template)."""
        return ()

    def check_template(self, template: Template) -> list[str]:
        """Kind-specific checks of a template (required inserts, VOIs inside their regions).

        Returns problems; empty when sound. Structural errors raise ``TemplateError``.
        """
        return []

    @abstractmethod
    def known_metrics(self, template: Template) -> dict[str, tuple[str, ...]]:
        """ROI name -> metrics an analysis of this template produces (band sets are checked
        against it)."""

    # ---------------------------------------------------------------- analysis
    @abstractmethod
    def analyse(
        self,
        volume: Volume,
        template: Template,
        fill: FillRecord,
        *,
        overrides: dict[str, np.ndarray] | None = None,
        where: str,
        settings: AnalysisSettings,
    ) -> Analysis:
        """Locate the phantom and compute every metric of this kind."""

    def size_mismatch(self, template: Template, extent_mm: Sequence[float]) -> float | None:
        """How far an object of sorted principal extents ``extent_mm`` (mm) is from this
        template's phantom, or None when it cannot be one.

        The default compares with the template's nominal body (:func:`nominal_extent_mm`):
        the largest ``|ln(found / nominal)|`` over the three extents, None beyond a factor
        0.6-1.6 (the tolerance of the size checks of :mod:`phantometry.locate`). Kinds whose
        phantoms come in a range of sizes override it. Used to name the template that fits
        an object refused by another (:func:`phantometry.phantoms.suggest_template`).
        """
        rel = np.asarray(sorted(float(e) for e in extent_mm)) / nominal_extent_mm(template)
        if np.any(rel <= 0.6) or np.any(rel >= 1.6):
            return None
        return float(np.max(np.abs(np.log(rel))))

    # ---------------------------------------------------------------- a failed run
    def failure_sketch(self, volume: Volume, template: Template, where: str) -> FailureSketch:
        """What can be found of the phantom when the analysis failed (the picture of a failed
        run shows it). The default: the body as the common first step finds it. Never raises
        for what the image holds: what cannot be found is left out and said in ``notes``."""
        return body_sketch(volume, where)

    # ---------------------------------------------------------------- comparison
    def comparison_charts(self, template: Template, fill: FillRecord, settings: Sequence[ComparedSetting]) -> list[Chart]:
        """Charts of a comparison of settings (none by default)."""
        return []


# ===================================================================================== helpers
def check_scan_time(volume: Volume, fill: FillRecord, where: str) -> None:
    """The common preamble of every analysis: a reference time, and the fill record's nuclide.

    Raises
    ------
    InputError
        No acquisition time, or a nuclide that differs from the fill record's.
    """
    if volume.acquired_at is None:
        raise InputError(f"{where}: the image has no acquisition time; give it (NIfTI: --acquired-at) so the fill record can be decay-corrected")
    if volume.nuclide and volume.nuclide != fill.nuclide.name:
        raise InputError(f"{where}: image nuclide {volume.nuclide} differs from the fill record's {fill.nuclide.name}")


class RowBuilder:
    """Appends :class:`Measurement` rows that share the series, time and template."""

    def __init__(self, volume: Volume, template: Template) -> None:
        self.rows: list[Measurement] = []
        self._common = dict(
            series_uid=volume.series_uid,
            acquired_at=volume.acquired_at.isoformat() if volume.acquired_at else None,
            template=template.name,
        )

    def add(self, roi: str, metric: str, value: float, unit: str, note: str | None = None, uncertainty: float | None = None) -> Measurement:
        row = Measurement(roi=roi, metric=metric, value=float(value), unit=unit, note=note, uncertainty=uncertainty, **self._common)
        self.rows.append(row)
        return row


def calibration_warning(measured_bq_ml: float, true_bq_ml: float, what: str) -> str | None:
    """The warning of a measured level more than :data:`CALIBRATION_WARNING_FRACTION` off the
    fill record, or None."""
    if not (true_bq_ml > 0) or abs(measured_bq_ml / true_bq_ml - 1.0) <= CALIBRATION_WARNING_FRACTION:
        return None
    return (
        f"WARNING: measured {what} {measured_bq_ml:.0f} Bq/mL is {100 * (measured_bq_ml / true_bq_ml - 1):+.0f} % from the fill record's "
        f"{true_bq_ml:.0f} Bq/mL; check the fill record (activity, times, volume), units and calibration"
    )


def fill_error_hint(volume: Volume, template: Template, where: str) -> None:
    """Called when the fill record does not fit the template: a scan of another phantom is
    the likelier cause, and then that is the error to show."""
    from ..locate import check_body_size

    check_body_size(volume, template, where)


def body_sketch(volume: Volume, where: str) -> FailureSketch:
    """The body as :func:`phantometry.locate.find_body` finds it (block-mean copy, Otsu
    threshold, half the level), as a :class:`FailureSketch`; notes say when it was not found."""
    from ..errors import PhantometryError
    from ..locate import find_body

    sketch = FailureSketch()
    try:
        body = find_body(volume, where)
    except PhantometryError as exc:
        sketch.notes.append(f"no body found ({exc})")
        return sketch
    mask, factors = body.mask, np.asarray(body.factors, int)
    shape = np.array(mask.shape)

    def inside(points: np.ndarray) -> np.ndarray:
        idx = np.rint(volume.world_to_index(np.asarray(points, float)))
        coarse = np.floor(idx / factors).astype(int)
        ok = np.all((coarse >= 0) & (coarse < shape), axis=-1)
        out = np.zeros(ok.shape, bool)
        c = coarse[ok]
        out[ok] = mask[c[:, 0], c[:, 1], c[:, 2]]
        return out

    sketch.inside_body = inside
    cells = np.argwhere(mask)
    if len(cells):
        sketch.body_centre_mm = volume.index_to_world((cells.mean(axis=0) + 0.5) * factors - 0.5)
    sketch.level_bq_ml = float(body.background)
    ext = ", ".join(f"{e:.0f}" for e in body.extent_mm)
    sketch.notes.append(f"body found: {ext} mm along its principal axes, level {body.background:,.0f} Bq/mL")
    return sketch


def series_phrase(volume: Volume) -> str:
    """How a picture's title names the image: ``series <description>``, else ``file <name>``
    (a NIfTI file has no description), else ``series <UID>`` (:func:`series_name`)."""
    kind, text = _series_naming(volume)
    return f"{kind} {text}" if kind else "unnamed image"


def voi_on_slice(volume: Volume, box: tuple[slice, slice, slice], voi: np.ndarray, plane: PlaneImage, k: int) -> np.ndarray:
    """The pixels of ``plane`` (an original slice, :func:`slice_as_acquired`) that are voxels of
    a VOI (``voi`` within ``box`` of the volume) on slice ``k``: a boolean mask of the plane's grid."""
    out = np.zeros(plane.values.shape, bool)
    kk, jj, ii = np.nonzero(voi)
    kk, jj, ii = kk + box[0].start, jj + box[1].start, ii + box[2].start
    sel = kk == k
    if not sel.any():
        return out
    uv = plane.world_to_uv(volume.index_to_world(np.stack([kk[sel], jj[sel], ii[sel]], axis=-1).astype(float)))
    cr = np.rint(uv / plane.pixel_mm).astype(int)
    ok = (cr[:, 0] >= 0) & (cr[:, 0] < out.shape[1]) & (cr[:, 1] >= 0) & (cr[:, 1] < out.shape[0])
    out[cr[ok, 1], cr[ok, 0]] = True
    return out


#: Top of the display window of the phantoms' overlays, as a multiple of the background: the
#: background sits at 40 % grey, so its noise texture shows, while every hot insert is dark.
WINDOW_BACKGROUND_FACTOR = 2.5


def display_window(background_bq_ml: float, hot_bq_ml: float | None = None, *, factor: float = WINDOW_BACKGROUND_FACTOR,
                   what: str = "background") -> tuple[float, str]:
    """The top of an overlay's grey scale and how it was chosen, in words.

    ``factor`` (default :data:`WINDOW_BACKGROUND_FACTOR`) times the background, but never
    above the hottest insert's fill (at 4:1 that is 62 % of it, at 10:1 25 %: the
    background's texture shows where a window on the hottest voxel would leave it almost white).
    """
    top = factor * float(background_bq_ml)
    if hot_bq_ml is not None and hot_bq_ml > 0:
        top = min(top, float(hot_bq_ml))
    if not (top > 0 and math.isfinite(top)):
        return 1.0, f"no {what} level"
    note = f"{top / background_bq_ml:.1f} x {what}"
    if hot_bq_ml is not None and hot_bq_ml > 0:
        note += f" = {100 * top / hot_bq_ml:.0f} % of the hot fill"
    return top, note


def nominal_extent_mm(template: Template) -> np.ndarray:
    """Sorted extents (mm) of a template's body: width, height (or diameter twice) and length."""
    body = template.body
    if body.shape == "cylinder":
        xy = (body.diameter_mm, body.diameter_mm)
    else:
        xy = (2 * body.arc_radius_mm, body.arc_radius_mm + body.corner_radius_mm)
    return np.sort(np.array([*xy, template.body_length_mm], float))


def _series_naming(volume: Volume) -> tuple[str, str]:
    """(what, name) of the image: ("series", description), else ("file", file or folder
    name), else ("series", Series Instance UID), else ("", "image")."""
    if volume.series_description and volume.series_description.strip():
        return "series", volume.series_description.strip()
    if volume.source and volume.source != "synthetic":
        name = Path(str(volume.source)).name
        if name:
            return "file", name
    if volume.series_uid:
        return "series", volume.series_uid
    return "", "image"


def series_name(volume: Volume) -> str:
    """How titles name the image: its Series Description, else its file or folder name (a NIfTI
    file has no description), else its Series Instance UID, else ``image``."""
    return _series_naming(volume)[1]


def fmt_number(value: float | None, unit: str | None = None, digits: int | None = None) -> str:
    """A value for tables: ``-`` when missing or not a number, digits by unit."""
    if value is None or not math.isfinite(value):
        return "-"
    if digits is None:
        digits = {"%": 2, "mm": 2, "Bq/mL": 0, "1": 3}.get(unit or "", 3)
    text = f"{value:.{digits}f}"
    if float(text) == 0.0:
        text = text.lstrip("-")
    return text


__all__ = [
    "Analysis",
    "AnalysisSettings",
    "Chart",
    "ComparedSetting",
    "KindOptions",
    "Overlay",
    "PhantomKind",
    "Reread",
    "ResultGrid",
    "RoiKindMask",
    "RoiSetCheck",
    "RowBuilder",
    "Shape",
    "SummaryTable",
    "View",
    "calibration_warning",
    "check_scan_time",
    "fill_error_hint",
    "fmt_number",
    "nominal_extent_mm",
    "FillRecordError",
]
