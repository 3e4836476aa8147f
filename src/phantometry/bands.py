"""Acceptance bands: published or site-defined limits per (ROI, metric), and verdicts.

A *band set* is a YAML file (phantometry's own schema) naming the template it applies to,
the activity ratio it assumes, its published source and a list of entries:

.. code-block:: yaml

    phantometry_bands: 1             # schema version
    name: eanm-fdg-2015              # equal to the file name without .yaml; found by this name
    title: FDG PET/CT harmonisation ranges ...
    source: "Boellaard et al., Eur J Nucl Med Mol Imaging 2015;42:328-354"
    template: iec-body               # the ROIs and metrics are checked against this template
    activity_ratio: 10.0             # sphere : background ratio the limits assume (or null)
    recalled: false                  # default of the entries' flag (limits recalled, not read)
    notes: ["..."]
    entries:
      - {roi: sphere_37mm, metric: rc_mean, low: 0.76, high: 0.89}          # kind: range
      - {roi: sphere_37mm, metric: rc_max, baseline: 1.02, tolerance_pct: 5}  # kind: baseline

Entry kinds: ``range`` (``low`` and/or ``high``; a missing limit is open) and ``baseline``
(``baseline`` +- ``tolerance_pct`` per cent of it, for site limits and trend baselines).
Limits are inclusive and compared with the unrounded value: ``pass`` inside, ``fail``
outside, ``n/a`` when the metric is missing or not a number (e.g. no recovery coefficient for
a cold sphere). Entries may carry ``recalled: true`` (the limit is recalled, verify it
against the publication) and a ``note``.

Band sets are found by name in ``extra_dirs``, then the folders in ``$PHANTOMETRY_BANDS``
(``os.pathsep``-separated), then the shipped folder (``roi_templates/bands``, installed as
``phantometry/roi_templates/bands``).
"""

from __future__ import annotations

import dataclasses
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, Mapping, Sequence

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from .resources import builtin_dir, is_file_reference, list_named, search_path
from .yamlfile import read_yaml_file, validation_problems
from .errors import BandError, PhantometryError
from .results import Measurement

if TYPE_CHECKING:  # pragma: no cover
    from .fill import FillRecord

__all__ = [
    "BANDS_PATH_ENV",
    "BandEntry",
    "BandSet",
    "apply_bands",
    "band_search_path",
    "builtin_band_dir",
    "check_band_set",
    "list_band_sets",
    "load_band_set",
    "load_band_set_file",
    "unit_of_metric",
    "any_failed",
    "RATIO_WARNING_FRACTION",
]

#: Environment variable with extra folders of band sets.
BANDS_PATH_ENV = "PHANTOMETRY_BANDS"
#: Relative difference between a band set's activity ratio and the fill record's that warns.
RATIO_WARNING_FRACTION = 0.10


# =========================================================================== public types
@dataclass(frozen=True)
class BandEntry:
    """One acceptance limit.

    Attributes
    ----------
    roi, metric : what it judges (names as in measurements.csv).
    low, high : inclusive limits in the metric's unit; None = open on that side. For kind
        ``baseline`` they are ``baseline -+ |baseline| tolerance_pct / 100``.
    kind : ``"range"`` or ``"baseline"``.
    baseline, tolerance_pct : the baseline value and its +- tolerance in per cent (baseline kind).
    recalled : True when the limit is recalled rather than read from the publication.
    note : free text.
    """

    roi: str
    metric: str
    low: float | None
    high: float | None
    kind: str = "range"
    baseline: float | None = None
    tolerance_pct: float | None = None
    recalled: bool = False
    note: str | None = None

    def judge(self, value: float | None) -> str:
        """``"pass"``, ``"fail"`` or ``"n/a"`` (value missing or not finite)."""
        if value is None or not isinstance(value, (int, float)) or not math.isfinite(value):
            return "n/a"
        if self.low is not None and value < self.low:
            return "fail"
        if self.high is not None and value > self.high:
            return "fail"
        return "pass"

    def limits_text(self) -> str:
        lo = "-inf" if self.low is None else f"{self.low:g}"
        hi = "+inf" if self.high is None else f"{self.high:g}"
        if self.kind == "baseline":
            return f"{self.baseline:g} +- {self.tolerance_pct:g} % ({lo} to {hi})"
        return f"{lo} to {hi}"


