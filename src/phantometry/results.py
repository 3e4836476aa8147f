"""Measurement rows: the one currency every output is written from.

A :class:`Measurement` is one (roi, metric) value with its unit and context. The CSV long
format (``measurements.csv``), the JSON file and the trend ledger all hold the same rows.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import asdict, dataclass, fields
from typing import Any

#: Columns of measurements.csv, in order. A stable contract: new columns are only appended.
CSV_COLUMNS = [
    "series_uid",
    "acquired_at",
    "template",
    "roi",
    "metric",
    "value",
    "unit",
    "uncertainty",
    "band",
    "band_low",
    "band_high",
    "verdict",
    "note",
    "uncertainty_fill",
]

CAUTION = (
    "Results support, and do not replace, the judgement of a qualified medical physicist. "
    "Follow local regulations and the scanner maker's acceptance procedures."
)


@dataclass
class Measurement:
    """One measured value.

    Attributes
    ----------
    roi : str
        ROI name from the template (``sphere_10mm`` ... ``background``, ``lung_insert``, ``phantom``).
    metric : str
        Metric name (``percent_contrast``, ``background_variability_pct``, ``rc_max``, ...).
    value : float
    unit : str
        ``%``, ``1`` (dimensionless ratio), ``Bq/mL``, ``mm``.
    uncertainty : float or None
        Standard uncertainty in the unit of ``value`` from the image (noise, fit), where estimated.
    uncertainty_fill : float or None
        Standard uncertainty in the unit of ``value`` from the fill record's stated input
        uncertainties (dose calibrator, residual, volume; GUM), for values that depend on the
        fill record (recovery coefficients, activity recovery, percent contrast); None where
        the value does not depend on it or the record states no uncertainty. Kept apart from
        ``uncertainty``: verdicts are on the value alone.
    """

    series_uid: str | None
    acquired_at: str | None
    template: str
    roi: str
    metric: str
    value: float
    unit: str
    uncertainty: float | None = None
    band: str | None = None
    band_low: float | None = None
    band_high: float | None = None
    verdict: str | None = None
    note: str | None = None
    uncertainty_fill: float | None = None

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        for k in ("value", "uncertainty", "band_low", "band_high", "uncertainty_fill"):
            v = d[k]
            if isinstance(v, float) and not math.isfinite(v):
                d[k] = None
        return d


def _fmt(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return repr(round(v, 10))
    return str(v)


def measurements_csv(rows: list[Measurement]) -> str:
    """Rows as CSV text with :data:`CSV_COLUMNS` (UTF-8, comma, header line)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for r in rows:
        d = r.as_dict()
        w.writerow([_fmt(d[c]) for c in CSV_COLUMNS])
    return buf.getvalue()


def read_measurements_csv(path: str | os.PathLike) -> list[Measurement]:
    """Read rows back from a measurements.csv (round trip of :func:`measurements_csv`)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return [measurement_from_record(rec) for rec in csv.DictReader(fh)]


def measurement_from_record(rec: dict[str, Any]) -> Measurement:
    """A Measurement from one CSV record (strings; empty means missing)."""
    kw: dict[str, Any] = {}
    for f in fields(Measurement):
        raw = rec.get(f.name, "")
        if f.name in ("value", "uncertainty", "band_low", "band_high", "uncertainty_fill"):
            kw[f.name] = float(raw) if raw not in ("", None) else (math.nan if f.name == "value" else None)
        else:
            kw[f.name] = raw if raw not in ("", None) else None
    return Measurement(**kw)


def _json_default(o: Any) -> Any:
    import numpy as np

    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if hasattr(o, "isoformat"):
        return o.isoformat()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def to_json(obj: Any) -> str:
    return json.dumps(obj, indent=2, default=_json_default, allow_nan=False)
