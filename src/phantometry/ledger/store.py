"""The trend ledger: record analyses, query them, trend one metric, baselines, drift checks, CSV.

:class:`Ledger` is the library API; the ``phantometry ledger`` commands and
``phantometry measure --record`` are thin wiring over it. Every write is one transaction: an
analysis is stored with all its measurements or not at all.

Privacy by construction: only named, non-identifying fields are taken from a series summary
(series UID, acquisition time, nuclide, reconstruction label, scanner make, model, station
and serial). Patient name, ID, birth date and accession number are never read, stored or
exported; neither is the source file path nor the series description (free text).

Text is limited the same way on every backend (:func:`phantometry.ledger.schema.check_text`,
checked before any SQL runs), and the CSV export writes spreadsheet-safe text cells that the
import reads back exactly (:mod:`phantometry.ledger.csvcells`).
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import random
import time
import uuid
from collections import OrderedDict, defaultdict
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, Sequence, TypeVar

import sqlalchemy as sa
from sqlalchemy.engine import Connection
from sqlalchemy.exc import DBAPIError, IntegrityError, OperationalError

from ..errors import InputError, LedgerError
from ..results import CSV_COLUMNS, Measurement
from .csvcells import format_row, neutralise, restore
from .outfiles import check_output_file, write_text_atomically
from .rules import ControlLimits, control_limits, drift_flags
from .schema import (
    analyses,
    baseline_members,
    baselines,
    check_store_exists,
    check_text,
    display_url,
    ensure_schema,
    make_engine,
    measurements,
    resolve_url,
    scanners,
    sites,
    transient,
    writing,
)

T = TypeVar("T")

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
_FLOAT_COLUMNS = ("value", "uncertainty", "band_low", "band_high")
_TIME_COLUMNS = ("recorded_at", "acquired_at")
#: Columns whose cells are text (neutralised on export, restored on import).
TEXT_CSV_COLUMNS = tuple(c for c in LEDGER_CSV_COLUMNS if c not in _FLOAT_COLUMNS + _TIME_COLUMNS)
_ANALYSIS_COLUMNS = (
    "recorded_at", "site", "scanner", "protocol", "series_uid", "template", "acquired_at",
    "reconstruction", "tool_version", "settings_hash",
)

#: Units whose metrics ``check`` skips unless asked: positions (mm) and absolute
#: concentrations (Bq/mL) follow the day's set-up and filling, not the scanner's performance.
UNTRENDED_UNITS = ("mm", "Bq/mL")

#: Verdict order, worst first, for the analysis-level verdict.
VERDICT_ORDER = ("fail", "pass", "n/a")

_RETRIES = 12


# ----------------------------------------------------------------------------- results
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

    def chart(self, path: str | os.PathLike, *, overwrite: bool = False) -> Path:
        """Write the control chart PNG (see :func:`phantometry.ledger.chart.save_trend_chart`).

        An existing file is replaced only with ``overwrite`` (else :class:`InputError`).
        """
        from .chart import save_trend_chart

        return save_trend_chart(self, path, overwrite=overwrite)


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


# ----------------------------------------------------------------------------- helpers
def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def _aware(value: Any, what: str, where: str) -> datetime:
    if isinstance(value, str):
        try:
            value = datetime.fromisoformat(value.strip())
        except ValueError:
            raise LedgerError(f"{where}: {what} {value!r} is not an ISO 8601 time; expected e.g. 2026-11-03T10:30:00+01:00") from None
    if not isinstance(value, datetime):
        raise LedgerError(f"{where}: {what} is missing; the ledger needs a timezone-aware time")
    if value.tzinfo is None or value.utcoffset() is None:
        raise LedgerError(f"{where}: {what} {value.isoformat()} has no time zone; give an offset such as +01:00")
    return value.astimezone(timezone.utc)


def _label(value: Any, what: str, where: str) -> str:
    """A label with its white space collapsed; refused when empty (its length: check_text)."""
    text = " ".join(str(value).split()) if value is not None else ""
    if not text:
        raise LedgerError(f"{where}: the {what} label is empty; give --{what} NAME")
    return text


def _check_analysis_text(site: str, scanner: str, make: Mapping[str, Any] | None, analysis: Mapping[str, Any],
                         rows: Sequence[Mapping[str, Any]], where: str) -> None:
    """Every text of one analysis within the ledger's limits (before any SQL runs)."""
    check_text(sites, {"name": site}, where)
    make = make or {}
    check_text(scanners, {"name": scanner, **{k: make.get(k) for k in ("manufacturer", "model", "serial")}}, where)
    check_text(analyses, dict(analysis), where)
    for r in rows:
        check_text(measurements, dict(r), f"{where}: {str(r.get('roi'))[:40]} {str(r.get('metric'))[:40]}")


def _canonical_json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str, allow_nan=False)


def settings_hash(fill_record: Mapping[str, Any] | None, settings: Mapping[str, Any] | None = None) -> str:
    """SHA-256 (hex) of the settings that make two analyses of one series differ.

    The settings are the fill record and any extra ``settings`` mapping (canonical JSON with
    sorted keys), so re-measuring a series with another fill record is a new analysis,
    while recording the same measurement twice is a duplicate.
    """
    return hashlib.sha256(_canonical_json({"fill_record": fill_record or None, "settings": settings or None}).encode()).hexdigest()


def _record_key(series_uid: str | None, acquired_at: datetime, template: str, settings_hash_hex: str) -> str:
    identity = f"series:{series_uid}" if series_uid else f"acquired:{acquired_at.astimezone(timezone.utc).isoformat()}"
    return hashlib.sha256(f"{identity}\x1f{template}\x1f{settings_hash_hex}".encode()).hexdigest()


def analysis_verdict(verdicts: Iterable[str | None]) -> str | None:
    """The worst of measurement verdicts: ``fail`` over ``pass`` over ``n/a``; None if none."""
    present = {v for v in verdicts if v}
    for v in VERDICT_ORDER:
        if v in present:
            return v
    return None


def _finite_or_none(v: Any) -> float | None:
    if v is None or v == "":
        return None
    f = float(v)
    return f if math.isfinite(f) else None


def _row_dict(row: Measurement | Mapping[str, Any], where: str) -> dict[str, Any]:
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
            "value": _finite_or_none(d.get("value")),
            "unit": str(d["unit"]),
            "uncertainty": _finite_or_none(d.get("uncertainty")),
            "band": d.get("band") or None,
            "band_low": _finite_or_none(d.get("band_low")),
            "band_high": _finite_or_none(d.get("band_high")),
            "verdict": d.get("verdict") or None,
            "note": d.get("note") or None,
        }
    except (TypeError, ValueError):
        raise LedgerError(f"{where}: measurement {d.get('roi')} {d.get('metric')} has a non-numeric value; fix the input") from None


def default_scanner_label(series: Mapping[str, Any]) -> str:
    """Scanner label from the headers: station name, else make, model and serial."""
    sc = series.get("scanner") or {}
    if sc.get("station"):
        return str(sc["station"])
    parts = [sc.get(k) for k in ("manufacturer", "model", "serial") if sc.get(k)]
    return " ".join(str(p) for p in parts) if parts else "unknown scanner"


