"""Memberships: each active account's role mixture, score and activity in a closed window.

Mixtures are stored as JSON ``{role_id: weight}`` rounded to :data:`MIXTURE_DECIMALS`; a
baseline built in memory rounds the same way (pipeline.compute.as_stored), so it equals one
read back from here. An account with too little activity to fit a role (status
``too_little``) has an empty mixture ``{}`` and no dominant role.
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
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


def insert_memberships(
    connection: Connection, window_id: int, basis_version: str, columns: MembershipColumns
) -> None:
    """Store every account's membership of one window."""
    if not len(columns.accounts):
        return
    role_ids = [str(role_id) for role_id in columns.role_ids]
    rounded = np.round(columns.mixture, MIXTURE_DECIMALS)
    ties = columns.ties if columns.ties is not None else np.full((len(columns.accounts), 4), -1)
    community = (
        columns.community if columns.community is not None else np.full(len(columns.accounts), -1)
    )
    rows = []
    for index, account in enumerate(columns.accounts):
        score = float(columns.score[index])
        fitted = str(columns.status[index]) != "too_little"
        counts = [int(value) if value >= 0 else None for value in ties[index]]
        rows.append(
            {
                "account": str(account),
                "window_id": window_id,
                "basis_version": basis_version,
                "mixture": json.dumps(
                    {rid: float(w) for rid, w in zip(role_ids, rounded[index], strict=True)}
                    if fitted
                    else {}
                ),
                "dominant_role": int(columns.dominant[index]) if fitted else None,
                "score": score if np.isfinite(score) else None,
                "status": str(columns.status[index]),
                "events_out": int(columns.events_out[index]),
                "events_in": int(columns.events_in[index]),
                "counterparts": int(columns.counterparts[index]),
                "new_counterparts": int(columns.new_counterparts[index]),
                "error": float(columns.error[index]),
                "ties_out_known": counts[0],
                "ties_out_new": counts[1],
                "ties_in_known": counts[2],
                "ties_in_new": counts[3],
                "community": int(community[index]) if community[index] >= 0 else None,
            }
        )
    connection.execute(memberships.insert(), rows)


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


@dataclass(frozen=True)
class StoredWindow:
    """What the next windows read back of one window's memberships, column by column."""

    accounts: np.ndarray  # str
    mixtures: list[dict]  # {role_id: weight}; {} where the account had too little activity
    status: np.ndarray  # str
    events_out: np.ndarray
    events_in: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray
    ties: np.ndarray  # n x 4 float, NaN where not recorded
    community: np.ndarray  # int, -1 where none


def window_columns(connection: Connection, window_id: int) -> StoredWindow:
    """Every membership of one window, as columns."""
    c = memberships.c
    rows = connection.execute(
        sa.select(
            c.account,
            c.mixture,
            c.status,
            c.events_out,
            c.events_in,
            c.counterparts,
            c.new_counterparts,
            c.ties_out_known,
            c.ties_out_new,
            c.ties_in_known,
            c.ties_in_new,
            c.community,
        ).where(c.window_id == window_id)
    ).all()
    n = len(rows)
    numbers = np.array(
        [[np.nan if v is None else v for v in row[3:]] for row in rows], dtype=np.float64
    ).reshape(n, 9)
    return StoredWindow(
        accounts=np.array([row[0] for row in rows], dtype=object),
        mixtures=[json.loads(row[1]) for row in rows],
        status=np.array([row[2] for row in rows], dtype=object),
        events_out=numbers[:, 0],
        events_in=numbers[:, 1],
        counterparts=numbers[:, 2],
        new_counterparts=numbers[:, 3],
        ties=numbers[:, 4:8],
        community=np.nan_to_num(numbers[:, 8], nan=-1.0).astype(np.int64),
    )
