"""Alembic environment of the phantometry ledger.

Run programmatically by :func:`phantometry.ledger.schema.upgrade`, which passes an open
connection (already inside a locked transaction) in ``config.attributes["connection"]``. For
development, ``alembic -x url=sqlite:////tmp/l.sqlite3 upgrade head`` with a config whose
``script_location`` points here also works.
"""

from __future__ import annotations

from alembic import context

from phantometry.ledger.schema import VERSION_TABLE, make_engine, metadata, resolve_url

config = context.config


def _run(connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=metadata,
        version_table=VERSION_TABLE,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


connection = config.attributes.get("connection")
if connection is not None:
    _run(connection)
else:  # pragma: no cover - development use from the alembic command line
    url = context.get_x_argument(as_dictionary=True).get("url") or config.get_main_option("sqlalchemy.url")
    engine = make_engine(resolve_url(url))
    with engine.begin() as conn:
        _run(conn)
