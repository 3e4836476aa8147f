"""What goes into the ledger, checked before any SQL runs: times, measurement rows, verdicts, fill records, text.

Every check here raises one readable line (:class:`LedgerError`, or :class:`InputError` for a
file) naming where the value came from. The same checks serve :meth:`Ledger.record` and
:meth:`Ledger.import_csv` (through :mod:`phantometry.ledger.csvio`), so a value is accepted or
refused the same way whichever way it arrives.
"""

from __future__ import annotations

import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from ..errors import InputError, LedgerError
from ..results import Measurement
from ..timeutil import parse_aware_time
from .schema import analyses, check_text, measurements, scanners, sites

#: Verdict order, worst first, for the analysis-level verdict.
VERDICT_ORDER = ("fail", "pass", "n/a")


def aware_utc(value: Any, what: str, where: str) -> datetime:
    """A timezone-aware time (datetime or ISO 8601 text) converted to UTC.

    Raises
    ------
    LedgerError
        Missing, not ISO 8601, or without a time zone.
    """
    if value is None or value == "":
        raise LedgerError(f"{where}: {what} is missing; the ledger needs a timezone-aware time")
    return parse_aware_time(value, f"{where}: {what}", LedgerError).astimezone(timezone.utc)


def finite_or_none(v: Any) -> float | None:
    """A finite float, or None for a missing (None, empty) or non-finite value; ValueError/TypeError if not a number."""
    if v is None or v == "":
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def analysis_verdict(verdicts: Iterable[str | None]) -> str | None:
    """The worst of measurement verdicts: ``fail`` over ``pass`` over ``n/a``; None if none."""
    present = {v for v in verdicts if v}
    for v in VERDICT_ORDER:
        if v in present:
            return v
    return None


def measurement_row(row: Measurement | Mapping[str, Any], where: str) -> dict[str, Any]:
    """One measurement row as stored (the ``measurements`` columns), checked.

    Raises
    ------
    LedgerError
        No roi, metric or unit; an unknown verdict; a value that is not a number.
    """
    d = row.as_dict() if isinstance(row, Measurement) else dict(row)
    for key in ("roi", "metric", "unit"):
        if not d.get(key):
            raise LedgerError(f"{where}: a measurement row has no {key}; every row needs roi, metric, unit")
    verdict = d.get("verdict") or None
    if verdict is not None and verdict not in VERDICT_ORDER:
        raise LedgerError(f"{where}: measurement {d.get('roi')} {d.get('metric')} has verdict {str(verdict)[:40]!r}; "
                          f"expected {', '.join(VERDICT_ORDER)} or none")
    try:
        return {
            "roi": str(d["roi"]),
            "metric": str(d["metric"]),
            "value": finite_or_none(d.get("value")),
            "unit": str(d["unit"]),
            "uncertainty": finite_or_none(d.get("uncertainty")),
            "band": d.get("band") or None,
            "band_low": finite_or_none(d.get("band_low")),
            "band_high": finite_or_none(d.get("band_high")),
            "verdict": d.get("verdict") or None,
            "note": d.get("note") or None,
        }
    except (TypeError, ValueError):
        raise LedgerError(f"{where}: measurement {d.get('roi')} {d.get('metric')} has a non-numeric value; fix the input") from None


def validated_fill(fill_record: Mapping[str, Any] | None, where: str) -> dict[str, Any] | None:
    """The fill record as stored: validated, only its known keys (no personal data); None if empty.

    Raises
    ------
    FillRecordError
        An invalid fill record.
    """
    if not fill_record:
        return None
    from ..fill import FillRecord

    return FillRecord.from_dict(dict(fill_record), source=f"{where}: fill_record").to_dict()


def check_analysis_text(site: str, scanner: str, make: Mapping[str, Any] | None, analysis: Mapping[str, Any],
                        rows: Sequence[Mapping[str, Any]], where: str) -> None:
    """Every text of one analysis within the ledger's limits (:func:`phantometry.ledger.schema.check_text`).

    Raises
    ------
    LedgerError
        A label, an analysis field or a measurement's text beyond its limit.
    """
    check_text(sites, {"name": site}, where)
    make = make or {}
    check_text(scanners, {"name": scanner, **{k: make.get(k) for k in ("manufacturer", "model", "serial")}}, where)
    check_text(analyses, dict(analysis), where)
    for r in rows:
        check_text(measurements, dict(r), f"{where}: {str(r.get('roi'))[:40]} {str(r.get('metric'))[:40]}")


def read_result_document(path: str | os.PathLike) -> tuple[dict[str, Any], str]:
    """The measurements.json of a result folder (or that file itself) and its path for messages.

    Raises
    ------
    InputError
        No such file, or not JSON.
    """
    p = Path(path)
    json_path = p / "measurements.json" if p.is_dir() else p
    if not json_path.is_file():
        raise InputError(f"{json_path}: no such file; give a result folder of phantometry measure or its measurements.json")
    try:
        doc = json.loads(json_path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as exc:
        raise InputError(f"{json_path}: is not UTF-8 text (byte {exc.start}); give the measurements.json phantometry wrote") from None
    except (OSError, json.JSONDecodeError, RecursionError) as exc:
        reason = getattr(exc, "strerror", None) or (exc.msg if isinstance(exc, json.JSONDecodeError) else "nested too deeply")
        raise InputError(f"{json_path}: cannot be read as JSON ({reason}); give the measurements.json phantometry wrote") from None
    if not isinstance(doc, dict):
        raise InputError(f"{json_path}: not a phantometry measurements.json (needs 'series' and 'measurements'); give a result folder of phantometry measure")
    return doc, str(json_path)


__all__ = [
    "VERDICT_ORDER",
    "analysis_verdict",
    "aware_utc",
    "check_analysis_text",
    "finite_or_none",
    "measurement_row",
    "read_result_document",
    "validated_fill",
]