@dataclass
class BandSet:
    """A validated band set (see the module docstring for the file format)."""

    name: str
    title: str
    source: str
    template: str
    activity_ratio: float | None
    entries: list[BandEntry]
    notes: list[str] = field(default_factory=list)
    path: str | None = None

    def entry(self, roi: str, metric: str) -> BandEntry | None:
        for e in self.entries:
            if e.roi == roi and e.metric == metric:
                return e
        return None

    def summary(self) -> dict[str, Any]:
        """JSON-ready description."""
        return {
            "name": self.name,
            "title": self.title,
            "source": self.source,
            "template": self.template,
            "activity_ratio": self.activity_ratio,
            "notes": list(self.notes),
            "path": self.path,
            "entries": [dataclasses.asdict(e) for e in self.entries],
        }


# =========================================================================== file schema
class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


class _EntryModel(_Strict):
    roi: str = Field(min_length=1)
    metric: str = Field(min_length=1)
    kind: Literal["range", "baseline"] | None = None
    low: float | None = None
    high: float | None = None
    baseline: float | None = None
    tolerance_pct: float | None = Field(default=None, gt=0)
    recalled: bool | None = None
    note: str | None = None

    @model_validator(mode="after")
    def _kind(self) -> "_EntryModel":
        kind = self.kind or ("baseline" if self.baseline is not None or self.tolerance_pct is not None else "range")
        self.kind = kind
        if kind == "range":
            if self.baseline is not None or self.tolerance_pct is not None:
                raise ValueError("a range entry takes low/high, not baseline/tolerance_pct")
            if self.low is None and self.high is None:
                raise ValueError("a range entry needs low, high or both")
            for k in ("low", "high"):
                v = getattr(self, k)
                if v is not None and not math.isfinite(v):
                    raise ValueError(f"{k} must be a finite number")
            if self.low is not None and self.high is not None and self.low > self.high:
                raise ValueError(f"low {self.low:g} is above high {self.high:g}; swap or correct the limits")
        else:
            if self.low is not None or self.high is not None:
                raise ValueError("a baseline entry takes baseline and tolerance_pct, not low/high")
            if self.baseline is None or self.tolerance_pct is None:
                raise ValueError("a baseline entry needs both baseline and tolerance_pct (> 0)")
            if not math.isfinite(self.baseline):
                raise ValueError("baseline must be a finite number")
        return self


class _BandFileModel(_Strict):
    phantometry_bands: Literal[1]
    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    title: str
    source: str = Field(min_length=1)
    template: str = Field(min_length=1)
    activity_ratio: float | None = Field(default=None, gt=0)
    recalled: bool = False
    notes: list[str] = []
    entries: list[_EntryModel] = Field(min_length=1)


def _entry_label(data: Any, i: int) -> str:
    if isinstance(data, dict):
        entries = data.get("entries")
        if isinstance(entries, list) and i < len(entries) and isinstance(entries[i], dict):
            e = entries[i]
            return f"entries[{i}] ({e.get('roi', '?')} {e.get('metric', '?')})"
    return f"entries[{i}]"


def _format_errors(source: str, data: Any, err: ValidationError) -> str:
    def place(loc: tuple) -> str:
        if len(loc) >= 2 and loc[0] == "entries" and isinstance(loc[1], int):
            return _entry_label(data, loc[1]) + ("." + ".".join(str(x) for x in loc[2:]) if len(loc) > 2 else "")
        return ".".join(str(x) for x in loc) or "(top level)"

    def problem(e: dict[str, Any]) -> str | None:
        if e["type"] == "extra_forbidden":
            return "unknown key (check the spelling; see the README section on acceptance bands)"
        if e["type"] == "literal_error":
            return e["msg"]
        return None

    return f"{source}: invalid band set: " + "; ".join(validation_problems(err, place=place, problem=problem))


