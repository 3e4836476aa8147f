"""Schema of the trend ledger, engine set-up and migrations (SQLAlchemy 2 Core + Alembic).

Tables (all prefixed ``phantometry_`` so that a shared lab database can hold other
applications' tables beside ours; Alembic's version table is ``phantometry_alembic_version``):

``phantometry_sites``
    One row per site label (``name`` unique).
``phantometry_scanners``
    One row per scanner label within a site (``site_id``, ``name`` unique), with the
    manufacturer, model and device serial seen in the first recorded series.
``phantometry_analyses``
    One row per recorded analysis: ``uid`` (a UUID, the analysis identity across databases),
    ``record_key`` (SHA-256 of series identity, template and ``settings_hash``; unique, so the
    same series + template + settings cannot be recorded twice), ``series_uid``, ``template``,
    ``acquired_at`` and ``recorded_at`` (timezone-aware, stored in UTC), ``scanner_id``,
    ``protocol``, ``reconstruction`` (label), ``nuclide``, ``fill_record`` (JSON),
    ``settings_hash``, ``tool_version`` and (revision 0002) ``verdict``, the worst verdict
    of its measurements. No patient identity is ever a column, nor written into one.
``phantometry_measurements``
    One row per (analysis, roi, metric): ``value``, ``unit``, ``uncertainty``, ``band``,
    ``band_low``, ``band_high``, ``verdict``, ``note``.
``phantometry_baselines`` and ``phantometry_baseline_members`` (revision 0002)
    A baseline is a set of analyses of one scanner and protocol from which control limits
    come; the newest baseline of a scanner and protocol is the current one.

Indexes fit the queries: the trend of one metric of one scanner and protocol walks
``ix_phantometry_analyses_trend`` (scanner_id, protocol, acquired_at) and then the unique
index (analysis_id, roi, metric) of the measurements, so its cost grows with the points shown,
not with the size of the store. ``recorded_at`` is indexed for incremental exports.

The migrations live in ``migrations/`` beside this module and run programmatically (no
``alembic.ini``): :func:`ensure_schema` brings a store to the newest revision under a lock
(``BEGIN IMMEDIATE`` on SQLite, an advisory transaction lock on PostgreSQL), so several
processes opening a new store at once create it exactly once.

Opening is retried on lock conflicts. SQLite does not call its busy handler when a connection
that already reads must become a writer (it would risk a deadlock); switching a new file to
write-ahead logging is such a case, so several processes creating one store at once could get
"database is locked" at once. :func:`set_wal` and :func:`ensure_schema` therefore retry
themselves, with jittered back-off, for up to :data:`SQLITE_BUSY_TIMEOUT_S`.

A store is created only when asked (``create=True``): read-only commands open with
``create=False`` and get :class:`~phantometry.errors.LedgerError` for a SQLite file that does
not exist, or a database without the ledger's tables, and nothing is created (no folder, no
file, no table).

Text limits are the column lengths below, the same on every backend: :func:`check_text`
refuses a longer value (and the NUL character, which PostgreSQL cannot store) before the
database sees it, so SQLite, which does not enforce ``VARCHAR`` lengths, keeps exactly what
PostgreSQL keeps.
"""

from __future__ import annotations

import functools
import os
import random
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, TypeVar

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.engine import URL, Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError

from ..errors import LedgerError

T = TypeVar("T")


class NoLedgerStore(LedgerError):
    """The store named does not exist (no SQLite file, or a database without the ledger's tables)."""


#: Environment variable selecting the ledger database (any SQLAlchemy URL, or a file path).
DB_ENV = "PHANTOMETRY_DB"
#: Alembic's version table, named for us so a shared database can hold other applications.
VERSION_TABLE = "phantometry_alembic_version"
MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"
#: Execution option that makes a SQLite transaction take the write lock at BEGIN.
WRITE_OPTION = "phantometry_write"
#: Key of the PostgreSQL advisory lock held while migrating (an arbitrary constant).
_PG_MIGRATION_LOCK = 7_211_094_551
#: The newest revision in migrations/versions (a test checks it against Alembic's head);
#: opening an up-to-date store compares against it without importing Alembic.
HEAD_REVISION = "0002"
#: Seconds a SQLite connection waits for another writer before giving up.
SQLITE_BUSY_TIMEOUT_S = 60.0

NAMING = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s",
    "pk": "pk_%(table_name)s",
}