def default_protocol_label(series: Mapping[str, Any]) -> str:
    """Protocol label from the reconstruction: method, iterations x subsets, filter, voxel size.

    The matrix is left out (its slice count follows the axial coverage, not the protocol).
    """
    rec = series.get("reconstruction") or {}
    parts: list[str] = []
    method = rec.get("method")
    if method:
        parts.append(str(method))
    it, sub = rec.get("iterations"), rec.get("subsets")
    if it or sub:
        text = f"{it or '?'}i{sub or '?'}s"
        if not method or text not in str(method):
            parts.append(text)
    if rec.get("filter"):
        parts.append(str(rec["filter"]))
    vox = rec.get("voxel_size_mm")
    if vox and any(vox):
        parts.append("x".join(f"{float(v):.3g}" for v in vox) + " mm")
    return ", ".join(parts) if parts else "unspecified protocol"


def default_site_label(fill_record: Mapping[str, Any] | None) -> str:
    """Site label from the fill record's ``site``, else ``unspecified site``."""
    site = (fill_record or {}).get("site")
    return str(site) if site else "unspecified site"


def _one_line(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None) or exc
    return " ".join(str(orig).split())[:300]


# ------------------------------------------------------------------------------ ledger
class Ledger:
    """A trend ledger in a SQL database (SQLite by default, PostgreSQL for a shared lab store).

    Parameters
    ----------
    url : str, path or None
        Any SQLAlchemy URL (``sqlite:////path/ledger.sqlite3``,
        ``postgresql+psycopg://user:pw@host/db``), a file path (SQLite), or None for
        ``$PHANTOMETRY_DB`` or the default file in the user data directory.
    upgrade : bool
        Bring an older schema to the newest revision on open (default). With False an
        out-of-date store raises :class:`LedgerError`.
    create : bool
        Create the store when it does not exist yet (default). With False (read-only use) a
        missing SQLite file, or a database without the ledger's tables, raises
        :class:`LedgerError` and nothing is created: no folder, no file, no table.

    Raises
    ------
    LedgerError
        The database cannot be reached, its schema is newer than this phantometry, or (with
        ``create=False``) there is no store.

    Examples
    --------
    >>> with Ledger("sqlite:////tmp/demo-ledger.sqlite3") as ledger:   # doctest: +SKIP
    ...     ledger.add_from_result_dir("results/", scanner="PET-CT 1", protocol="EARL1")
    ...     trend = ledger.trend("PET-CT 1", "EARL1", "sphere_10mm", "rc_max")
    """

    def __init__(self, url: str | os.PathLike | None = None, *, upgrade: bool = True, create: bool = True) -> None:
        self.url = resolve_url(url)
        self.display_url = display_url(self.url)
        if not create:
            check_store_exists(self.url)
        self.engine = make_engine(self.url, create=create)
        try:
            self.revision = ensure_schema(self.engine, self.display_url, allow_upgrade=upgrade, create=create)
        except BaseException:
            self.engine.dispose()
            raise

    # ------------------------------------------------------------------ lifecycle
    def close(self) -> None:
        """Release the database connections."""
        self.engine.dispose()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Ledger({self.display_url!r})"

    # ------------------------------------------------------------------ transactions
    def _read(self, fn: Callable[[Connection], T]) -> T:
        try:
            with self.engine.connect() as conn:
                return fn(conn)
        except DBAPIError as exc:
            raise LedgerError(f"ledger {self.display_url}: database error ({_one_line(exc)}); check the server and the URL") from None

    def _write(self, fn: Callable[[Connection], T], *, on_integrity: Callable[[IntegrityError], LedgerError] | None = None,
               retry_integrity: bool = False) -> T:
        """Run ``fn`` in one write transaction, retrying lock conflicts with jittered back-off."""
        delay = 0.02
        for attempt in range(_RETRIES):
            try:
                with writing(self.engine.connect()) as conn:
                    with conn.begin():
                        return fn(conn)
            except IntegrityError as exc:
                if retry_integrity and attempt < _RETRIES - 1:
                    continue
                if on_integrity is not None:
                    raise on_integrity(exc) from None
                raise LedgerError(f"ledger {self.display_url}: refused by the database ({_one_line(exc)})") from None
            except OperationalError as exc:
                if transient(exc) and attempt < _RETRIES - 1:
                    time.sleep(delay * (1.0 + random.random()))
                    delay = min(delay * 2.0, 1.0)
                    continue
                raise LedgerError(f"ledger {self.display_url}: database error ({_one_line(exc)}); check the server and the URL") from None
            except DBAPIError as exc:
                raise LedgerError(f"ledger {self.display_url}: database error ({_one_line(exc)}); check the server and the URL") from None
        raise AssertionError("unreachable")  # pragma: no cover

    # ------------------------------------------------------------------ labels
    @staticmethod
    def _upsert_returning_id(conn: Connection, table: sa.Table, keys: dict[str, Any], extra: dict[str, Any]) -> int:
        """Insert a row if its unique key is new (concurrency-safe) and return its id."""
        where = sa.and_(*(table.c[k] == v for k, v in keys.items()))
        found = conn.execute(sa.select(table.c.id).where(where)).scalar()
        if found is not None:
            return int(found)
        name = conn.dialect.name
        if name in ("sqlite", "postgresql"):
            if name == "sqlite":
                from sqlalchemy.dialects.sqlite import insert as dialect_insert
            else:
                from sqlalchemy.dialects.postgresql import insert as dialect_insert
            conn.execute(dialect_insert(table).values(**keys, **extra).on_conflict_do_nothing(index_elements=list(keys)))
        else:  # other backends: a savepoint absorbs the race
            try:
                with conn.begin_nested():
                    conn.execute(table.insert().values(**keys, **extra))
            except IntegrityError:
                pass
        return int(conn.execute(sa.select(table.c.id).where(where)).scalar_one())

    def _scanner_id(self, conn: Connection, site: str, scanner: str, make: Mapping[str, Any] | None = None,
                    cache: dict | None = None) -> int:
        if cache is not None and (site, scanner) in cache:
            return cache[(site, scanner)]
        site_id = self._upsert_returning_id(conn, sites, {"name": site}, {})
        make = make or {}
        scanner_id = self._upsert_returning_id(
            conn,
            scanners,
            {"site_id": site_id, "name": scanner},
            {"manufacturer": make.get("manufacturer"), "model": make.get("model"), "serial": make.get("serial")},
        )
        if cache is not None:
            cache[(site, scanner)] = scanner_id
        return scanner_id

    # ------------------------------------------------------------------ recording
    def _store(self, conn: Connection, a: dict[str, Any], rows: list[dict[str, Any]], replace: bool, where: str) -> tuple[int, bool]:
        """Insert (or replace) one analysis and its rows inside the caller's transaction."""
        # FOR UPDATE (PostgreSQL; SQLite already holds the write lock): a concurrent replacement
        # of the same analysis waits here, and its DELETE below then sees the rows the other one
        # committed, so the two never collide on the measurement rows.
        existing = conn.execute(
            sa.select(analyses.c.id, analyses.c.acquired_at).where(analyses.c.record_key == a["record_key"]).with_for_update()
        ).first()
        if existing is not None and not replace:
            raise LedgerError(
                f"{where}: series {a['series_uid'] or a['acquired_at'].isoformat()} with template {a['template']} and the same "
                f"settings is already recorded (analysis #{existing.id}); use --replace (replace=True) to replace it"
            )
        if existing is not None:
            analysis_id = int(existing.id)
            conn.execute(measurements.delete().where(measurements.c.analysis_id == analysis_id))
            conn.execute(analyses.update().where(analyses.c.id == analysis_id).values(**a))
        else:
            analysis_id = int(conn.execute(analyses.insert().values(**a)).inserted_primary_key[0])
        if rows:
            conn.execute(measurements.insert(), [{**r, "analysis_id": analysis_id} for r in rows])
        return analysis_id, existing is not None

    def _duplicate_error(self, where: str, series_uid: str | None, template: str) -> Callable[[IntegrityError], LedgerError]:
        def make(exc: IntegrityError) -> LedgerError:
            text = str(exc.orig).lower()
            if "record_key" in text or "unique" in text or "duplicate" in text:
                return LedgerError(
                    f"{where}: series {series_uid or '(no UID)'} with template {template} and the same settings is already "
                    "recorded; use --replace (replace=True) to replace it"
                )
            return LedgerError(f"{where}: refused by the database ({_one_line(exc)})")

        return make

    def record(
        self,
        *,
        rows: Sequence[Measurement | Mapping[str, Any]],
        series: Mapping[str, Any],
        template: str,
        fill_record: Mapping[str, Any] | None = None,
        tool_version: str | None = None,
        site: str | None = None,
        scanner: str | None = None,
        protocol: str | None = None,
        settings: Mapping[str, Any] | None = None,
        replace: bool = False,
        where: str = "ledger",
    ) -> RecordResult:
        """Record one analysis with all its measurement rows, in one transaction.

        Parameters
        ----------
        rows : sequence of Measurement or mappings
            The measurement rows (``roi``, ``metric``, ``value``, ``unit``, optional
            ``uncertainty``, ``band``, ``band_low``, ``band_high``, ``verdict``, ``note``).
        series : mapping
            The series summary (:meth:`phantometry.volume.Volume.summary`). Only
            ``series_uid``, ``acquired_at`` (aware), ``nuclide``, ``reconstruction`` and
            ``scanner`` (make, model, station, serial) are read; nothing else is kept.
        template : str
            Template name.
        fill_record : mapping, optional
            The fill record (:meth:`phantometry.fill.FillRecord.to_dict`), validated
            (unknown keys refused) and stored as JSON.
        tool_version : str, optional
            phantometry version that measured (default: this one).
        site, scanner, protocol : str, optional
            Labels; default to the fill record's ``site``, the station name (or make, model,
            serial) and the reconstruction (:func:`default_protocol_label`).
        settings : mapping, optional
            Further settings that make a re-measurement a different analysis.
        replace : bool
            Replace an analysis of the same series + template + settings instead of refusing.
        where : str
            Name of the input for messages.

        Raises
        ------
        LedgerError
            Duplicate (without ``replace``), no rows, repeated (roi, metric), naive times.
        FillRecordError
            An invalid fill record.
        """
        if not rows:
            raise LedgerError(f"{where}: no measurement rows to record")
        row_dicts = [_row_dict(r, where) for r in rows]
        seen: set[tuple[str, str]] = set()
        for r in row_dicts:
            key = (r["roi"], r["metric"])
            if key in seen:
                raise LedgerError(f"{where}: {r['roi']} {r['metric']} appears twice among the rows; record each (roi, metric) once")
            seen.add(key)
        acquired = series.get("acquired_at")
        if acquired is None:
            first = rows[0]
            acquired = first.acquired_at if isinstance(first, Measurement) else first.get("acquired_at")
        acquired_at = _aware(acquired, "acquisition time", where)
        if not template:
            raise LedgerError(f"{where}: no template name")
        series_uid = series.get("series_uid") or None
        fill = _validated_fill(fill_record, where)
        s_hash = settings_hash(fill, settings)
        rec = series.get("reconstruction") or {}
        if tool_version is None:
            from .. import __version__ as tool_version
        site_label = _label(site if site is not None else default_site_label(fill), "site", where)
        scanner_label = _label(scanner if scanner is not None else default_scanner_label(series), "scanner", where)
        protocol_label = _label(protocol if protocol is not None else default_protocol_label(series), "protocol", where)
        analysis = {
            "uid": str(uuid.uuid4()),
            "record_key": _record_key(series_uid, acquired_at, template, s_hash),
            "series_uid": series_uid,
            "template": str(template),
            "acquired_at": acquired_at,
            "recorded_at": _utc_now(),
            "protocol": protocol_label,
            "reconstruction": (rec.get("label") or default_protocol_label(series)) if rec else None,
            "nuclide": series.get("nuclide"),
            "fill_record": fill,
            "settings_hash": s_hash,
            "tool_version": str(tool_version),
            "verdict": analysis_verdict(r["verdict"] for r in row_dicts),
        }
        _check_analysis_text(site_label, scanner_label, series.get("scanner"), analysis, row_dicts, where)

        def txn(conn: Connection) -> tuple[int, bool]:
            analysis["scanner_id"] = self._scanner_id(conn, site_label, scanner_label, series.get("scanner"))
            analysis["recorded_at"] = _utc_now()
            return self._store(conn, analysis, row_dicts, replace, where)

        analysis_id, replaced = self._write(
            txn, on_integrity=self._duplicate_error(where, series_uid, template), retry_integrity=replace
        )
        return RecordResult(analysis_id, analysis["uid"], site_label, scanner_label, protocol_label, len(row_dicts), replaced)

    def recorded_id(self, *, series_uid: str | None, acquired_at: datetime | str | None, template: str,
                    fill_record: Mapping[str, Any] | None = None, settings: Mapping[str, Any] | None = None,
                    where: str = "ledger") -> int | None:
        """The id of the analysis of the same series + template + settings, or None.

        The identity is the one :meth:`record` uses (series UID, else acquisition time; the
        template name; the settings hash of the validated fill record and ``settings``), so
        a duplicate can be refused before any work (``measure --record``).
        """
        when = _aware(acquired_at, "acquisition time", where) if (acquired_at is not None or not series_uid) else None
        key = _record_key(series_uid or None, when, template, settings_hash(_validated_fill(fill_record, where), settings))  # type: ignore[arg-type]
        found = self._read(lambda c: c.execute(sa.select(analyses.c.id).where(analyses.c.record_key == key)).scalar())
        return None if found is None else int(found)

    def check_not_recorded(self, *, series_uid: str | None, acquired_at: datetime | str | None, template: str,
                           fill_record: Mapping[str, Any] | None = None, settings: Mapping[str, Any] | None = None,
                           where: str = "ledger") -> None:
        """Refuse (:class:`LedgerError`) an analysis that :meth:`record` would refuse as a duplicate."""
        found = self.recorded_id(series_uid=series_uid, acquired_at=acquired_at, template=template, fill_record=fill_record,
                                 settings=settings, where=where)
        if found is not None:
            shown = series_uid or _aware(acquired_at, "acquisition time", where).isoformat()
            raise LedgerError(
                f"{where}: series {shown} with template {template} and the same settings is already recorded "
                f"(analysis #{found}) in {self.display_url}; use --replace to replace it"
            )

    def record_document(self, doc: Mapping[str, Any], *, site: str | None = None, scanner: str | None = None,
                        protocol: str | None = None, replace: bool = False, where: str = "measurements.json") -> RecordResult:
        """Record a ``measurements.json`` document (as written by ``phantometry measure``)."""
        if not isinstance(doc, Mapping) or "measurements" not in doc or "series" not in doc:
            raise InputError(f"{where}: not a phantometry measurements.json (needs 'series' and 'measurements'); give a result folder of phantometry measure")
        tpl = doc.get("template") or {}
        template = tpl.get("name") if isinstance(tpl, Mapping) else tpl
        tool = doc.get("tool") or {}
        return self.record(
            rows=doc["measurements"],
            series=doc["series"],
            template=template or "",
            fill_record=doc.get("fill_record"),
            tool_version=tool.get("version") if isinstance(tool, Mapping) else None,
            site=site,
            scanner=scanner,
            protocol=protocol,
            settings=doc.get("settings"),
            replace=replace,
            where=where,
        )

    def add_from_result_dir(self, path: str | os.PathLike, *, site: str | None = None, scanner: str | None = None,
                            protocol: str | None = None, replace: bool = False) -> RecordResult:
        """Record the analysis in a result folder of ``phantometry measure`` (or its measurements.json)."""
        doc, where = read_result_document(path)
        return self.record_document(doc, site=site, scanner=scanner, protocol=protocol, replace=replace, where=where)

    def record_analysis(self, analysis, *, site: str | None = None, scanner: str | None = None,
                        protocol: str | None = None, replace: bool = False, where: str | None = None) -> RecordResult:
        """Record a measured analysis (what ``measure --record`` calls).

        ``analysis`` is a :class:`phantometry.measure.BodyAnalysis` or any analysis result
        with ``rows``, ``volume``, ``template`` and (optionally) ``fill``: rows from
        ``analysis.rows``, the series from ``analysis.volume.summary()``, the fill record
        from ``analysis.fill.to_dict()``, the template name and this phantometry's version.
        """
        from .. import __version__

        fill = getattr(analysis, "fill", None)
        return self.record(
            rows=analysis.rows,
            series=analysis.volume.summary(),
            template=analysis.template.name,
            fill_record=fill.to_dict() if fill is not None else None,
            tool_version=__version__,
            site=site,
            scanner=scanner,
            protocol=protocol,
            replace=replace,
            where=where or (analysis.volume.source or "analysis"),
        )

    def remove(self, analysis_id: int) -> bool:
        """Delete one analysis with its measurements and baseline memberships; False if absent."""

        def txn(conn: Connection) -> bool:
            conn.execute(baseline_members.delete().where(baseline_members.c.analysis_id == analysis_id))
            conn.execute(measurements.delete().where(measurements.c.analysis_id == analysis_id))
            return conn.execute(analyses.delete().where(analyses.c.id == analysis_id)).rowcount > 0

        return self._write(txn)

    # ------------------------------------------------------------------ queries
    @staticmethod
    def _analysis_query():
        return sa.select(
            analyses.c.id, analyses.c.uid, sites.c.name.label("site"), scanners.c.name.label("scanner"),
            analyses.c.protocol, analyses.c.series_uid, analyses.c.template, analyses.c.acquired_at,
            analyses.c.recorded_at, analyses.c.reconstruction, analyses.c.nuclide, analyses.c.tool_version,
            analyses.c.verdict, analyses.c.settings_hash,
        ).select_from(analyses.join(scanners, scanners.c.id == analyses.c.scanner_id).join(sites, sites.c.id == scanners.c.site_id))

    @staticmethod
    def _info(row) -> AnalysisInfo:
        return AnalysisInfo(**{k: getattr(row, k) for k in AnalysisInfo.__dataclass_fields__})

    def analyses(
        self,
        *,
        site: str | None = None,
        scanner: str | None = None,
        protocol: str | None = None,
        template: str | None = None,
        since: datetime | None = None,
        until: datetime | None = None,
        verdict: str | None = None,
        series_uid: str | None = None,
        limit: int | None = None,
    ) -> list[AnalysisInfo]:
        """Recorded analyses in acquisition order, filtered.

        ``since``/``until`` (aware) bound the acquisition time (inclusive); ``verdict`` is the
        analysis-level verdict (``fail``, ``pass``, ``n/a``; ``none`` for unjudged ones).
        ``limit`` keeps the most recent ones.
        """
        q = self._analysis_query()
        if site is not None:
            q = q.where(sites.c.name == site)
        if scanner is not None:
            q = q.where(scanners.c.name == scanner)
        if protocol is not None:
            q = q.where(analyses.c.protocol == protocol)
        if template is not None:
            q = q.where(analyses.c.template == template)
        if series_uid is not None:
            q = q.where(analyses.c.series_uid == series_uid)
        if since is not None:
            q = q.where(analyses.c.acquired_at >= _aware(since, "since", "ledger"))
        if until is not None:
            q = q.where(analyses.c.acquired_at <= _aware(until, "until", "ledger"))
        if verdict is not None:
            if verdict == "none":
                q = q.where(analyses.c.verdict.is_(None))
            elif verdict in VERDICT_ORDER:
                q = q.where(analyses.c.verdict == verdict)
            else:
                raise LedgerError(f"ledger: unknown verdict {verdict!r}; choose fail, pass, n/a or none")
        if limit is not None:
            q = q.order_by(analyses.c.acquired_at.desc(), analyses.c.id.desc()).limit(int(limit))
            rows = self._read(lambda c: c.execute(q).all())[::-1]
        else:
            q = q.order_by(analyses.c.acquired_at, analyses.c.id)
            rows = self._read(lambda c: c.execute(q).all())
        return [self._info(r) for r in rows]

    def analysis(self, analysis_id: int) -> AnalysisInfo:
        """One analysis by id (LedgerError if absent)."""
        row = self._read(lambda c: c.execute(self._analysis_query().where(analyses.c.id == analysis_id)).first())
        if row is None:
            raise LedgerError(f"ledger {self.display_url}: no analysis #{analysis_id}; list them with phantometry ledger list")
        return self._info(row)

    def measurements(self, analysis_id: int) -> list[Measurement]:
        """The measurement rows of one analysis, in recorded order."""
        info = self.analysis(analysis_id)
        q = sa.select(measurements).where(measurements.c.analysis_id == analysis_id).order_by(measurements.c.id)
        rows = self._read(lambda c: c.execute(q).all())
        return [
            Measurement(
                series_uid=info.series_uid, acquired_at=info.acquired_at.isoformat(), template=info.template,
                roi=r.roi, metric=r.metric, value=math.nan if r.value is None else r.value, unit=r.unit,
                uncertainty=r.uncertainty, band=r.band, band_low=r.band_low, band_high=r.band_high,
                verdict=r.verdict, note=r.note,
            )
            for r in rows
        ]

    def fill_record(self, analysis_id: int) -> dict[str, Any] | None:
        """The stored fill record of one analysis (None when imported from CSV)."""
        self.analysis(analysis_id)
        return self._read(lambda c: c.execute(sa.select(analyses.c.fill_record).where(analyses.c.id == analysis_id)).scalar())

    def scanners(self) -> list[ScannerInfo]:
        """Scanners with their protocols and number of analyses per protocol."""
        q = (
            sa.select(scanners.c.id, sites.c.name.label("site"), scanners.c.name, scanners.c.manufacturer, scanners.c.model,
                      scanners.c.serial, analyses.c.protocol, sa.func.count(analyses.c.id).label("n"))
            .select_from(scanners.join(sites, sites.c.id == scanners.c.site_id).outerjoin(analyses, analyses.c.scanner_id == scanners.c.id))
            .group_by(scanners.c.id, sites.c.name, scanners.c.name, scanners.c.manufacturer, scanners.c.model, scanners.c.serial, analyses.c.protocol)
            .order_by(sites.c.name, scanners.c.name, analyses.c.protocol)
        )
        out: "OrderedDict[int, ScannerInfo]" = OrderedDict()
        for r in self._read(lambda c: c.execute(q).all()):
            if r.id not in out:
                out[r.id] = ScannerInfo(r.id, r.site, r.name, r.manufacturer, r.model, r.serial, {})
            if r.protocol is not None:
                out[r.id].protocols[r.protocol] = int(r.n)
        return list(out.values())

    def info(self) -> dict[str, Any]:
        """URL (password hidden), schema revision and counts."""
        def q(conn: Connection) -> dict[str, Any]:
            count = lambda t: int(conn.execute(sa.select(sa.func.count()).select_from(t)).scalar_one())  # noqa: E731
            return {
                "url": self.display_url,
                "backend": self.engine.dialect.name,
                "revision": self.revision,
                "sites": count(sites),
                "scanners": count(scanners),
                "analyses": count(analyses),
                "measurements": count(measurements),
                "baselines": count(baselines),
            }

        return self._read(q)

    # ------------------------------------------------------------------ scanner / protocol resolution
    def _resolve(self, conn: Connection, scanner: str, protocol: str | None, site: str | None) -> tuple[int, str, str, str]:
        q = sa.select(scanners.c.id, sites.c.name.label("site")).select_from(scanners.join(sites)).where(scanners.c.name == scanner)
        if site is not None:
            q = q.where(sites.c.name == site)
        found = conn.execute(q).all()
        if not found:
            known = conn.execute(sa.select(scanners.c.name).distinct().order_by(scanners.c.name)).scalars().all()
            raise LedgerError(
                f"ledger {self.display_url}: no scanner {scanner!r}" + (f" at site {site!r}" if site else "")
                + f"; known scanners: {', '.join(known) if known else '(none recorded yet)'}"
            )
        if len(found) > 1:
            raise LedgerError(
                f"ledger {self.display_url}: scanner {scanner!r} exists at several sites ({', '.join(r.site for r in found)}); give --site"
            )
        scanner_id, site_name = int(found[0].id), found[0].site
        protos = conn.execute(
            sa.select(analyses.c.protocol).where(analyses.c.scanner_id == scanner_id).distinct().order_by(analyses.c.protocol)
        ).scalars().all()
        if protocol is None:
            if len(protos) == 1:
                protocol = protos[0]
            else:
                raise LedgerError(
                    f"ledger {self.display_url}: scanner {scanner!r} has "
                    + (f"several protocols ({'; '.join(protos)}); give --protocol" if protos else "no analyses yet")
                )
        elif protocol not in protos:
            raise LedgerError(
                f"ledger {self.display_url}: scanner {scanner!r} has no protocol {protocol!r}; its protocols: "
                + ("; ".join(protos) if protos else "(none)")
            )
        return scanner_id, site_name, scanner, protocol

    @staticmethod
    def _current_baseline_id(conn: Connection, scanner_id: int, protocol: str) -> int | None:
        return conn.execute(
            sa.select(baselines.c.id)
            .where(baselines.c.scanner_id == scanner_id, baselines.c.protocol == protocol)
            .order_by(baselines.c.created_at.desc(), baselines.c.id.desc())
            .limit(1)
        ).scalar()

    @staticmethod
    def _baseline_members(conn: Connection, baseline_id: int | None) -> set[int]:
        if baseline_id is None:
            return set()
        return set(conn.execute(sa.select(baseline_members.c.analysis_id).where(baseline_members.c.baseline_id == baseline_id)).scalars())

    # ------------------------------------------------------------------ trend
    def trend(self, scanner: str, protocol: str | None, roi: str, metric: str, *, site: str | None = None,
              since: datetime | None = None, until: datetime | None = None) -> Trend:
        """One metric of one ROI for one scanner and protocol, with control limits and drift flags.

        Limits come from the current baseline (:meth:`set_baseline`); without one, from all
        points shown (said in ``notes``). ``protocol`` may be None when the scanner has one.
        The query walks the (scanner, protocol, acquired_at) index and the (analysis, roi,
        metric) unique index: its cost follows the number of points, not the store size.
        """
        since_utc = _aware(since, "since", "ledger") if since is not None else None
        until_utc = _aware(until, "until", "ledger") if until is not None else None

        def q(conn: Connection):
            scanner_id, site_name, scanner_name, proto = self._resolve(conn, scanner, protocol, site)
            m = measurements
            stmt = (
                sa.select(analyses.c.id, analyses.c.uid, analyses.c.acquired_at, m.c.value, m.c.unit, m.c.uncertainty,
                          m.c.band_low, m.c.band_high, m.c.verdict)
                .select_from(analyses.join(m, sa.and_(m.c.analysis_id == analyses.c.id, m.c.roi == roi, m.c.metric == metric)))
                .where(analyses.c.scanner_id == scanner_id, analyses.c.protocol == proto)
                .order_by(analyses.c.acquired_at, analyses.c.id)
            )
            if since_utc is not None:
                stmt = stmt.where(analyses.c.acquired_at >= since_utc)
            if until_utc is not None:
                stmt = stmt.where(analyses.c.acquired_at <= until_utc)
            rows = conn.execute(stmt).all()
            if not rows:
                names = conn.execute(
                    sa.select(m.c.roi, m.c.metric).distinct()
                    .select_from(analyses.join(m, m.c.analysis_id == analyses.c.id))
                    .where(analyses.c.scanner_id == scanner_id, analyses.c.protocol == proto)
                    .order_by(m.c.roi, m.c.metric)
                ).all()
                raise LedgerError(
                    f"ledger {self.display_url}: no {roi} {metric} values for {scanner_name} / {proto}"
                    + (" in that date range" if (since or until) else "")
                    + "; recorded: " + (", ".join(f"{r.roi} {r.metric}" for r in names[:60]) or "(nothing)")
                )
            baseline_id = self._current_baseline_id(conn, scanner_id, proto)
            members = self._baseline_members(conn, baseline_id)
            base_values = None
            if baseline_id is not None:
                base_values = conn.execute(
                    sa.select(m.c.value)
                    .select_from(baseline_members.join(m, m.c.analysis_id == baseline_members.c.analysis_id))
                    .where(baseline_members.c.baseline_id == baseline_id, m.c.roi == roi, m.c.metric == metric)
                ).scalars().all()
            return site_name, scanner_name, proto, rows, baseline_id, members, base_values

        site_name, scanner_name, proto, rows, baseline_id, members, base_values = self._read(q)
        points = [
            TrendPoint(r.id, r.uid, r.acquired_at, r.value, r.unit, r.uncertainty, r.band_low, r.band_high, r.verdict, r.id in members)
            for r in rows
        ]
        limits, notes = self._limits(points, baseline_id, base_values)
        flags = _trend_flags(points, limits)
        return Trend(site_name, scanner_name, proto, roi, metric, points[0].unit, points, limits, flags, notes)

    @staticmethod
    def _limits(points: list[TrendPoint], baseline_id: int | None, base_values: list[float | None] | None) -> tuple[ControlLimits | None, list[str]]:
        notes: list[str] = []
        if baseline_id is not None:
            limits = control_limits(base_values or [], source=f"baseline #{baseline_id}")
            if limits is None:
                notes.append(f"baseline #{baseline_id} holds fewer than 2 values of this metric: no control limits")
        else:
            limits = control_limits([p.value for p in points], source="all points (no baseline set)")
            notes.append("no baseline set: limits come from all points shown; set one with phantometry ledger baseline")
        if limits is not None and limits.n < 8:
            notes.append(f"control limits rest on only {limits.n} values; 8 or more make the rules meaningful")
        if limits is not None and limits.sigma == 0:
            notes.append("the baseline values do not vary (sigma = 0): the sigma rules are off")
        return limits, notes

    # ------------------------------------------------------------------ baselines
    def set_baseline(self, scanner: str, protocol: str | None = None, *, analysis_ids: Sequence[int] | None = None,
                     since: datetime | None = None, until: datetime | None = None, site: str | None = None,
                     note: str | None = None) -> BaselineInfo:
        """Mark analyses of one scanner and protocol as the baseline for control limits.

        Give ``analysis_ids``, or an acquisition date range ``since``/``until`` (inclusive,
        aware), or both (intersection). The new baseline becomes the current one; older ones
        are kept for the record.

        Raises
        ------
        LedgerError
            Ids that are not analyses of that scanner and protocol, or fewer than two analyses.
        """
        if analysis_ids is None and since is None and until is None:
            raise LedgerError("ledger baseline: give analysis ids or a date range (--from/--to)")
        since_utc = _aware(since, "from", "ledger baseline") if since is not None else None
        until_utc = _aware(until, "to", "ledger baseline") if until is not None else None
        check_text(baselines, {"note": note}, "ledger baseline --note")

        def txn(conn: Connection) -> int:
            scanner_id, _site, _scanner, proto = self._resolve(conn, scanner, protocol, site)
            stmt = sa.select(analyses.c.id).where(analyses.c.scanner_id == scanner_id, analyses.c.protocol == proto)
            if since_utc is not None:
                stmt = stmt.where(analyses.c.acquired_at >= since_utc)
            if until_utc is not None:
                stmt = stmt.where(analyses.c.acquired_at <= until_utc)
            ids = set(conn.execute(stmt).scalars())
            if analysis_ids is not None:
                wanted = {int(i) for i in analysis_ids}
                missing = sorted(wanted - ids)
                if missing:
                    raise LedgerError(
                        f"ledger baseline: analyses {', '.join('#%d' % i for i in missing)} are not analyses of {scanner} / {proto}"
                        + (" in that date range" if (since or until) else "") + "; see phantometry ledger list"
                    )
                ids = wanted
            if len(ids) < 2:
                raise LedgerError(f"ledger baseline: {len(ids)} analysis selected for {scanner} / {proto}; a baseline needs at least 2")
            baseline_id = int(conn.execute(
                baselines.insert().values(scanner_id=scanner_id, protocol=proto, created_at=_utc_now(), note=note)
            ).inserted_primary_key[0])
            conn.execute(baseline_members.insert(), [{"baseline_id": baseline_id, "analysis_id": i} for i in sorted(ids)])
            return baseline_id

        baseline_id = self._write(txn)
        return self._baseline_info(baseline_id)

    def baseline(self, scanner: str, protocol: str | None = None, *, site: str | None = None) -> BaselineInfo | None:
        """The current baseline of one scanner and protocol, or None."""
        def q(conn: Connection):
            scanner_id, _s, _n, proto = self._resolve(conn, scanner, protocol, site)
            return self._current_baseline_id(conn, scanner_id, proto)

        baseline_id = self._read(q)
        return None if baseline_id is None else self._baseline_info(baseline_id)

    def _baseline_info(self, baseline_id: int) -> BaselineInfo:
        def q(conn: Connection) -> BaselineInfo:
            b = conn.execute(
                sa.select(baselines, scanners.c.name.label("scanner"), sites.c.name.label("site"))
                .select_from(baselines.join(scanners, scanners.c.id == baselines.c.scanner_id).join(sites, sites.c.id == scanners.c.site_id))
                .where(baselines.c.id == baseline_id)
            ).one()
            members = conn.execute(
                sa.select(analyses.c.id, analyses.c.acquired_at)
                .select_from(baseline_members.join(analyses, analyses.c.id == baseline_members.c.analysis_id))
                .where(baseline_members.c.baseline_id == baseline_id)
                .order_by(analyses.c.acquired_at, analyses.c.id)
            ).all()
            return BaselineInfo(
                b.id, b.site, b.scanner, b.protocol, b.created_at, b.note, tuple(int(r.id) for r in members),
                members[0].acquired_at if members else None, members[-1].acquired_at if members else None,
            )

        return self._read(q)

    # ------------------------------------------------------------------ check
    def check(self, *, site: str | None = None, scanner: str | None = None, protocol: str | None = None,
              since: datetime | None = None, all_metrics: bool = False) -> list[CheckResult]:
        """Run the drift rules on every metric series (scanner x protocol x roi x metric).

        Each series is judged on all its points against its current baseline (or all points
        without one); ``since`` (aware) keeps only flags at points acquired since then.
        Metrics in :data:`UNTRENDED_UNITS` are skipped unless ``all_metrics``. Returns the
        series checked, each with its flags (often none).
        """
        since_utc = _aware(since, "since", "ledger check") if since is not None else None

        def q(conn: Connection):
            groups = sa.select(analyses.c.scanner_id, analyses.c.protocol, scanners.c.name.label("scanner"), sites.c.name.label("site")).select_from(
                analyses.join(scanners, scanners.c.id == analyses.c.scanner_id).join(sites, sites.c.id == scanners.c.site_id)
            ).distinct()
            if site is not None:
                groups = groups.where(sites.c.name == site)
            if scanner is not None:
                groups = groups.where(scanners.c.name == scanner)
            if protocol is not None:
                groups = groups.where(analyses.c.protocol == protocol)
            out = []
            for g in conn.execute(groups.order_by(sites.c.name, scanners.c.name, analyses.c.protocol)).all():
                m = measurements
                rows = conn.execute(
                    sa.select(analyses.c.id, analyses.c.uid, analyses.c.acquired_at, m.c.roi, m.c.metric, m.c.value, m.c.unit,
                              m.c.uncertainty, m.c.band_low, m.c.band_high, m.c.verdict)
                    .select_from(analyses.join(m, m.c.analysis_id == analyses.c.id))
                    .where(analyses.c.scanner_id == g.scanner_id, analyses.c.protocol == g.protocol)
                    .order_by(analyses.c.acquired_at, analyses.c.id)
                ).all()
                baseline_id = self._current_baseline_id(conn, g.scanner_id, g.protocol)
                out.append((g, rows, baseline_id, self._baseline_members(conn, baseline_id)))
            return out

        results: list[CheckResult] = []
        for g, rows, baseline_id, members in self._read(q):
            series: dict[tuple[str, str], list] = defaultdict(list)
            for r in rows:
                series[(r.roi, r.metric)].append(r)
            for (roi, metric), rs in sorted(series.items()):
                unit = rs[0].unit
                if not all_metrics and unit in UNTRENDED_UNITS:
                    continue
                points = [TrendPoint(r.id, r.uid, r.acquired_at, r.value, r.unit, r.uncertainty, r.band_low, r.band_high, r.verdict, r.id in members) for r in rs]
                base_values = [p.value for p in points if p.in_baseline] if baseline_id is not None else None
                limits, _notes = self._limits(points, baseline_id, base_values)
                flags = _trend_flags(points, limits)
                if since_utc is not None:
                    flags = [f for f in flags if f.acquired_at >= since_utc]
                results.append(CheckResult(g.site, g.scanner, g.protocol, roi, metric, unit, len(points), limits, flags))
        return results

    # ------------------------------------------------------------------ CSV
    def export_csv(self, path: str | os.PathLike, *, since: datetime | None = None, overwrite: bool = False) -> ExportReport:
        """Write measurements as long-format CSV (:data:`LEDGER_CSV_COLUMNS`), atomically.

        ``since`` (aware) keeps analyses *recorded* at or after that time, for incremental
        exports to a lab database; pass the previous report's ``started_at``. Overlapping
        windows are harmless: :meth:`import_csv` skips analyses it already holds. Text cells
        are spreadsheet-safe (:mod:`phantometry.ledger.csvcells`); the ``baselines`` column
        carries baseline membership, so an import into another store keeps the baselines.

        Raises
        ------
        InputError
            ``path`` exists and ``overwrite`` is False, is a folder, or cannot be written.
        """
        target = Path(path)
        check_output_file(target, overwrite, "ledger export")
        started = _utc_now()
        since_utc = _aware(since, "since", "ledger export") if since is not None else None
        m, a = measurements, analyses
        stmt = (
            sa.select(a.c.uid, a.c.recorded_at, sites.c.name.label("site"), scanners.c.name.label("scanner"), a.c.protocol,
                      a.c.series_uid, a.c.template, a.c.acquired_at, a.c.reconstruction, a.c.tool_version, a.c.settings_hash,
                      m.c.roi, m.c.metric, m.c.value, m.c.unit, m.c.uncertainty, m.c.band, m.c.band_low, m.c.band_high,
                      m.c.verdict, m.c.note, a.c.id.label("analysis_id"))
            .select_from(m.join(a, a.c.id == m.c.analysis_id).join(scanners, scanners.c.id == a.c.scanner_id).join(sites, sites.c.id == scanners.c.site_id))
            .order_by(a.c.recorded_at, a.c.uid, m.c.id)
        )
        if since_utc is not None:
            stmt = stmt.where(a.c.recorded_at >= since_utc)
        n_rows = 0
        uids: set[str] = set()
        text_index = [LEDGER_CSV_COLUMNS.index(c) for c in TEXT_CSV_COLUMNS]

        def write(fh) -> None:
            fh.write(format_row(LEDGER_CSV_COLUMNS))

            def q(conn: Connection) -> None:
                nonlocal n_rows
                membership = self._baseline_membership(conn, since_utc)
                result = conn.execution_options(stream_results=True, yield_per=5000).execute(stmt)
                for r in result:
                    uids.add(r.uid)
                    cells = [_csv_cell(v) for v in tuple(r)[:-1]] + [membership.get(r.analysis_id, "")]
                    for i in text_index:
                        cells[i] = neutralise(cells[i])
                    fh.write(format_row(cells))
                    n_rows += 1

            self._read(q)

        write_text_atomically(target, write)
        return ExportReport(target, n_rows, len(uids), started)

    @staticmethod
    def _baseline_membership(conn: Connection, since_utc: datetime | None) -> dict[int, str]:
        """analysis id -> the ``baselines`` cell (compact JSON, oldest baseline first)."""
        stmt = (
            sa.select(baseline_members.c.analysis_id, baselines.c.created_at, baselines.c.note)
            .select_from(baseline_members.join(baselines, baselines.c.id == baseline_members.c.baseline_id)
                         .join(analyses, analyses.c.id == baseline_members.c.analysis_id))
            .order_by(baseline_members.c.analysis_id, baselines.c.created_at, baselines.c.id)
        )
        if since_utc is not None:
            stmt = stmt.where(analyses.c.recorded_at >= since_utc)
        out: dict[int, list[dict[str, Any]]] = defaultdict(list)
        for r in conn.execute(stmt):
            out[int(r.analysis_id)].append({"created_at": _csv_cell(r.created_at), "note": r.note})
        return {k: json.dumps(v, ensure_ascii=False, separators=(",", ":")) for k, v in out.items()}

    def import_csv(self, path: "str | os.PathLike | LedgerCsv", *, replace: bool = False) -> ImportReport:
        """Read a CSV written by :meth:`export_csv` back, in one transaction.

        Analyses whose ``analysis_uid`` is already present are skipped (so overlapping
        incremental exports import cleanly). Another analysis of the same series + template
        + settings is refused unless ``replace``. The fill record is not part of the CSV.
        Text cells are restored exactly (:func:`phantometry.ledger.csvcells.restore`), and
        the baselines of the ``baselines`` column are created (once: a baseline of the same
        scanner, protocol and creation time is reused) with their members, which makes
        export then import into a fresh store keep baseline membership.

        Raises
        ------
        InputError
            Missing columns, unparsable numbers or times (named with file and line).
        LedgerError
            Duplicates without ``replace``; text beyond the ledger's limits.
        """
        parsed = path if isinstance(path, LedgerCsv) else read_ledger_csv(path)
        groups, wanted = parsed.groups, parsed.baselines
        where = str(parsed.path)
        for uid_, (head, rows) in groups.items():
            rec = {k: head[k] for k in ("uid", "series_uid", "template", "protocol", "reconstruction", "settings_hash", "tool_version")}
            _check_analysis_text(head["site"], head["scanner"], None, rec, rows, f"{where} (analysis {uid_})")
        for (site_, scanner_, proto, _created), (note, _m) in wanted.items():
            check_text(baselines, {"protocol": proto, "note": note}, f"{where} (baseline of {scanner_} / {proto})")

        def txn(conn: Connection) -> ImportReport:
            added = replaced = skipped = 0
            cache: dict = {}
            present = set()
            uids = list(groups)
            for k in range(0, len(uids), 500):
                chunk = uids[k:k + 500]
                present |= set(conn.execute(sa.select(analyses.c.uid).where(analyses.c.uid.in_(chunk))).scalars())
            for uid_, (head, rows) in groups.items():
                if uid_ in present:
                    skipped += 1
                    continue
                record = {
                    "uid": uid_,
                    "record_key": _record_key(head["series_uid"], head["acquired_at"], head["template"], head["settings_hash"]),
                    "series_uid": head["series_uid"],
                    "template": head["template"],
                    "acquired_at": head["acquired_at"],
                    "recorded_at": head["recorded_at"],
                    "protocol": head["protocol"],
                    "reconstruction": head["reconstruction"],
                    "nuclide": None,
                    "fill_record": None,
                    "settings_hash": head["settings_hash"],
                    "tool_version": head["tool_version"] or "unknown",
                    "verdict": analysis_verdict(r["verdict"] for r in rows),
                    "scanner_id": self._scanner_id(conn, head["site"], head["scanner"], None, cache),
                }
                _id, was = self._store(conn, record, rows, replace, f"{where} (analysis {uid_})")
                replaced += int(was)
                added += int(not was)
            created = self._import_baselines(conn, wanted, cache, where)
            return ImportReport(added, replaced, skipped, sum(len(r) for _h, r in groups.values()), created)

        return self._write(txn)

    def _import_baselines(self, conn: Connection, wanted: Mapping[tuple, tuple[str | None, list[str]]], cache: dict,
                          where: str) -> int:
        """Create the baselines named in an imported CSV (once) and add their members; returns the number created."""
        created = 0
        for (site_, scanner_, proto, created_at), (note, member_uids) in wanted.items():
            scanner_id = self._scanner_id(conn, site_, scanner_, None, cache)
            found = conn.execute(
                sa.select(analyses.c.id, analyses.c.uid, analyses.c.scanner_id, analyses.c.protocol).where(analyses.c.uid.in_(member_uids))
            ).all()
            for r in found:
                if (r.scanner_id, r.protocol) != (scanner_id, proto):
                    raise LedgerError(
                        f"{where}: analysis {r.uid} of a baseline of {scanner_} / {proto} is held in this ledger under another "
                        "scanner or protocol; the baseline cannot be imported"
                    )
            baseline_id = conn.execute(
                sa.select(baselines.c.id).where(baselines.c.scanner_id == scanner_id, baselines.c.protocol == proto,
                                                baselines.c.created_at == created_at).order_by(baselines.c.id).limit(1)
            ).scalar()
            if baseline_id is None:
                baseline_id = int(conn.execute(
                    baselines.insert().values(scanner_id=scanner_id, protocol=proto, created_at=created_at, note=note)
                ).inserted_primary_key[0])
                created += 1
            have = set(conn.execute(sa.select(baseline_members.c.analysis_id).where(baseline_members.c.baseline_id == baseline_id)).scalars())
            new = sorted({int(r.id) for r in found} - have)
            if new:
                conn.execute(baseline_members.insert(), [{"baseline_id": baseline_id, "analysis_id": i} for i in new])
        return created