def band_set_from_dict(data: Any, source: str = "<bands>") -> BandSet:
    """Validate a parsed band-set mapping (schema only; see :func:`check_band_set` for the template).

    Raises
    ------
    BandError
        Naming ``source`` and each entry at fault (index, roi and metric).
    """
    if not isinstance(data, dict):
        raise BandError(f"{source}: a band set must be a YAML mapping, got {type(data).__name__}")
    try:
        model = _BandFileModel.model_validate(data)
    except ValidationError as err:
        raise BandError(_format_errors(source, data, err)) from None
    entries = []
    seen: dict[tuple[str, str], int] = {}
    for i, e in enumerate(model.entries):
        key = (e.roi, e.metric)
        if key in seen:
            raise BandError(
                f"{source}: {_entry_label(data, i)}: duplicates or overlaps entries[{seen[key]}] for the same roi and "
                "metric; keep one limit per roi and metric in a band set"
            )
        seen[key] = i
        if e.kind == "baseline":
            half = abs(float(e.baseline)) * float(e.tolerance_pct) / 100.0  # type: ignore[arg-type]
            low, high = float(e.baseline) - half, float(e.baseline) + half  # type: ignore[arg-type]
        else:
            low, high = e.low, e.high
        entries.append(
            BandEntry(
                roi=e.roi,
                metric=e.metric,
                low=low,
                high=high,
                kind=str(e.kind),
                baseline=e.baseline,
                tolerance_pct=e.tolerance_pct,
                recalled=model.recalled if e.recalled is None else bool(e.recalled),
                note=e.note,
            )
        )
    return BandSet(
        name=model.name,
        title=model.title,
        source=model.source,
        template=model.template,
        activity_ratio=model.activity_ratio,
        entries=entries,
        notes=list(model.notes),
        path=None if source.startswith("<") else source,
    )


# =========================================================================== template checks


def check_band_set(band_set: BandSet, template_name: str, known: Mapping[str, Sequence[str]]) -> None:
    """Check that a band set is for ``template_name`` and every entry names an ROI and metric
    the template's analysis produces (``known``: ROI -> metrics, from its phantom kind).

    Raises
    ------
    BandError
        Naming the file, each entry at fault and the choices.
    """
    where = band_set.path or band_set.name
    if band_set.template != template_name:
        raise BandError(
            f"{where}: band set {band_set.name} is for template {band_set.template}, but the scan is measured with "
            f"template {template_name}; choose a band set for {template_name} (phantometry bands list)"
        )
    problems = []
    for i, e in enumerate(band_set.entries):
        label = f"entries[{i}] ({e.roi} {e.metric})"
        if e.roi not in known:
            problems.append(f"{label}: template {template_name} has no ROI {e.roi!r}; ROIs: {', '.join(sorted(known))}")
        elif e.metric not in known[e.roi]:
            problems.append(f"{label}: ROI {e.roi} has no metric {e.metric!r}; metrics: {', '.join(known[e.roi])}")
    if problems:
        raise BandError(f"{where}: " + "; ".join(problems))


def unit_of_metric(metric: str) -> str:
    """The unit a metric's name implies (phantometry's naming rule): ``%`` for ``*_pct`` and
    ``percent_contrast``, ``mm`` for ``*_mm``, ``Bq/mL`` for ``*_bq_ml``, else ``1`` (a ratio)."""
    if metric.endswith("_pct") or metric == "percent_contrast":
        return "%"
    if metric.endswith("_mm"):
        return "mm"
    if metric.endswith("_bq_ml"):
        return "Bq/mL"
    return "1"


# =========================================================================== finding and loading
def builtin_band_dir() -> Path:
    """Folder of the band sets shipped with phantometry."""
    return builtin_dir() / "bands"


