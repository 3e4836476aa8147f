"""The ledger's CSV files (``ledger export`` / ``ledger import``): columns, writing rows, reading them back.

One row per measurement (long format), its analysis repeated on each row. Times are ISO 8601
in UTC; numbers are written with full precision (Python ``repr``), empty when missing; text
cells are spreadsheet-safe and read back exactly (:mod:`phantometry.ledger.csvcells`). The
``baselines`` column (the newest) lists the baselines an analysis belongs to as compact JSON,
``[{"created_at": ISO time, "note": text or null}, ...]`` oldest first, empty for none.

:class:`LedgerCsvWriter` formats rows the store hands it (the store streams them from the
database into :func:`phantometry.ledger.outfiles.write_text_atomically`);
:func:`read_ledger_csv` reads and checks a whole file before any store is opened.
"""

from __future__ import annotations

import csv
import json
import math
import os
from collections import OrderedDict
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import IO, Any, Iterable, Sequence

from ..errors import InputError, LedgerError
from ..results import CSV_COLUMNS
from .csvcells import format_row, neutralise, restore
from .inputs import VERDICT_ORDER, aware_utc, finite_or_none

#: Columns of ``ledger export`` / ``ledger import`` CSV files, in order. A stable contract:
#: columns are only ever appended. One row per measurement (long format); times are ISO 8601
#: in UTC; numbers are written with full precision (Python ``repr``), empty when missing; text
#: cells are spreadsheet-safe (:func:`phantometry.ledger.csvcells.neutralise`). ``baselines``
#: (the newest column) lists the baselines the analysis belongs to as compact JSON,
#: ``[{"created_at": ISO time, "note": text or null}, ...]`` oldest first, empty for none.
LEDGER_CSV_COLUMNS = [
    "analysis_uid",
    "recorded_at",
    "site",
    "scanner",
    "protocol",
    "series_uid",
    "template",
    "acquired_at",
    "reconstruction",
    "tool_version",
    "settings_hash",
    # then the measurement columns of measurements.csv from roi to note, in the same order
    # (later measurements.csv columns, such as uncertainty_fill, are not stored in the ledger)
    *CSV_COLUMNS[CSV_COLUMNS.index("roi") : CSV_COLUMNS.index("note") + 1],
    "baselines",
]
#: Columns an import accepts missing (appended after the first exports were written).
OPTIONAL_CSV_COLUMNS = ("baselines",)
FLOAT_COLUMNS = ("value", "uncertainty", "band_low", "band_high")
TIME_COLUMNS = ("recorded_at", "acquired_at")
#: Columns whose cells are text (neutralised on export, restored on import).
TEXT_CSV_COLUMNS = tuple(c for c in LEDGER_CSV_COLUMNS if c not in FLOAT_COLUMNS + TIME_COLUMNS)
#: Columns that describe the analysis (the same on each of its rows).
ANALYSIS_COLUMNS = (
    "recorded_at", "site", "scanner", "protocol", "series_uid", "template", "acquired_at",
    "reconstruction", "tool_version", "settings_hash",
)
_TEXT_INDEX = tuple(LEDGER_CSV_COLUMNS.index(c) for c in TEXT_CSV_COLUMNS)
_EXPORT_HELP = "give a CSV written by phantometry ledger export"


# ----------------------------------------------------------------------------- writing
def csv_cell(v: Any) -> str:
    """One value as CSV text: ISO 8601 UTC for times, ``repr`` for finite floats, empty for missing or non-finite."""
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    if isinstance(v, datetime):
        return v.astimezone(timezone.utc).isoformat()
    return str(v)


def baselines_cell(items: Iterable[tuple[datetime, str | None]]) -> str:
    """The ``baselines`` cell of one analysis from its baselines' (created_at, note), oldest first."""
    return json.dumps([{"created_at": csv_cell(created), "note": note} for created, note in items],
                      ensure_ascii=False, separators=(",", ":"))


