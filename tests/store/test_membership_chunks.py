"""A window's memberships are written in chunks of rows: every account's row arrives once,
whatever the chunk size, with the values the columns hold (the reference is each row
built on its own in plain Python; the mixture text is checked against ``json.dumps`` in
test_mixture_text.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from rolewatch.config import load_settings
from rolewatch.store import memberships as stored
from rolewatch.store.db import open_store, write_transaction
from rolewatch.store.windows import insert_window

WEEK_US = 7 * 86_400_000_000
FIRST_END = 1_770_000_000_000_000


def _columns(n: int) -> stored.MembershipColumns:
    rng = np.random.default_rng(9)
    fitted = rng.random(n) > 0.1
    score = np.where(rng.random(n) > 0.3, rng.random(n), np.nan)
    ties = rng.integers(-1, 5, (n, 4))
    return stored.MembershipColumns(
        accounts=np.array([f"acct-{i:04d}" for i in range(n)], dtype=object),
        role_ids=(0, 1, 2),
        mixture=rng.dirichlet(np.ones(3), n),
        dominant=rng.integers(0, 3, n),
        score=score,
        status=np.where(fitted, "fitted", "too_little"),
        events_out=rng.integers(0, 50, n),
        events_in=rng.integers(0, 50, n),
        counterparts=rng.integers(0, 20, n),
        new_counterparts=rng.integers(0, 5, n),
        error=rng.random(n),
        ties=ties,
        community=rng.integers(-1, 6, n),
    )


def _stored_rows(engine, window_id: int) -> list[tuple]:
    with engine.connect() as connection:
        cursor = connection.connection.dbapi_connection.cursor()
        mark = "%s" if connection.dialect.name == "postgresql" else "?"
        cursor.execute(
            "SELECT account, dominant_role, score, status, events_out, ties_in_new, community"
            f" FROM memberships WHERE window_id = {mark} ORDER BY account",
            (window_id,),
        )
        rows = cursor.fetchall()
        cursor.close()
    return [tuple(row) for row in rows]


@pytest.mark.parametrize("chunk_rows", [7, 1000])
def test_every_row_is_written_once_whatever_the_chunk(store_url, chunk_rows, monkeypatch):
    monkeypatch.setattr(stored, "INSERT_CHUNK_ROWS", chunk_rows)
    engine = open_store(load_settings(database_url=store_url))
    columns = _columns(150)
    with write_transaction(engine) as connection:
        window_id = insert_window(
            connection,
            start_us=FIRST_END - WEEK_US,
            end_us=FIRST_END,
            closed_us=FIRST_END,
            event_count=0,
            training=False,
            measures=None,
        )
        stored.insert_memberships(connection, window_id, "basis-1", columns)
    found = _stored_rows(engine, window_id)
    engine.dispose()

    # reference: each row built on its own
    fitted = columns.status != "too_little"
    expected = [
        (
            str(columns.accounts[i]),
            int(columns.dominant[i]) if fitted[i] else None,
            None if math.isnan(columns.score[i]) else float(columns.score[i]),
            str(columns.status[i]),
            int(columns.events_out[i]),
            int(columns.ties[i, 3]) if columns.ties[i, 3] >= 0 else None,
            int(columns.community[i]) if columns.community[i] >= 0 else None,
        )
        for i in range(len(columns.accounts))
    ]
    assert found == expected
