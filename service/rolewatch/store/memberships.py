"""Memberships: each active account's role mixture, score and activity in a closed window.

Mixtures are stored as JSON ``{role_id: weight}`` rounded to :data:`MIXTURE_DECIMALS`; a
baseline built in memory rounds the same way (pipeline.compute.as_stored), so it equals one
read back from here. An account with too little activity to fit a role (status
``too_little``) has an empty mixture ``{}`` and no dominant role.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import orjson
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.store.schema import memberships, windows

MIXTURE_DECIMALS = 6


@dataclass(frozen=True)
class MembershipColumns:
    """One window's memberships, column by column: entry ``i`` of each array is account
    ``accounts[i]``; ``mixture`` has one column per entry of ``role_ids``."""

    accounts: np.ndarray
    role_ids: tuple[int, ...]
    mixture: np.ndarray
    dominant: np.ndarray
    score: np.ndarray  # NaN where not scored
    status: np.ndarray
    events_out: np.ndarray
    events_in: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray
    error: np.ndarray
    ties: np.ndarray | None = None  # n x 4: out known, out new, in known, in new
    community: np.ndarray | None = None  # community label in the window, -1 for none


_COLUMNS = (
    "account",
    "window_id",
    "basis_version",
    "mixture",
    "dominant_role",
    "score",
    "status",
    "events_out",
    "events_in",
    "counterparts",
    "new_counterparts",
    "error",
    "ties_out_known",
    "ties_out_new",
    "ties_in_known",
    "ties_in_new",
    "community",
)


# Rows built and written at once: a window's rows as Python objects would hold about a
# kilobyte per account (1.5 GB at 1,500,000 accounts) if they were built all together.
INSERT_CHUNK_ROWS = 65_536


def insert_memberships(
    connection: Connection, window_id: int, basis_version: str, columns: MembershipColumns
) -> None:
    """Store every account's membership of one window, in bulk.

    The rows are built column by column (mixtures as JSON text, their weights formatted
    by orjson in one call) and handed to the driver in chunks of :data:`INSERT_CHUNK_ROWS`: one
    ``COPY ... FROM STDIN`` on PostgreSQL, one prepared ``INSERT`` run by ``executemany``
    per chunk on SQLite. Going through SQLAlchemy's per-row parameter processing took 16.8 s
    for the 166,607 rows of ``close-1m`` (2-core machine, profiled); this takes about a
    second.
    """
    n = len(columns.accounts)
    if not n:
        return
    chunks = (
        zip(
            *_column_lists(window_id, basis_version, _rows_of(columns, lo, lo + INSERT_CHUNK_ROWS)),
            strict=True,
        )
        for lo in range(0, n, INSERT_CHUNK_ROWS)
    )
    cursor = connection.connection.dbapi_connection.cursor()  # type: ignore[union-attr]
    try:
        if connection.dialect.name == "postgresql":
            statement = f"COPY memberships ({', '.join(_COLUMNS)}) FROM STDIN"
            with cursor.copy(statement) as copy:
                for rows in chunks:
                    for row in rows:
                        copy.write_row(row)
        else:
            marks = ", ".join("?" * len(_COLUMNS))
            statement = f"INSERT INTO memberships ({', '.join(_COLUMNS)}) VALUES ({marks})"
            for rows in chunks:
                cursor.executemany(statement, list(rows))
    finally:
        cursor.close()


def _rows_of(columns: MembershipColumns, lo: int, hi: int) -> MembershipColumns:
    """Rows ``lo:hi`` of every column (role ids kept)."""
    return MembershipColumns(
        **{
            field.name: value if field.name == "role_ids" or value is None else value[lo:hi]
            for field in fields(columns)
            for value in [getattr(columns, field.name)]
        }
    )


def _column_lists(window_id: int, basis_version: str, columns: MembershipColumns) -> list[list]:
    """The memberships table's columns as Python lists, in :data:`_COLUMNS` order (None for
    SQL NULL)."""
    n = len(columns.accounts)
    status = np.asarray(columns.status).astype(str)
    fitted = status != "too_little"
    ties = columns.ties if columns.ties is not None else np.full((n, 4), -1)
    community = columns.community if columns.community is not None else np.full(n, -1)
    score = np.asarray(columns.score, dtype=np.float64)
    return [
        np.asarray(columns.accounts, dtype=object).tolist(),
        [window_id] * n,
        [basis_version] * n,
        _mixture_json(columns.role_ids, columns.mixture, fitted).tolist(),
        _or_none(np.asarray(columns.dominant), fitted),
        _or_none(score, np.isfinite(score)),
        status.tolist(),
        np.asarray(columns.events_out, dtype=np.int64).tolist(),
        np.asarray(columns.events_in, dtype=np.int64).tolist(),
        np.asarray(columns.counterparts, dtype=np.int64).tolist(),
        np.asarray(columns.new_counterparts, dtype=np.int64).tolist(),
        np.asarray(columns.error, dtype=np.float64).tolist(),
        *(_or_none(ties[:, cell].astype(np.int64), ties[:, cell] >= 0) for cell in range(4)),
        _or_none(np.asarray(community).astype(np.int64), np.asarray(community) >= 0),
    ]


def _or_none(values: np.ndarray, keep: np.ndarray) -> list:
    """``values`` as Python numbers, None where ``keep`` is False."""
    out = np.asarray(values).astype(object)
    out[~np.asarray(keep, dtype=bool)] = None
    return out.tolist()


def _mixture_json(role_ids: tuple[int, ...], mixture: np.ndarray, fitted: np.ndarray) -> np.ndarray:
    """Each row's mixture as the JSON text ``json.dumps({role_id: weight})`` writes, the
    weights rounded to :data:`MIXTURE_DECIMALS`; ``{}`` where the account was not fitted."""
    n = len(fitted)
    if not role_ids:
        return np.full(n, "{}", dtype=object)
    rounded = np.round(np.asarray(mixture, dtype=np.float64), MIXTURE_DECIMALS)
    template = "{" + ", ".join(f'"{role_id}": %s' for role_id in role_ids) + "}"
    weights = _float_texts(rounded.ravel())
    rows = zip(*[iter(weights)] * len(role_ids), strict=True)  # consecutive groups of k
    text = np.array(list(map(template.__mod__, rows)), dtype=object)
    text[~np.asarray(fitted, dtype=bool)] = "{}"
    return text


def _float_texts(values: np.ndarray) -> list[str]:
    """Each value as ``json.dumps`` writes a float. orjson formats all of them in one call
    (0.06 s for a million, where ``float.__repr__`` one by one takes about 0.6 s); it writes
    the same digits and differs only in form below 1e-4 (``1e-6`` for ``1e-06``, ``0.00001``
    for ``1e-05``) and for what is not finite (``null``), so those few are written as
    ``json`` writes them."""
    texts = orjson.dumps(values, option=orjson.OPT_SERIALIZE_NUMPY).decode()[1:-1].split(",")
    if len(texts) != len(values):  # an empty array gives [""]
        texts = []
    magnitude = np.abs(values)
    for position in np.flatnonzero(~np.isfinite(values) | ((magnitude < 1e-4) & (values != 0))):
        texts[position] = json.dumps(float(values[position]))
    return texts


def measured_window_ids(connection: Connection, *, before_end_us: int, limit: int) -> list[int]:
    """Ids of the last ``limit`` windows measured against a model that end before
    ``before_end_us``, oldest first."""
    recent = (
        connection.execute(
            sa.select(windows.c.id)
            .where(windows.c.end_us < before_end_us, windows.c.basis_version.is_not(None))
            .order_by(windows.c.end_us.desc())
            .limit(limit)
        )
        .scalars()
        .all()
    )
    return list(reversed(recent))


def measured_windows(
    connection: Connection, *, before_end_us: int, limit: int
) -> list[tuple[int, int, int]]:
    """``(id, start_us, end_us)`` of the last ``limit`` windows measured against a model
    that end before ``before_end_us``, oldest first."""
    recent = connection.execute(
        sa.select(windows.c.id, windows.c.start_us, windows.c.end_us)
        .where(windows.c.end_us < before_end_us, windows.c.basis_version.is_not(None))
        .order_by(windows.c.end_us.desc())
        .limit(limit)
    ).all()
    return [(int(row[0]), int(row[1]), int(row[2])) for row in reversed(recent)]


def window_mixtures(connection: Connection, window_id: int) -> list[tuple[str, dict, int]]:
    """``(account, {role_id: weight}, events out + in)`` of every membership of a window."""
    rows = connection.execute(
        sa.select(
            memberships.c.account,
            memberships.c.mixture,
            memberships.c.events_out + memberships.c.events_in,
        ).where(memberships.c.window_id == window_id)
    ).all()
    return [(account, json.loads(mixture), count) for account, mixture, count in rows]


_READ_COLUMNS = (
    "account",
    "mixture",
    "status",
    "events_out",
    "events_in",
    "counterparts",
    "new_counterparts",
    "ties_out_known",
    "ties_out_new",
    "ties_in_known",
    "ties_in_new",
    "community",
)


@dataclass(frozen=True)
class StoredWindow:
    """What the next windows read back of one window's memberships, column by column."""

    accounts: np.ndarray  # str
    mixture: np.ndarray  # n x roles asked for, as stored (0 where a role is absent, all 0
    # where the account had too little activity), row-major
    status: np.ndarray  # str
    events_out: np.ndarray
    events_in: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray
    ties: np.ndarray  # n x 4 float, NaN where not recorded
    community: np.ndarray  # int, -1 where none