class LedgerCsvWriter:
    """Writes ledger CSV lines to an open text file and counts them: :meth:`header`, then :meth:`row` per measurement.

    Attributes
    ----------
    rows : int
        Measurement rows written.
    analyses : int
        Distinct analyses among them.
    """

    def __init__(self) -> None:
        self._uids: set[str] = set()
        self.rows = 0

    @property
    def analyses(self) -> int:
        return len(self._uids)

    @staticmethod
    def header(fh: IO[str]) -> None:
        """The header line (:data:`LEDGER_CSV_COLUMNS`)."""
        fh.write(format_row(LEDGER_CSV_COLUMNS))

    def row(self, fh: IO[str], values: Sequence[Any], baselines: str) -> None:
        """One line: ``values`` in the order of :data:`LEDGER_CSV_COLUMNS` up to ``baselines``, then that cell.

        Text cells are neutralised (:func:`phantometry.ledger.csvcells.neutralise`).
        """
        self._uids.add(values[0])
        cells = [csv_cell(v) for v in values] + [baselines]
        for i in _TEXT_INDEX:
            cells[i] = neutralise(cells[i])
        fh.write(format_row(cells))
        self.rows += 1


# ----------------------------------------------------------------------------- reading
@dataclass
class LedgerCsv:
    """A ledger CSV read and checked (:func:`read_ledger_csv`), ready for :meth:`Ledger.import_csv`.

    Attributes
    ----------
    groups : OrderedDict
        Analysis uid -> (head, rows): the analysis columns (times aware, text restored) and
        its measurement rows (the ``measurements`` columns).
    baselines : OrderedDict
        (site, scanner, protocol, created_at) -> (note, member analysis uids).
    """

    path: Path
    groups: "OrderedDict[str, tuple[dict[str, Any], list[dict[str, Any]]]]"
    baselines: "OrderedDict[tuple, tuple[str | None, list[str]]]"


def read_ledger_csv(path: str | os.PathLike) -> LedgerCsv:
    """Read and check a CSV written by :meth:`Ledger.export_csv` (text cells restored).

    Raises
    ------
    InputError
        Missing columns, unparsable numbers, times or baselines (named with file and line).
    """
    p = Path(path)
    groups, wanted = _read_ledger_csv(p)
    return LedgerCsv(p, groups, wanted)


def _parse_baselines_cell(cell: str, path: Path, line: int) -> list[tuple[datetime, str | None]]:
    """The ``baselines`` cell: a JSON list of {created_at, note}; empty for none."""
    if not cell.strip():
        return []
    try:
        items = json.loads(cell)
        if not isinstance(items, list):
            raise ValueError
        out = []
        for item in items:
            note = item.get("note")
            if not isinstance(note, (str, type(None))):
                raise ValueError
            out.append((aware_utc(item["created_at"], "baseline created_at", f"{path}: line {line}"), note))
        return out
    except (ValueError, TypeError, KeyError, AttributeError, RecursionError, LedgerError):
        raise InputError(f"{path}: line {line}: baselines {cell[:60]!r} is not a list of {{created_at, note}}; {_EXPORT_HELP}") from None


def _measurement(rec: dict[str, str], path: Path, line: int) -> dict[str, Any]:
    """The measurement columns of one CSV record (text already restored), checked."""
    row: dict[str, Any] = {}
    for c in FLOAT_COLUMNS:
        cell = rec[c].strip()
        try:
            row[c] = finite_or_none(cell)
        except ValueError:
            raise InputError(f"{path}: line {line}: {c} {cell[:40]!r} is not a number") from None
    for c in ("roi", "metric", "unit"):
        if not rec[c]:
            raise InputError(f"{path}: line {line}: empty {c}")
        row[c] = rec[c]
    for c in ("band", "verdict", "note"):
        row[c] = rec[c] or None
    if row["verdict"] is not None and row["verdict"] not in VERDICT_ORDER:
        raise InputError(f"{path}: line {line}: verdict {row['verdict'][:40]!r}; expected {', '.join(VERDICT_ORDER)} or empty")
    return row