class UTCDateTime(sa.types.TypeDecorator):
    """A timezone-aware datetime stored in UTC on every backend.

    Binding refuses naive datetimes (``LedgerError``). SQLite has no time-zone type, so the
    value is stored as naive UTC text there and given back tagged UTC; PostgreSQL stores a
    ``timestamp with time zone``. Values always come back as aware UTC datetimes.
    """

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: sa.Dialect) -> Any:
        if value is None:
            return None
        if not isinstance(value, datetime):
            raise LedgerError(f"ledger: expected a datetime, got {type(value).__name__}")
        if value.tzinfo is None or value.utcoffset() is None:
            raise LedgerError(f"ledger: time {value.isoformat()} has no time zone; give an aware datetime")
        value = value.astimezone(timezone.utc)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: Any, dialect: sa.Dialect) -> Any:
        if value is None:
            return None
        if isinstance(value, str):  # defensive: a value written by hand into SQLite
            value = datetime.fromisoformat(value)
        if value.tzinfo is None:
            return value.replace(tzinfo=timezone.utc)
        return value.astimezone(timezone.utc)


metadata = sa.MetaData(naming_convention=NAMING)

sites = sa.Table(
    "phantometry_sites",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.String(200), nullable=False),
    sa.UniqueConstraint("name"),
)

scanners = sa.Table(
    "phantometry_scanners",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("site_id", sa.Integer, sa.ForeignKey("phantometry_sites.id"), nullable=False),
    sa.Column("name", sa.String(200), nullable=False),
    sa.Column("manufacturer", sa.String(200)),
    sa.Column("model", sa.String(200)),
    sa.Column("serial", sa.String(200)),
    sa.UniqueConstraint("site_id", "name"),
)

analyses = sa.Table(
    "phantometry_analyses",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("uid", sa.String(36), nullable=False),
    sa.Column("record_key", sa.String(64), nullable=False),
    sa.Column("series_uid", sa.String(64)),
    sa.Column("template", sa.String(200), nullable=False),
    sa.Column("acquired_at", UTCDateTime, nullable=False),
    sa.Column("recorded_at", UTCDateTime, nullable=False),
    sa.Column("scanner_id", sa.Integer, sa.ForeignKey("phantometry_scanners.id"), nullable=False),
    sa.Column("protocol", sa.String(200), nullable=False),
    sa.Column("reconstruction", sa.String(500)),
    sa.Column("nuclide", sa.String(16)),
    sa.Column("fill_record", sa.JSON),
    sa.Column("settings_hash", sa.String(64), nullable=False),
    sa.Column("tool_version", sa.String(64), nullable=False),
    sa.Column("verdict", sa.String(16)),
    sa.UniqueConstraint("uid"),
    sa.UniqueConstraint("record_key"),
    sa.Index("ix_phantometry_analyses_trend", "scanner_id", "protocol", "acquired_at"),
    sa.Index("ix_phantometry_analyses_recorded_at", "recorded_at"),
    sa.Index("ix_phantometry_analyses_acquired_at", "acquired_at"),
)

measurements = sa.Table(
    "phantometry_measurements",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column(
        "analysis_id", sa.Integer, sa.ForeignKey("phantometry_analyses.id", ondelete="CASCADE"), nullable=False
    ),
    sa.Column("roi", sa.String(100), nullable=False),
    sa.Column("metric", sa.String(100), nullable=False),
    sa.Column("value", sa.Double),
    sa.Column("unit", sa.String(32), nullable=False),
    sa.Column("uncertainty", sa.Double),
    sa.Column("band", sa.String(200)),
    sa.Column("band_low", sa.Double),
    sa.Column("band_high", sa.Double),
    sa.Column("verdict", sa.String(16)),
    sa.Column("note", sa.Text),
    sa.UniqueConstraint("analysis_id", "roi", "metric"),
)