# ------------------------------------------------------------------------------ helpers
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


@dataclass
class LedgerCsv:
    """A ledger CSV read and checked (:func:`read_ledger_csv`), ready for :meth:`Ledger.import_csv`."""

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


def _validated_fill(fill_record: Mapping[str, Any] | None, where: str) -> dict[str, Any] | None:
    """The fill record as stored: validated, only its known keys (no personal data); None if empty."""
    if not fill_record:
        return None
    from ..fill import FillRecord

    return FillRecord.from_dict(dict(fill_record), source=f"{where}: fill_record").to_dict()


def _trend_flags(points: list[TrendPoint], limits: ControlLimits | None) -> list[TrendFlag]:
    valid = [p for p in points if p.value is not None]
    if not valid:
        return []
    flags = drift_flags([p.value for p in valid], limits.mean if limits else None, limits.sigma if limits else None)
    return [
        TrendFlag(valid[f.index].analysis_id, valid[f.index].acquired_at, float(valid[f.index].value), f.rule, f.description,
                  valid[f.first_index].acquired_at)
        for f in flags
    ]


def _csv_cell(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ""
    if isinstance(v, datetime):
        return v.astimezone(timezone.utc).isoformat()
    return str(v)


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
            out.append((_aware(item["created_at"], "baseline created_at", f"{path}: line {line}"), note))
        return out
    except (ValueError, TypeError, KeyError, AttributeError, RecursionError, LedgerError):
        raise InputError(f"{path}: line {line}: baselines {cell[:60]!r} is not a list of {{created_at, note}}; give a CSV written by phantometry ledger export") from None


def _read_ledger_csv(path: Path):
    """Parse a ledger CSV into analysis heads and measurement rows, grouped by analysis_uid.

    Returns ``(groups, baselines)``: ``groups`` maps analysis uid to (head, rows) with text
    cells restored; ``baselines`` maps (site, scanner, protocol, created_at) to (note, uids).
    """
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a CSV written by phantometry ledger export")
    if not path.is_file():
        raise InputError(f"{path}: no such file; give a CSV written by phantometry ledger export")
    groups: "OrderedDict[str, tuple[dict[str, Any], list[dict[str, Any]]]]" = OrderedDict()
    wanted: "OrderedDict[tuple, tuple[str | None, list[str]]]" = OrderedDict()
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            fields = reader.fieldnames or []
            missing = [c for c in LEDGER_CSV_COLUMNS if c not in fields and c not in OPTIONAL_CSV_COLUMNS]
            if missing:
                raise InputError(f"{path}: missing columns {', '.join(missing)}; give a CSV written by phantometry ledger export")
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
                row: dict[str, Any] = {}
                for c in _FLOAT_COLUMNS:
                    cell = rec[c].strip()
                    try:
                        row[c] = _finite_or_none(cell)
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
                if uid_ not in groups:
                    head: dict[str, Any] = {c: (rec[c] or None) for c in _ANALYSIS_COLUMNS}
                    head["uid"] = uid_
                    for c in ("acquired_at", "recorded_at"):
                        try:
                            head[c] = _aware(rec[c], c, f"{path}: line {line}")
                        except LedgerError as exc:
                            raise InputError(str(exc)) from None
                    for c in ("site", "scanner", "protocol", "template", "settings_hash"):
                        if not head[c]:
                            raise InputError(f"{path}: line {line}: empty {c}")
                    head["baselines"] = rec["baselines"]
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
        raise InputError(f"{path}: is not UTF-8 text (byte {exc.start}); give a CSV written by phantometry ledger export") from None
    except (OSError, csv.Error) as exc:
        raise InputError(f"{path}: cannot be read as CSV ({getattr(exc, 'strerror', None) or _one_line(exc)})") from None
    return groups, wanted


__all__ = [
    "AnalysisInfo",
    "BaselineInfo",
    "CheckResult",
    "ExportReport",
    "ImportReport",
    "LEDGER_CSV_COLUMNS",
    "LedgerCsv",
    "OPTIONAL_CSV_COLUMNS",
    "TEXT_CSV_COLUMNS",
    "Ledger",
    "RecordResult",
    "ScannerInfo",
    "Trend",
    "TrendFlag",
    "TrendPoint",
    "UNTRENDED_UNITS",
    "analysis_verdict",
    "read_ledger_csv",
    "read_result_document",
    "default_protocol_label",
    "default_scanner_label",
    "default_site_label",
    "settings_hash",
]
