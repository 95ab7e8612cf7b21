"""Revision 0004 (the review tables) goes down and up again on SQLite (batch mode) and
PostgreSQL, and an upgrade keeps the keys and subscriptions made before it."""

from __future__ import annotations

import sqlalchemy as sa
from alembic import command

from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.store.db import alembic_config, make_engine, open_store
from rolewatch.store.keys import create_key, list_keys

REVIEW_TABLES = {"cases", "case_alerts", "case_history", "suppressions", "suppressed_alerts"}


def _tables(engine) -> set[str]:
    return set(sa.inspect(engine).get_table_names())


def _columns(engine, table: str) -> set[str]:
    return {column["name"] for column in sa.inspect(engine).get_columns(table)}


def test_review_revision_down_and_up(store_url):
    engine = open_store(load_settings(database_url=store_url))
    record, _ = create_key(engine, ["read"], label="before", now_us=now_micros(), name="Kim")
    with engine.connect() as connection:
        command.downgrade(alembic_config(connection), "0001")
        connection.commit()
    engine.dispose()
    engine = make_engine(store_url)
    assert not REVIEW_TABLES & _tables(engine)
    assert "display_name" not in _columns(engine, "api_keys")
    assert "event_types" not in _columns(engine, "subscriptions")
    with engine.connect() as connection:
        keys = connection.execute(sa.text("SELECT key_id, label FROM api_keys")).all()
    assert [tuple(row) for row in keys] == [(record.key_id, "before")]
    engine.dispose()

    engine = open_store(load_settings(database_url=store_url))
    assert REVIEW_TABLES <= _tables(engine)
    (kept,) = list_keys(engine)
    assert (kept.key_id, kept.label, kept.display_name) == (record.key_id, "before", None)
    engine.dispose()