baselines = sa.Table(
    "phantometry_baselines",
    metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("scanner_id", sa.Integer, sa.ForeignKey("phantometry_scanners.id"), nullable=False),
    sa.Column("protocol", sa.String(200), nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("note", sa.Text),
    sa.Index("ix_phantometry_baselines_current", "scanner_id", "protocol", "created_at"),
)

baseline_members = sa.Table(
    "phantometry_baseline_members",
    metadata,
    sa.Column(
        "baseline_id", sa.Integer, sa.ForeignKey("phantometry_baselines.id", ondelete="CASCADE"), primary_key=True
    ),
    sa.Column(
        "analysis_id", sa.Integer, sa.ForeignKey("phantometry_analyses.id", ondelete="CASCADE"), primary_key=True
    ),
)


# ------------------------------------------------------------------------------ URLs
def default_url() -> str:
    """The ledger used when none is given: ``$PHANTOMETRY_DB``, else a SQLite file.

    The file is ``ledger.sqlite3`` in the user data directory of platformdirs
    (``~/.local/share/phantometry`` on Linux).
    """
    env = os.environ.get(DB_ENV)
    if env:
        return env
    import platformdirs

    path = platformdirs.user_data_path("phantometry", appauthor=False) / "ledger.sqlite3"
    return sqlite_url(path)


def sqlite_url(path: str | os.PathLike) -> str:
    """SQLAlchemy URL of a SQLite file."""
    return URL.create("sqlite", database=str(Path(path).expanduser().resolve())).render_as_string()


def resolve_url(url: str | os.PathLike | None) -> URL:
    """Parse a ledger location: a SQLAlchemy URL, a file path (SQLite), or None (default).

    ``postgresql://`` without a driver means psycopg 3.
    """
    text = str(url) if url is not None else default_url()
    if "://" not in text:
        text = sqlite_url(text)
    try:
        parsed = make_url(text)
    except ArgumentError:
        raise LedgerError(f"ledger URL {text!r} cannot be parsed; give e.g. sqlite:////path/ledger.sqlite3 or postgresql://user@host/db") from None
    if parsed.drivername == "postgresql":
        parsed = parsed.set(drivername="postgresql+psycopg")
    return parsed


def display_url(url: URL | str) -> str:
    """The URL with any password hidden (for messages)."""
    return (url if isinstance(url, URL) else make_url(url)).render_as_string(hide_password=True)


# ---------------------------------------------------------------------------- engines
def sqlite_path(url: URL) -> Path | None:
    """The file of a SQLite URL (None for other backends, in-memory and ``file:`` URI stores)."""
    if url.get_backend_name() != "sqlite":
        return None
    db = url.database
    if not db or db == ":memory:" or db.startswith("file:"):
        return None
    return Path(db)


def check_store_exists(url: URL) -> None:
    """Refuse a SQLite store whose file does not exist (read-only opening creates nothing).

    Raises
    ------
    LedgerError
        The file is missing, or the path is a folder.
    """
    path = sqlite_path(url)
    if path is None:
        return
    if path.is_dir():
        raise LedgerError(f"ledger {display_url(url)}: {path} is a folder, not a ledger file; give the ledger.sqlite3 file with --db")
    if not path.exists():
        raise NoLedgerStore(
            f"ledger {display_url(url)}: no such store ({path} does not exist); check --db / ${DB_ENV}, "
            "or record an analysis first (phantometry ledger add, measure --record)"
        )


def make_engine(url: URL, *, create: bool = True) -> Engine:
    """An engine with the settings the ledger relies on.

    SQLite: a busy timeout of :data:`SQLITE_BUSY_TIMEOUT_S`, foreign keys on, and transactions
    begun by us so that a writing transaction takes the lock at ``BEGIN IMMEDIATE`` (the busy
    timeout then applies instead of a deadlock error on lock upgrade); the write-ahead log is
    switched on by :func:`ensure_schema` (:func:`set_wal`). With ``create`` the folder of a new
    SQLite file is made; without it nothing is created. PostgreSQL: pre-ping pooled connections.
    """
    backend = url.get_backend_name()
    try:
        if backend == "sqlite":
            path = sqlite_path(url)
            if path is not None and create:
                try:
                    path.parent.mkdir(parents=True, exist_ok=True)
                except OSError as exc:
                    raise LedgerError(f"ledger {display_url(url)}: cannot create the folder {path.parent} ({exc.strerror or exc})") from None
            engine = sa.create_engine(url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_S})
            _sqlite_events(engine)
        else:
            engine = sa.create_engine(url, pool_pre_ping=True)
    except (NoSuchModuleError, ImportError) as exc:
        raise LedgerError(f"ledger URL {display_url(url)}: no database driver ({exc}); use sqlite:/// or postgresql+psycopg://") from None
    except ArgumentError as exc:
        raise LedgerError(f"ledger URL {display_url(url)}: {exc}; check the URL") from None
    return engine


