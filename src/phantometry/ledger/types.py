"""What the ledger returns: plain result types, free of database, CSV and drawing code.

Times are aware UTC datetimes. :class:`Trend` and :class:`CheckResult` carry the control limits
of :mod:`phantometry.ledger.rules`; their drift flags are computed by
:mod:`phantometry.ledger.trends`, and the control chart of a trend is drawn by
:func:`phantometry.ledger.chart.save_trend_chart`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

from .rules import ControlLimits


@dataclass(frozen=True)
class RecordResult:
    """What :meth:`Ledger.record` stored."""

    analysis_id: int
    uid: str
    site: str
    scanner: str
    protocol: str
    n_measurements: int
    replaced: bool


@dataclass(frozen=True)
class AnalysisInfo:
    """One recorded analysis (without its measurements). Times are aware UTC datetimes."""

    id: int
    uid: str
    site: str
    scanner: str
    protocol: str
    series_uid: str | None
    template: str
    acquired_at: datetime
    recorded_at: datetime
    reconstruction: str | None
    nuclide: str | None
    tool_version: str
    verdict: str | None
    settings_hash: str


@dataclass(frozen=True)
class BaselineInfo:
    """The analyses of one scanner and protocol that control limits come from."""

    id: int
    site: str
    scanner: str
    protocol: str
    created_at: datetime
    note: str | None
    analysis_ids: tuple[int, ...]
    first_acquired_at: datetime | None
    last_acquired_at: datetime | None


@dataclass(frozen=True)
class TrendPoint:
    """One analysis's value of the trended metric."""

    analysis_id: int
    analysis_uid: str
    acquired_at: datetime
    value: float | None
    unit: str
    uncertainty: float | None
    band_low: float | None
    band_high: float | None
    verdict: str | None
    in_baseline: bool


@dataclass(frozen=True)
class TrendFlag:
    """A drift rule that fired at one point of a trend."""

    analysis_id: int
    acquired_at: datetime
    value: float
    rule: str
    description: str
    first_acquired_at: datetime


@dataclass
class Trend:
    """One metric of one ROI for one scanner and protocol over time.

    Attributes
    ----------
    points : list of TrendPoint
        In acquisition order.
    limits : ControlLimits or None
        From the current baseline, else from all points shown (``limits.source`` says which);
        None when fewer than two values are available.
    flags : list of TrendFlag
        Drift rules that fired (see :mod:`phantometry.ledger.rules`).
    notes : list of str
        Remarks for the reader (no baseline set, few baseline points, ...).
    """

    site: str
    scanner: str
    protocol: str
    roi: str
    metric: str
    unit: str
    points: list[TrendPoint]
    limits: ControlLimits | None
    flags: list[TrendFlag]
    notes: list[str] = field(default_factory=list)

    def flags_at(self, analysis_id: int) -> list[TrendFlag]:
        """The flags sitting on one analysis."""
        return [f for f in self.flags if f.analysis_id == analysis_id]


@dataclass(frozen=True)
class CheckResult:
    """Drift flags of one metric series found by :meth:`Ledger.check`."""

    site: str
    scanner: str
    protocol: str
    roi: str
    metric: str
    unit: str
    n_points: int
    limits: ControlLimits | None
    flags: list[TrendFlag]


@dataclass(frozen=True)
class ExportReport:
    """What :meth:`Ledger.export_csv` wrote. ``started_at`` is a safe next ``since``."""

    path: Path
    rows: int
    analyses: int
    started_at: datetime


@dataclass(frozen=True)
class ImportReport:
    """What :meth:`Ledger.import_csv` did, counted in analyses (and baselines created)."""

    added: int
    replaced: int
    skipped: int
    rows: int
    baselines: int = 0


@dataclass(frozen=True)
class ScannerInfo:
    """A scanner known to the ledger, with its protocols and number of analyses each."""

    id: int
    site: str
    name: str
    manufacturer: str | None
    model: str | None
    serial: str | None
    protocols: dict[str, int]


__all__ = [
    "AnalysisInfo",
    "BaselineInfo",
    "CheckResult",
    "ExportReport",
    "ImportReport",
    "RecordResult",
    "ScannerInfo",
    "Trend",
    "TrendFlag",
    "TrendPoint",
]