def band_search_path(extra_dirs: Sequence[str | os.PathLike] | None = None) -> list[Path]:
    """Folders searched for band sets by name: ``extra_dirs``, ``$PHANTOMETRY_BANDS``, built-in."""
    return search_path(extra_dirs, BANDS_PATH_ENV, [builtin_band_dir()])


def list_band_sets(extra_dirs: Sequence[str | os.PathLike] | None = None) -> dict[str, Path]:
    """Band-set name (file name without ``.yaml``) -> file, earlier folders winning."""
    return list_named(band_search_path(extra_dirs))


def load_band_set_file(path: str | os.PathLike) -> BandSet:
    """Load one band-set file (schema and name; its ROIs and metrics are checked against the
    template when it is applied, :func:`check_band_set`).

    Raises
    ------
    BandError
        Unreadable file, invalid YAML or schema, or a name differing from the file name.
    """
    p = Path(path)
    bs = band_set_from_dict(read_yaml_file(p, BandError, "band set"), source=str(p))
    if bs.name != p.stem:
        raise BandError(f"{p}: name {bs.name!r} differs from the file name {p.stem!r}; make them equal so the set is found by its name")
    return bs


def load_band_set(
    name_or_path: str | os.PathLike | BandSet,
    extra_dirs: Sequence[str | os.PathLike] | None = None,
) -> BandSet:
    """A band set by name (searched as :func:`band_search_path` says) or by file path.

    Raises
    ------
    BandError
        Unknown name (the message lists the choices) or an invalid file.
    """
    if isinstance(name_or_path, BandSet):
        return name_or_path
    p = Path(name_or_path)
    if is_file_reference(p):
        if not p.exists():
            raise BandError(f"{p}: band-set file not found")
        return load_band_set_file(p)
    available = list_band_sets(extra_dirs)
    name = str(name_or_path)
    if name not in available:
        raise BandError(
            f"unknown band set {name!r}; available: {', '.join(sorted(available)) or 'none'} "
            f"(give a file path, or add a folder with ${BANDS_PATH_ENV})"
        )
    return load_band_set_file(available[name])


# =========================================================================== verdicts
def _ratio_of(fill: "FillRecord", roi: str) -> float | None:
    try:
        if fill.is_cold(roi):
            return None
        r = float(fill.activity_ratio(roi))
    except PhantometryError:
        return None
    return r if r > 0 else None


def _join(note: str | None, extra: str) -> str:
    return extra if not note else f"{note}; {extra}"