def _sqlite_events(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised through every test
        dbapi_conn.isolation_level = None  # we emit BEGIN ourselves (SQLAlchemy pysqlite recipe)
        cur = dbapi_conn.cursor()
        cur.execute(f"PRAGMA busy_timeout = {int(SQLITE_BUSY_TIMEOUT_S * 1000)}")
        cur.execute("PRAGMA foreign_keys = ON")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Connection):  # pragma: no cover
        mode = "IMMEDIATE" if conn.get_execution_options().get(WRITE_OPTION) else "DEFERRED"
        conn.exec_driver_sql(f"BEGIN {mode}")


def transient(exc: BaseException) -> bool:
    """A lock, deadlock or serialisation conflict worth retrying (SQLite or PostgreSQL)."""
    orig = getattr(exc, "orig", exc)
    text = str(orig).lower()
    if "database is locked" in text or "database table is locked" in text or "busy" in text:
        return True
    return getattr(orig, "sqlstate", None) in ("40001", "40P01", "55P03")


def retry_transient(fn: Callable[[], T], *, budget_s: float = SQLITE_BUSY_TIMEOUT_S) -> T:
    """Call ``fn`` until it does not fail with a transient lock error, for up to ``budget_s``.

    Jittered exponential back-off from 20 ms to 1 s; the last error is raised when the time
    is up. This is the busy handler for the cases where SQLite returns "database is locked"
    without calling its own (a reader that must become a writer).
    """
    deadline = time.monotonic() + budget_s
    delay = 0.02
    while True:
        try:
            return fn()
        except (DBAPIError, *_sqlite_errors()) as exc:
            if not transient(exc) or time.monotonic() + delay > deadline:
                raise
        time.sleep(delay * (1.0 + random.random()))
        delay = min(delay * 2.0, 1.0)


def _sqlite_errors() -> tuple[type[BaseException], ...]:
    import sqlite3

    return (sqlite3.Error,)


def set_wal(engine: Engine) -> None:
    """Switch a SQLite store to write-ahead logging (readers never block the writer); once.

    The mode is kept in the file, so this writes only the first time. The switch upgrades a
    read transaction to a write one, which SQLite refuses at once (without its busy handler)
    while another connection writes, hence :func:`retry_transient` around it.
    """
    if engine.dialect.name != "sqlite" or sqlite_path(engine.url) is None:
        return

    def switch() -> None:
        raw = engine.raw_connection()  # outside any transaction: the mode cannot change inside one
        try:
            cur = raw.cursor()
            if str(cur.execute("PRAGMA journal_mode").fetchone()[0]).lower() != "wal":
                cur.execute("PRAGMA journal_mode = WAL")
            cur.close()
        finally:
            raw.close()

    retry_transient(switch)


def writing(conn: Connection) -> Connection:
    """The connection marked so that its next transaction takes the write lock at BEGIN (SQLite)."""
    return conn.execution_options(**{WRITE_OPTION: True})


# ------------------------------------------------------------------------- migrations
def _alembic_config(connection: Connection | None = None):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.set_main_option("version_table", VERSION_TABLE)
    if connection is not None:
        cfg.attributes["connection"] = connection
    return cfg


@functools.lru_cache(maxsize=1)
def _script():
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(_alembic_config())


def head_revision() -> str:
    """The newest schema revision this version of phantometry knows (from the migrations)."""
    head = _script().get_current_head()
    assert head is not None
    return head


def known_revisions() -> list[str]:
    """Every schema revision, oldest first."""
    return [s.revision for s in reversed(list(_script().walk_revisions()))]


def current_revision(conn: Connection) -> str | None:
    """The revision a database is at (None: no ledger schema yet). Needs no Alembic import."""
    if not sa.inspect(conn).has_table(VERSION_TABLE):
        return None
    return conn.execute(sa.text(f"SELECT version_num FROM {VERSION_TABLE}")).scalar()


def _lock_for_migration(conn: Connection) -> None:
    if conn.dialect.name == "postgresql":
        conn.execute(sa.text("SELECT pg_advisory_xact_lock(:key)"), {"key": _PG_MIGRATION_LOCK})


def upgrade(engine: Engine, revision: str = "head") -> str:
    """Migrate the database to ``revision`` (default the newest) in one locked transaction.

    Returns the revision reached. Safe to call from several processes at once.
    """
    from alembic import command

    with writing(engine.connect()) as conn:
        with conn.begin():
            _lock_for_migration(conn)
            command.upgrade(_alembic_config(conn), revision)
            reached = current_revision(conn)
    return reached or ""


