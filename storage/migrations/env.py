"""Alembic environment for gasgap's schema.

Run programmatically by ``storage.db.upgrade`` / ``open_database`` (which hand over a
connection in ``config.attributes["connection"]``), or from a checkout with
``alembic -c storage/alembic.ini -x url=sqlite:///gasgap.db upgrade head``.
Logging is left to the caller: this file never reconfigures it.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import context

from storage.tables import metadata

config = context.config


def _run(connection: sa.Connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=metadata,
        # SQLite alters tables by copying them; batch mode does that for later revisions.
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def _url() -> str:
    url = context.get_x_argument(as_dictionary=True).get("url") or config.get_main_option(
        "sqlalchemy.url"
    )
    if not url:
        raise RuntimeError("database url missing: pass -x url=... or set sqlalchemy.url")
    return url


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    from storage.db import create_engine

    engine = create_engine(_url())
    try:
        with engine.connect() as conn:
            _run(conn)
            conn.commit()
    finally:
        engine.dispose()


if context.is_offline_mode():
    raise RuntimeError("gasgap migrations run online only (they need a connection)")
run_migrations_online()
