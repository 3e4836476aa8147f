"""Trend ledger: analyses and measurements across sessions (SQLAlchemy; SQLite or PostgreSQL).

Monthly QC is about change over time: one scanner's numbers against its own history and its
limits. :class:`Ledger` records analyses (``phantometry measure --record``, ``ledger add``),
lists and filters them, trends one metric with control limits from a baseline and the drift
rules of :mod:`phantometry.ledger.rules`, and exports/imports long-format CSV for a lab
database. The store is SQLite by default (a file in the user data directory) or any
SQLAlchemy URL (``--db URL`` / ``$PHANTOMETRY_DB``), PostgreSQL being the shared option.
No patient identity is ever stored. Reading never creates a store (``Ledger(url, create=False)``
raises :class:`NoLedgerStore`).

Modules: ``store`` (:class:`Ledger`, the database access), ``types`` (what it returns),
``inputs`` (checks of what goes in), ``labels`` (default labels, an analysis's identity),
``trends`` (limits and flags of a series), ``rules`` (control limits, drift rules), ``csvio``
(the export/import CSV; ``csvcells`` its safe text cells), ``chart`` (the control chart),
``schema`` (tables, URLs, migrations), ``outfiles`` (files written), ``measure_record``
(``measure --record``).
"""

from ..errors import LedgerError
from .csvio import LEDGER_CSV_COLUMNS, LedgerCsv, read_ledger_csv
from .inputs import analysis_verdict, read_result_document
from .labels import default_protocol_label, default_scanner_label, default_site_label, settings_hash
from .rules import RULES, ControlLimits, Flag, control_limits, drift_flags
from .schema import DB_ENV, NoLedgerStore, default_url, head_revision
from .store import Ledger
from .trends import UNTRENDED_UNITS
from .types import (
    AnalysisInfo,
    BaselineInfo,
    CheckResult,
    ExportReport,
    ImportReport,
    RecordResult,
    ScannerInfo,
    Trend,
    TrendFlag,
    TrendPoint,
)

__all__ = [
    "DB_ENV",
    "LEDGER_CSV_COLUMNS",
    "RULES",
    "UNTRENDED_UNITS",
    "AnalysisInfo",
    "BaselineInfo",
    "CheckResult",
    "ControlLimits",
    "ExportReport",
    "Flag",
    "ImportReport",
    "Ledger",
    "LedgerCsv",
    "LedgerError",
    "NoLedgerStore",
    "RecordResult",
    "ScannerInfo",
    "Trend",
    "TrendFlag",
    "TrendPoint",
    "analysis_verdict",
    "control_limits",
    "default_protocol_label",
    "default_scanner_label",
    "default_site_label",
    "default_url",
    "drift_flags",
    "head_revision",
    "read_ledger_csv",
    "read_result_document",
    "settings_hash",
]