def _analysis_head(rec: dict[str, str], uid_: str, path: Path, line: int) -> dict[str, Any]:
    """The analysis columns of the first CSV record of an analysis, checked (times aware UTC)."""
    head: dict[str, Any] = {c: (rec[c] or None) for c in ANALYSIS_COLUMNS}
    head["uid"] = uid_
    for c in ("acquired_at", "recorded_at"):
        try:
            head[c] = aware_utc(rec[c], c, f"{path}: line {line}")
        except LedgerError as exc:
            raise InputError(str(exc)) from None
    for c in ("site", "scanner", "protocol", "template", "settings_hash"):
        if not head[c]:
            raise InputError(f"{path}: line {line}: empty {c}")
    head["baselines"] = rec["baselines"]
    return head


def _read_ledger_csv(path: Path):
    """Parse a ledger CSV into analysis heads and measurement rows, grouped by analysis_uid.

    Returns ``(groups, baselines)``: ``groups`` maps analysis uid to (head, rows) with text
    cells restored; ``baselines`` maps (site, scanner, protocol, created_at) to (note, uids).
    """
    if path.is_dir():
        raise InputError(f"{path}: is a folder; {_EXPORT_HELP}")
    if not path.is_file():
        raise InputError(f"{path}: no such file; {_EXPORT_HELP}")
    groups: "OrderedDict[str, tuple[dict[str, Any], list[dict[str, Any]]]]" = OrderedDict()
    wanted: "OrderedDict[tuple, tuple[str | None, list[str]]]" = OrderedDict()
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            fields = reader.fieldnames or []
            missing = [c for c in LEDGER_CSV_COLUMNS if c not in fields and c not in OPTIONAL_CSV_COLUMNS]
            if missing:
                raise InputError(f"{path}: missing columns {', '.join(missing)}; {_EXPORT_HELP}")
            for raw in reader:
                line = reader.line_num
                if None in raw:
                    raise InputError(f"{path}: line {line}: more cells than columns")
                rec = {c: ("" if raw.get(c) is None else raw[c]) for c in LEDGER_CSV_COLUMNS}
                for c in TEXT_CSV_COLUMNS:
                    rec[c] = restore(rec[c])
                uid_ = rec["analysis_uid"].strip()
                if not uid_:
                    raise InputError(f"{path}: line {line}: empty analysis_uid")
                row = _measurement(rec, path, line)
                if uid_ not in groups:
                    head = _analysis_head(rec, uid_, path, line)
                    groups[uid_] = (head, [])
                    for created_at, note in _parse_baselines_cell(rec["baselines"], path, line):
                        key = (head["site"], head["scanner"], head["protocol"], created_at)
                        if key in wanted and wanted[key][0] != note:
                            raise InputError(f"{path}: line {line}: baseline {created_at.isoformat()} of {head['scanner']} has another note than on an earlier line; the file is inconsistent")
                        wanted.setdefault(key, (note, []))[1].append(uid_)
                else:
                    head = groups[uid_][0]
                    for c in ("site", "scanner", "protocol", "template", "series_uid", "settings_hash", "baselines"):
                        if (rec[c] or None) != (head[c] or None):
                            raise InputError(f"{path}: line {line}: analysis {uid_} has another {c} than on its first row; the file is inconsistent")
                groups[uid_][1].append(row)
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: is not UTF-8 text (byte {exc.start}); {_EXPORT_HELP}") from None
    except (OSError, csv.Error) as exc:
        reason = getattr(exc, "strerror", None) or " ".join(str(exc).split())[:300]
        raise InputError(f"{path}: cannot be read as CSV ({reason})") from None
    return groups, wanted


__all__ = [
    "ANALYSIS_COLUMNS",
    "FLOAT_COLUMNS",
    "LEDGER_CSV_COLUMNS",
    "OPTIONAL_CSV_COLUMNS",
    "TEXT_CSV_COLUMNS",
    "TIME_COLUMNS",
    "LedgerCsv",
    "LedgerCsvWriter",
    "baselines_cell",
    "csv_cell",
    "read_ledger_csv",
]
