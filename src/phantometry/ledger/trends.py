"""Trend statistics on recorded points: control limits from a baseline (with notes) and drift flags.

The numbers come from :mod:`phantometry.ledger.rules` (sequences of values); here they are
applied to the :class:`~phantometry.ledger.types.TrendPoint` list of one metric series, points
without a value left out, and each flag placed on its analysis. No database access: the store
hands the points and the baseline values in.
"""

from __future__ import annotations

from typing import Sequence

from .rules import ControlLimits, control_limits, drift_flags
from .types import TrendFlag, TrendPoint

#: Units whose metrics ``check`` skips unless asked: positions (mm) and absolute
#: concentrations (Bq/mL) follow the day's set-up and filling, not the scanner's performance.
UNTRENDED_UNITS = ("mm", "Bq/mL")

#: Fewer baseline values than this make the drift rules weak (said in the notes).
MEANINGFUL_BASELINE = 8


def trend_limits(points: Sequence[TrendPoint], baseline_id: int | None,
                 base_values: Sequence[float | None] | None) -> tuple[ControlLimits | None, list[str]]:
    """Control limits of one series and notes for the reader.

    Parameters
    ----------
    points : sequence of TrendPoint
        The series (their values give the limits when there is no baseline).
    baseline_id : int or None
        The current baseline, if one is set.
    base_values : sequence of float or None, or None
        The baseline's values of this metric (used when ``baseline_id`` is given).

    Returns
    -------
    limits : ControlLimits or None
        From the baseline, else from all points; None with fewer than two values.
    notes : list of str
        No baseline, too few values, no spread.
    """
    notes: list[str] = []
    if baseline_id is not None:
        limits = control_limits(base_values or [], source=f"baseline #{baseline_id}")
        if limits is None:
            notes.append(f"baseline #{baseline_id} holds fewer than 2 values of this metric: no control limits")
    else:
        limits = control_limits([p.value for p in points], source="all points (no baseline set)")
        notes.append("no baseline set: limits come from all points shown; set one with phantometry ledger baseline")
    if limits is not None and limits.n < MEANINGFUL_BASELINE:
        notes.append(f"control limits rest on only {limits.n} values; {MEANINGFUL_BASELINE} or more make the rules meaningful")
    if limits is not None and limits.sigma == 0:
        notes.append("the baseline values do not vary (sigma = 0): the sigma rules are off")
    return limits, notes


def trend_flags(points: Sequence[TrendPoint], limits: ControlLimits | None) -> list[TrendFlag]:
    """The drift rules (:func:`phantometry.ledger.rules.drift_flags`) on the points that have a value.

    Each flag sits on the analysis that completes its pattern and names when the pattern began.
    """
    valid = [p for p in points if p.value is not None]
    if not valid:
        return []
    flags = drift_flags([p.value for p in valid], limits.mean if limits else None, limits.sigma if limits else None)
    return [
        TrendFlag(valid[f.index].analysis_id, valid[f.index].acquired_at, float(valid[f.index].value), f.rule, f.description,
                  valid[f.first_index].acquired_at)
        for f in flags
    ]


__all__ = ["MEANINGFUL_BASELINE", "UNTRENDED_UNITS", "trend_flags", "trend_limits"]
