"""The trend ledger's database access: :class:`Ledger` records analyses, queries them, trends one metric, keeps baselines, exports and imports CSV.

:class:`Ledger` is the library API; the ``phantometry ledger`` commands and
``phantometry measure --record`` are thin wiring over it. Every write is one transaction: an
analysis is stored with all its measurements or not at all.

Privacy by construction: only named, non-identifying fields are taken from a series summary
(series UID, acquisition time, nuclide, reconstruction label, scanner make, model, station
and serial). Patient name, ID, birth date and accession number are never read, stored or
exported; neither is the source file path nor the series description (free text).

What is not database access lives beside it: the result types (:mod:`.types`), the checks of
what goes in (:mod:`.inputs`: times, rows, verdicts, fill records, text limits, checked before
any SQL runs), labels and the identity of an analysis (:mod:`.labels`), the trend statistics
(:mod:`.trends`, over the drift rules of :mod:`.rules`) and the CSV format (:mod:`.csvio`,
with spreadsheet-safe cells that the import reads back exactly).
"""

from __future__ import annotations

import math
import os
import random
import time
import uuid
from collections import OrderedDict, defaultdict
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Mapping, Sequence, TypeVar

import sqlalchemy as sa
from sqlalchemy.engine import Connection
from sqlalchemy.exc import DBAPIError, IntegrityError, OperationalError

from ..errors import InputError, LedgerError
from ..results import Measurement
from .csvio import LedgerCsv, LedgerCsvWriter, baselines_cell, read_ledger_csv
from .inputs import (
    VERDICT_ORDER,
    analysis_verdict,
    aware_utc,
    check_analysis_text,
    measurement_row,
    read_result_document,
    validated_fill,
)
from .labels import clean_label, default_protocol_label, default_scanner_label, default_site_label, record_key, settings_hash
from .outfiles import check_output_file, write_text_atomically
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
from .trends import UNTRENDED_UNITS, trend_flags, trend_limits
from .types import (
    AnalysisInfo,
    BaselineInfo,
    CheckResult,
    ExportReport,
    ImportReport,
    RecordResult,
    ScannerInfo,
    Trend,
    TrendPoint,
)

if TYPE_CHECKING:  # pragma: no cover
    from ..phantoms.base import Analysis

T = TypeVar("T")

_RETRIES = 12


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def _one_line(exc: BaseException) -> str:
    """A database error's own message on one line (at most 300 characters)."""
    orig = getattr(exc, "orig", None) or exc
    return " ".join(str(orig).split())[:300]


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
        row_dicts = [measurement_row(r, where) for r in rows]
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
        acquired_at = aware_utc(acquired, "acquisition time", where)
        if not template:
            raise LedgerError(f"{where}: no template name")
        series_uid = series.get("series_uid") or None
        fill = validated_fill(fill_record, where)
        s_hash = settings_hash(fill, settings)
        rec = series.get("reconstruction") or {}
        if tool_version is None:
            from .. import __version__ as tool_version
        site_label = clean_label(site if site is not None else default_site_label(fill), "site", where)
        scanner_label = clean_label(scanner if scanner is not None else default_scanner_label(series), "scanner", where)
        protocol_label = clean_label(protocol if protocol is not None else default_protocol_label(series), "protocol", where)
        analysis = {
            "uid": str(uuid.uuid4()),
            "record_key": record_key(series_uid, acquired_at, template, s_hash),
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
        check_analysis_text(site_label, scanner_label, series.get("scanner"), analysis, row_dicts, where)

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
        when = aware_utc(acquired_at, "acquisition time", where) if (acquired_at is not None or not series_uid) else None
        key = record_key(series_uid or None, when, template, settings_hash(validated_fill(fill_record, where), settings))  # type: ignore[arg-type]
        found = self._read(lambda c: c.execute(sa.select(analyses.c.id).where(analyses.c.record_key == key)).scalar())
        return None if found is None else int(found)

    def check_not_recorded(self, *, series_uid: str | None, acquired_at: datetime | str | None, template: str,
                           fill_record: Mapping[str, Any] | None = None, settings: Mapping[str, Any] | None = None,
                           where: str = "ledger") -> None:
        """Refuse (:class:`LedgerError`) an analysis that :meth:`record` would refuse as a duplicate."""
        found = self.recorded_id(series_uid=series_uid, acquired_at=acquired_at, template=template, fill_record=fill_record,
                                 settings=settings, where=where)
        if found is not None:
            shown = series_uid or aware_utc(acquired_at, "acquisition time", where).isoformat()
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

    def record_analysis(self, analysis: Analysis, *, site: str | None = None, scanner: str | None = None,
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
            q = q.where(analyses.c.acquired_at >= aware_utc(since, "since", "ledger"))
        if until is not None:
            q = q.where(analyses.c.acquired_at <= aware_utc(until, "until", "ledger"))
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
        since_utc = aware_utc(since, "since", "ledger") if since is not None else None
        until_utc = aware_utc(until, "until", "ledger") if until is not None else None

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
        limits, notes = trend_limits(points, baseline_id, base_values)
        flags = trend_flags(points, limits)
        return Trend(site_name, scanner_name, proto, roi, metric, points[0].unit, points, limits, flags, notes)

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
        since_utc = aware_utc(since, "from", "ledger baseline") if since is not None else None
        until_utc = aware_utc(until, "to", "ledger baseline") if until is not None else None
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
        since_utc = aware_utc(since, "since", "ledger check") if since is not None else None

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
                limits, _notes = trend_limits(points, baseline_id, base_values)
                flags = trend_flags(points, limits)
                if since_utc is not None:
                    flags = [f for f in flags if f.acquired_at >= since_utc]
                results.append(CheckResult(g.site, g.scanner, g.protocol, roi, metric, unit, len(points), limits, flags))
        return results

    # ------------------------------------------------------------------ CSV
    def export_csv(self, path: str | os.PathLike, *, since: datetime | None = None, overwrite: bool = False) -> ExportReport:
        """Write measurements as long-format CSV (:data:`phantometry.ledger.csvio.LEDGER_CSV_COLUMNS`), atomically.

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
        since_utc = aware_utc(since, "since", "ledger export") if since is not None else None
        m, a = measurements, analyses
        # the columns of LEDGER_CSV_COLUMNS up to "baselines", then the analysis id (for its baselines cell)
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
        out = LedgerCsvWriter()

        def write(fh) -> None:
            out.header(fh)

            def q(conn: Connection) -> None:
                membership = self._baseline_membership(conn, since_utc)
                result = conn.execution_options(stream_results=True, yield_per=5000).execute(stmt)
                for r in result:
                    out.row(fh, tuple(r)[:-1], membership.get(r.analysis_id, ""))

            self._read(q)

        write_text_atomically(target, write)
        return ExportReport(target, out.rows, out.analyses, started)

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
        out: dict[int, list[tuple[datetime, str | None]]] = defaultdict(list)
        for r in conn.execute(stmt):
            out[int(r.analysis_id)].append((r.created_at, r.note))
        return {k: baselines_cell(v) for k, v in out.items()}

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
            check_analysis_text(head["site"], head["scanner"], None, rec, rows, f"{where} (analysis {uid_})")
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
                    "record_key": record_key(head["series_uid"], head["acquired_at"], head["template"], head["settings_hash"]),
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


__all__ = ["Ledger"]