def apply_bands(
    rows: list[Measurement],
    band_sets: Sequence[BandSet],
    *,
    fill: "FillRecord | None" = None,
) -> tuple[list[Measurement], list[str]]:
    """Judge measurement rows against band sets.

    Parameters
    ----------
    rows : the measurement rows (not modified).
    band_sets : band sets to apply. A metric judged by several sets keeps one row (one row
        per roi and metric, as measurements.csv promises): ``band`` joins the set names with
        ``+``, ``band_low``/``band_high`` are the intersection of their limits (the range that
        passes them all), the verdict is the worst (``fail`` over ``n/a`` over ``pass``), and
        the note gives each set's limits and verdict.
    fill : the fill record; when given, a set whose ``activity_ratio`` differs by more than
        10 % from an insert's ratio warns (and says so in the affected rows' notes).

    Returns
    -------
    (rows, warnings)
        Rows with ``band``, ``band_low``, ``band_high`` and ``verdict`` (``pass``, ``fail``,
        ``n/a``) filled where a band applies; rows without a band are unchanged (verdict
        None). A banded metric missing from ``rows`` gets a row with value NaN and verdict
        ``n/a``.
    """
    warnings: list[str] = []
    seen_names: set[str] = set()
    sets: list[BandSet] = []
    for bs in band_sets:
        if bs.name in seen_names:
            continue
        seen_names.add(bs.name)
        sets.append(bs)
    if not sets:
        return list(rows), warnings
    # ratio checks
    ratio_notes: dict[tuple[str, str], str] = {}
    if fill is not None:
        for bs in sets:
            if bs.activity_ratio is None:
                continue
            off = {}
            for e in bs.entries:
                r = _ratio_of(fill, e.roi)
                if r is not None and abs(r / bs.activity_ratio - 1.0) > RATIO_WARNING_FRACTION:
                    off[e.roi] = r
            if off:
                ratios = sorted({round(v, 3) for v in off.values()})
                text = (
                    f"band set {bs.name} assumes a {bs.activity_ratio:g}:1 ratio but the fill record gives "
                    f"{', '.join(f'{r:g}:1' for r in ratios)} for {', '.join(sorted(off))}; "
                    "its verdicts on those ROIs do not compare like with like"
                )
                warnings.append(text)
                for roi in off:
                    ratio_notes[(bs.name, roi)] = f"WARNING: band ratio {bs.activity_ratio:g}:1, fill {off[roi]:g}:1"
    by_key: dict[tuple[str, str], list[tuple[BandSet, BandEntry]]] = {}
    for bs in sets:
        for e in bs.entries:
            by_key.setdefault((e.roi, e.metric), []).append((bs, e))
    out: list[Measurement] = []
    covered: set[tuple[str, str]] = set()
    for row in rows:
        matches = by_key.get((row.roi, row.metric))
        if not matches:
            out.append(row)
            continue
        out.append(_banded(row, matches, ratio_notes))
        covered.add((row.roi, row.metric))
    proto = rows[0] if rows else None
    for key, matches in by_key.items():
        if key in covered:
            continue
        roi, metric = key
        why = "not measured"
        if fill is not None and metric.startswith("rc_") and fill.is_cold(roi):
            why = "not measured: the insert is cold (no recovery coefficient)"
        row = Measurement(
            series_uid=proto.series_uid if proto else None,
            acquired_at=proto.acquired_at if proto else None,
            template=proto.template if proto else matches[0][0].template,
            roi=roi,
            metric=metric,
            value=math.nan,
            unit=unit_of_metric(metric),
            note=why,
        )
        out.append(_banded(row, matches, ratio_notes))
    return out, warnings


_VERDICT_ORDER = {"fail": 0, "n/a": 1, "pass": 2}


def _banded(row: Measurement, matches: list[tuple[BandSet, BandEntry]], ratio_notes: dict[tuple[str, str], str]) -> Measurement:
    """One row judged by one or more band entries (one per set).

    Several sets: ``band`` joins their names with ``+``, the limits are the intersection
    (the range that passes every band; None when the bands do not overlap), the verdict the
    worst, and the note lists each band's limits and verdict.
    """
    note = row.note
    verdicts = []
    for bs, e in matches:
        v = e.judge(row.value)
        verdicts.append(v)
        if len(matches) > 1:
            note = _join(note, f"{bs.name} {e.limits_text()}: {v}")
        if e.recalled:
            note = _join(note, f"{bs.name} limits recalled, verify against {bs.source}")
        if e.note:
            note = _join(note, e.note)
        rn = ratio_notes.get((bs.name, e.roi))
        if rn:
            note = _join(note, f"{bs.name}: {rn}" if len(matches) > 1 else rn)
    if len(matches) == 1:
        bs, e = matches[0]
        return dataclasses.replace(row, band=bs.name, band_low=e.low, band_high=e.high, verdict=verdicts[0], note=note)
    lows = [e.low for _, e in matches if e.low is not None]
    highs = [e.high for _, e in matches if e.high is not None]
    low = max(lows) if lows else None
    high = min(highs) if highs else None
    if low is not None and high is not None and low > high:
        note = _join(note, "the bands do not overlap: no value passes all of them")
        low = high = None
    verdict = min(verdicts, key=lambda v: _VERDICT_ORDER[v])
    return dataclasses.replace(row, band="+".join(bs.name for bs, _ in matches), band_low=low, band_high=high, verdict=verdict, note=note)


def any_failed(rows: Sequence[Measurement]) -> bool:
    """True when any row's verdict is ``fail`` (for ``measure --strict``)."""
    return any(r.verdict == "fail" for r in rows)
