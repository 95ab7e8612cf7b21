"""Database engines for the store: SQLite (default) and PostgreSQL from one URL.

``Engine`` and ``Connection`` are re-exported: the pipeline names them in its signatures
without depending on SQLAlchemy itself.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from datetime import timedelta
from typing import TYPE_CHECKING, Any

from alembic.config import Config
from sqlalchemy import event
from sqlalchemy.engine import Connection, CursorResult, Engine, create_engine

if TYPE_CHECKING:
    from rolewatch.config import Settings

__all__ = [
    "Connection",
    "alembic_config",
    "Engine",
    "held_session_lock",
    "inserted_id",
    "lock_windows",
    "make_engine",
    "open_store",
    "store_lock_key",
    "upgrade_to_head",
    "write_transaction",
]


def make_engine(
    url: str,
    *,
    sqlite_synchronous: str = "FULL",
    sqlite_busy_timeout: timedelta = timedelta(seconds=30),
) -> Engine:
    """Create an engine for ``url``.

    SQLite connections get WAL journaling (readers never block the writer), the chosen
    ``synchronous`` level (FULL: a committed transaction survives power loss), a busy timeout
    so concurrent writers wait instead of failing, and foreign keys on.
    """
    if url.startswith("sqlite"):
        engine = create_engine(
            url,
            connect_args={
                "timeout": sqlite_busy_timeout.total_seconds(),
                "check_same_thread": False,
            },
        )
        busy_ms = int(sqlite_busy_timeout.total_seconds() * 1000)

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_connection, _record):  # pragma: no cover - trivial
            # Python's sqlite3 opens transactions lazily; let SQLAlchemy issue BEGIN itself.
            dbapi_connection.isolation_level = None
            cursor = dbapi_connection.cursor()
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute(f"PRAGMA synchronous={sqlite_synchronous}")
            cursor.execute(f"PRAGMA busy_timeout={busy_ms}")
            cursor.execute("PRAGMA foreign_keys=ON")
            # 64 MiB page cache (default 2 MiB): index inserts into a big event table stay in
            # memory instead of re-reading pages; memory is only taken as pages are used.
            cursor.execute("PRAGMA cache_size=-65536")
            cursor.close()

        @event.listens_for(engine, "begin")
        def _sqlite_begin(connection):  # pragma: no cover - trivial
            # Writers take the lock at BEGIN IMMEDIATE, so two writers queue on busy_timeout
            # instead of failing with "database is locked" when a read upgrades to a write.
            if connection.get_execution_options().get("rolewatch_write"):
                connection.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                connection.exec_driver_sql("BEGIN")

        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=10)


def inserted_id(result: CursorResult) -> int:
    """The primary key of the row a single-row INSERT made."""
    key = result.inserted_primary_key
    if key is None:
        raise RuntimeError("the INSERT reported no primary key")
    return int(key[0])


def inserted_ids(connection: Connection, statement: Any, rows: Sequence[dict]) -> list[int]:
    """Insert many rows in few statements (SQLAlchemy's "insertmanyvalues": batched
    ``INSERT ... VALUES (...), (...) RETURNING id``) and return their primary keys in the
    order of ``rows``."""
    if not rows:
        return []
    table = statement.table
    key = next(iter(table.primary_key.columns))
    # Pages of 100 rows: every full page is the same statement text, which the PostgreSQL
    # driver converts once (a page of 1,000 rows with 9,000 parameters cost about a second
    # to convert, every time).
    result = connection.execute(
        statement.returning(key, sort_by_parameter_order=True).execution_options(
            insertmanyvalues_page_size=100
        ),
        list(rows),
    )
    return [int(value) for value in result.scalars()]


@contextmanager
def write_transaction(engine: Engine) -> Iterator[Connection]:
    """A transaction that will write: commits on success, rolls back on error.

    On SQLite it begins IMMEDIATE (takes the write lock up front); on PostgreSQL it is an
    ordinary transaction. Use ``engine.begin()`` for read-only work.
    """
    with engine.connect() as connection:
        connection.execution_options(rolewatch_write=True)
        with connection.begin():
            yield connection


# An arbitrary constant that names rolewatch's schema-upgrade lock among PostgreSQL advisory
# locks ("rw" + "sc" in ASCII), so two processes starting at once upgrade one after the other.
_MIGRATION_LOCK_ID = 0x7277_7363


# Names the lock that orders ingest against window closing on PostgreSQL ("rw" + "wi").
_WINDOW_LOCK_ID = 0x7277_7769


def store_lock_key(lock_id: int) -> str:
    """SQL arguments of a PostgreSQL advisory lock that belongs to this store only.

    The two-key form ``(hash of database and schema, lock_id)``: two rolewatch stores in one
    PostgreSQL server (different databases or schemas) never wait for each other's locks.
    """
    return f"hashtext(current_database() || '.' || current_schema()), {int(lock_id)}"


@contextmanager
def held_session_lock(engine: Engine, lock_id: int) -> Iterator[bool]:
    """Yield True when this process got the store-wide lock ``lock_id``, without waiting.

    PostgreSQL: a session-level advisory lock held on a dedicated connection until the block
    ends, so among several server processes exactly one holds it. SQLite: always True; there
    the callers' write transactions are what keeps two processes apart.
    """
    if engine.dialect.name != "postgresql":
        yield True
        return
    with engine.connect() as connection:
        got = connection.exec_driver_sql(
            f"SELECT pg_try_advisory_lock({store_lock_key(lock_id)})"
        ).scalar()
        connection.commit()
        try:
            yield bool(got)
        finally:
            if got:
                connection.exec_driver_sql(f"SELECT pg_advisory_unlock({store_lock_key(lock_id)})")
                connection.commit()


def lock_windows(connection: Connection, *, exclusive: bool) -> None:
    """Order event ingest against window closing, until the transaction ends.

    Ingest takes the lock shared (batches run side by side); the window closer takes it
    exclusive in the transaction that reads a window's events and records it closed. So a
    batch either commits before the closer reads (its events are in the window) or sees the
    window closed (its events are stored as late), never in between. PostgreSQL only: on
    SQLite every writer already holds the single write lock from BEGIN IMMEDIATE.
    """
    if connection.dialect.name != "postgresql":
        return
    function = "pg_advisory_xact_lock" if exclusive else "pg_advisory_xact_lock_shared"
    connection.exec_driver_sql(f"SELECT {function}({store_lock_key(_WINDOW_LOCK_ID)})")


def alembic_config(connection: Connection | None = None) -> Config:
    """An Alembic ``Config`` pointing at the migrations shipped inside the installed package.

    Built in code (no ``alembic.ini`` lookup, no dependence on the working directory).
    """
    from pathlib import Path

    config = Config()
    config.set_main_option("script_location", str(Path(__file__).resolve().parent / "migrations"))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


def upgrade_to_head(engine: Engine) -> None:
    """Run the Alembic migrations up to the newest revision.

    On PostgreSQL a session advisory lock serialises concurrent upgrades (on SQLite the
    write lock taken at BEGIN IMMEDIATE, held over every migration step, does): the second
    process waits, then finds the schema at head and does nothing.
    """
    from alembic import command

    with engine.connect() as connection:
        postgres = connection.dialect.name == "postgresql"
        if not postgres:
            # SQLite: one BEGIN IMMEDIATE around the whole upgrade, so a second process
            # waits for the first upgrade to commit instead of failing when both read the
            # same version and then both write. Alembic runs SQLite's migrations in one
            # transaction each, committing between them (another process could read the
            # version in between), unless the connection is already in a transaction.
            connection.execution_options(rolewatch_write=True)
            connection.begin()
        if postgres:
            connection.exec_driver_sql(
                f"SELECT pg_advisory_lock({store_lock_key(_MIGRATION_LOCK_ID)})"
            )
            connection.commit()
        try:
            command.upgrade(alembic_config(connection), "head")
            connection.commit()
        finally:
            if postgres:
                connection.exec_driver_sql(
                    f"SELECT pg_advisory_unlock({store_lock_key(_MIGRATION_LOCK_ID)})"
                )
                connection.commit()


def open_store(settings: Settings) -> Engine:
    """Make the engine named by ``settings.database_url`` and upgrade its schema to head."""
    engine = make_engine(
        settings.database_url,
        sqlite_synchronous=settings.sqlite_synchronous,
        sqlite_busy_timeout=settings.sqlite_busy_timeout,
    )
    upgrade_to_head(engine)
    return engine
