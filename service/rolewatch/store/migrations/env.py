"""Alembic environment for the rolewatch store.

``open_store`` passes an open connection in ``config.attributes["connection"]`` (so the
PostgreSQL advisory lock it holds covers the upgrade). When run from the alembic command line
the URL comes from ``ROLEWATCH_DATABASE_URL``.
"""

from __future__ import annotations

import os

from alembic import context
from sqlalchemy import create_engine

from rolewatch.store.schema import metadata

config = context.config
target_metadata = metadata


def _run(connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",  # ALTER TABLE via copy on SQLite
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    url = os.environ.get("ROLEWATCH_DATABASE_URL", "sqlite:///rolewatch.db")
    engine = create_engine(url)
    with engine.connect() as connection:
        _run(connection)
    engine.dispose()


if context.is_offline_mode():
    context.configure(
        url=os.environ.get("ROLEWATCH_DATABASE_URL", "sqlite:///rolewatch.db"),
        target_metadata=target_metadata,
        literal_binds=True,
    )
    with context.begin_transaction():
        context.run_migrations()
else:
    run_migrations_online()
