"""Numbers as the terminal shows them: one convention for every command.

* a missing or undefined value is ``-`` (never ``nan``);
* digits follow the unit (ratios such as RC: 3 decimals, % and mm: 2, Bq/mL: 0), so one
  column never mixes ``0.698`` and ``0.68889``;
* a value that rounds to zero is ``0.00``, never ``-0.00``;
* the unit ``1`` of a ratio is not shown;
* limits are a range with the same digits at both ends (``0.44–0.60``; ``-0.12 to 0.12``
  when an end is negative), or one side (``≥ 0.44``).
"""

from __future__ import annotations

import math
from typing import Optional

#: decimals by unit (anything else: 3)
DECIMALS = {"1": 3, "%": 2, "mm": 2, "Bq/mL": 0, "kBq/mL": 2, "s": 1, "deg": 2}

MISSING = "-"


def decimals_for(unit: Optional[str]) -> int:
    """Decimals shown for values of ``unit``."""
    return DECIMALS.get(unit or "1", 3)


def number(value: Optional[float], unit: Optional[str] = None, digits: Optional[int] = None) -> str:
    """A value with the digits of its unit; :data:`MISSING` when absent or not finite."""
    if value is None:
        return MISSING
    try:
        value = float(value)
    except (TypeError, ValueError):
        return MISSING
    if not math.isfinite(value):
        return MISSING
    nd = decimals_for(unit) if digits is None else digits
    text = f"{value:.{nd}f}"
    if float(text) == 0.0:
        text = text.lstrip("-")
    return text


def unit_suffix(unit: Optional[str]) -> str:
    """`` %``, `` mm``, `` Bq/mL``; nothing for a ratio (unit ``1``) or no unit."""
    return "" if unit in (None, "", "1") else f" {unit}"


def with_unit(value: Optional[float], unit: Optional[str] = None, digits: Optional[int] = None) -> str:
    """``0.00 %``, ``5314 Bq/mL``, ``1.003`` (a ratio), ``-`` when missing."""
    text = number(value, unit, digits)
    return text if text == MISSING else text + unit_suffix(unit)


def limit_decimals(*limits: Optional[float], most: int = 4) -> int:
    """The fewest decimals (up to ``most``) that show every finite limit as written."""
    finite = [float(v) for v in limits if v is not None and math.isfinite(float(v))]
    for nd in range(most + 1):
        if all(abs(round(v, nd) - v) <= 1e-9 * max(1.0, abs(v)) for v in finite):
            return nd
    return most


def span(low: str, high: str) -> str:
    """Two formatted ends as a range: ``0.44–0.60``; ``-0.12 to 0.12`` when an end is negative
    (a dash between negative numbers would read as a minus)."""
    if low.startswith("-") or high.startswith("-"):
        return f"{low} to {high}"
    return f"{low}–{high}"


def limits_range(low: Optional[float], high: Optional[float]) -> str:
    """``0.44–0.60`` (both ends with the same digits), ``≥ 0.44``, ``≤ 0.60`` or ``-``."""
    lo = low if low is not None and math.isfinite(low) else None
    hi = high if high is not None and math.isfinite(high) else None
    nd = limit_decimals(lo, hi)
    if lo is not None and hi is not None:
        return span(number(lo, digits=nd), number(hi, digits=nd))
    if lo is not None:
        return f"≥ {number(lo, digits=nd)}"
    if hi is not None:
        return f"≤ {number(hi, digits=nd)}"
    return MISSING


__all__ = ["DECIMALS", "MISSING", "decimals_for", "number", "unit_suffix", "with_unit", "limit_decimals", "limits_range", "span"]