def ensure_schema(engine: Engine, where: str, *, allow_upgrade: bool = True, create: bool = True) -> str:
    """Check the store's revision and bring it to the newest one.

    Lock conflicts while opening (several processes creating one store at once) are retried
    (:func:`retry_transient`). Without ``create``, a database that holds no ledger yet is
    refused and left untouched.

    Raises
    ------
    LedgerError
        When the store was written by a newer phantometry (unknown revision), or an upgrade
        is needed and ``allow_upgrade`` is False, or there is no ledger and ``create`` is
        False, or the database cannot be reached.
    """
    def read_revision() -> str | None:
        with engine.connect() as conn:
            rev = current_revision(conn)
            conn.rollback()
        return rev

    try:
        rev = retry_transient(read_revision)
        if rev is None and not create:
            raise NoLedgerStore(
                f"ledger {where}: no ledger in this database yet (no phantometry tables); check --db / ${DB_ENV}, "
                "or record an analysis first (phantometry ledger add, measure --record)"
            )
        set_wal(engine)
        if rev == HEAD_REVISION:  # the usual case: no Alembic import, one small query
            return rev
        head = head_revision()
        if rev is not None and rev not in known_revisions():
            raise LedgerError(
                f"ledger {where}: schema revision {rev} is newer than this phantometry knows "
                f"(newest {head}); upgrade phantometry"
            )
        if not allow_upgrade:
            raise LedgerError(f"ledger {where}: schema revision {rev or 'none'} needs an upgrade to {head}; open it with upgrades allowed")
        return retry_transient(lambda: upgrade(engine))
    except (DBAPIError, *_sqlite_errors()) as exc:
        raise LedgerError(f"ledger {where}: cannot open the database ({_one_line(exc)}); check the URL and that the server runs") from None


# ---------------------------------------------------------------------------- text limits
#: Words for the columns in messages (the limit itself is the column's length).
_COLUMN_WORDS = {
    ("phantometry_sites", "name"): "site label",
    ("phantometry_scanners", "name"): "scanner label",
    ("phantometry_scanners", "manufacturer"): "scanner manufacturer",
    ("phantometry_scanners", "model"): "scanner model",
    ("phantometry_scanners", "serial"): "scanner serial number",
    ("phantometry_analyses", "uid"): "analysis uid",
    ("phantometry_analyses", "series_uid"): "series UID",
    ("phantometry_analyses", "template"): "template name",
    ("phantometry_analyses", "protocol"): "protocol label",
    ("phantometry_analyses", "reconstruction"): "reconstruction label",
    ("phantometry_analyses", "nuclide"): "nuclide",
    ("phantometry_analyses", "settings_hash"): "settings hash",
    ("phantometry_analyses", "tool_version"): "tool version",
    ("phantometry_analyses", "verdict"): "verdict",
    ("phantometry_measurements", "roi"): "ROI name",
    ("phantometry_measurements", "metric"): "metric name",
    ("phantometry_measurements", "unit"): "unit",
    ("phantometry_measurements", "band"): "band name",
    ("phantometry_measurements", "verdict"): "verdict",
    ("phantometry_measurements", "note"): "note",
    ("phantometry_baselines", "protocol"): "protocol label",
    ("phantometry_baselines", "note"): "baseline note",
}


def text_limit(table: sa.Table, column: str) -> int | None:
    """The most characters a text column keeps (None: unlimited)."""
    return getattr(table.c[column].type, "length", None)


def check_text(table: sa.Table, values: dict[str, Any], where: str) -> None:
    """Refuse text the database would refuse or that SQLite alone would keep.

    Every string value of a column with a length must fit it (characters, as PostgreSQL
    counts them), and no string may hold the NUL character. Checked before any SQL runs, so
    both backends keep the same values.

    Raises
    ------
    LedgerError
        One line naming the field, its length and the limit.
    """
    for key, value in values.items():
        if not isinstance(value, str) or key not in table.c:
            continue
        what = _COLUMN_WORDS.get((table.name, key), key.replace("_", " "))
        if "\x00" in value:
            raise LedgerError(f"{where}: the {what} holds a NUL character, which the ledger cannot store; remove it")
        limit = text_limit(table, key)
        if limit is not None and len(value) > limit:
            shown = value[:40] + ("..." if len(value) > 40 else "")
            raise LedgerError(
                f"{where}: the {what} {shown!r} is {len(value)} characters long; the ledger keeps at most {limit}; shorten it"
            )


def _one_line(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None) or exc
    text = " ".join(str(orig).split())
    return text[:300]