READ_BATCH_ROWS = 100_000  # memberships fetched and decoded at once


def mixture_matrix(mixtures: list[dict], role_ids: Sequence[str]) -> np.ndarray:
    """Stored ``{role_id: weight}`` mixtures as a row-major matrix with one column per role
    id, in that order (0 where a mixture lacks the role; roles not in the list are dropped)."""
    import pandas as pd

    if not mixtures:
        return np.zeros((0, len(role_ids)))
    frame = pd.DataFrame.from_records(mixtures, columns=list(role_ids))
    # row-major, as the sums over each row's roles expect (they round differently otherwise)
    return np.ascontiguousarray(frame.to_numpy(dtype=np.float64, na_value=0.0))


def window_columns(connection: Connection, window_id: int, role_ids: Sequence[str]) -> StoredWindow:
    """Every membership of one window, as columns, mixtures in the columns of ``role_ids``
    (one statement on the DBAPI cursor, fetched and decoded :data:`READ_BATCH_ROWS` rows at
    a time: a window's rows as Python tuples and its mixtures as dicts, all at once, took
    several times the columns' memory)."""
    mark = "%s" if connection.dialect.name == "postgresql" else "?"
    cursor = connection.connection.dbapi_connection.cursor()  # type: ignore[union-attr]
    batches = []
    try:
        cursor.execute(
            f"SELECT {', '.join(_READ_COLUMNS)} FROM memberships WHERE window_id = {mark}",
            (window_id,),
        )
        while rows := cursor.fetchmany(READ_BATCH_ROWS):
            batches.append(_decoded(rows, role_ids))
    finally:
        cursor.close()
    if len(batches) <= 1:  # one batch is the window: no copy
        return batches[0] if batches else _decoded([], role_ids)
    return StoredWindow(
        *(np.concatenate([getattr(b, f.name) for b in batches]) for f in fields(StoredWindow))
    )


def _decoded(rows: Sequence[Any], role_ids: Sequence[str]) -> StoredWindow:
    """One batch of membership rows (:data:`_READ_COLUMNS`) as columns."""
    table = np.array(rows, dtype=object).reshape(len(rows), len(_READ_COLUMNS))
    numbers = np.where(table[:, 3:] == None, np.nan, table[:, 3:]).astype(np.float64)  # noqa: E711
    return StoredWindow(
        accounts=table[:, 0].copy(),
        mixture=mixture_matrix(json.loads("[" + ",".join(table[:, 1].tolist()) + "]"), role_ids),
        status=table[:, 2].copy(),
        events_out=numbers[:, 0],
        events_in=numbers[:, 1],
        counterparts=numbers[:, 2],
        new_counterparts=numbers[:, 3],
        ties=numbers[:, 4:8],
        community=np.nan_to_num(numbers[:, 8], nan=-1.0).astype(np.int64),
    )
