"""Memberships: each active account's role mixture, score and activity in a closed window.

Mixtures are stored as JSON ``{role_id: weight}`` rounded to :data:`MIXTURE_DECIMALS`; a
baseline built in memory rounds the same way (pipeline.compute.as_stored), so it equals one
read back from here.
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


def insert_memberships(
    connection: Connection, window_id: int, basis_version: str, columns: MembershipColumns
) -> None:
    """Store every account's membership of one window."""
    if not len(columns.accounts):
        return
    role_ids = [str(role_id) for role_id in columns.role_ids]
    rounded = np.round(columns.mixture, MIXTURE_DECIMALS)
    rows = []
    for index, account in enumerate(columns.accounts):
        score = float(columns.score[index])
        rows.append(
            {
                "account": str(account),
                "window_id": window_id,
                "basis_version": basis_version,
                "mixture": json.dumps(
                    {rid: float(w) for rid, w in zip(role_ids, rounded[index], strict=True)}
                ),
                "dominant_role": int(columns.dominant[index]),
                "score": score if np.isfinite(score) else None,
                "status": str(columns.status[index]),
                "events_out": int(columns.events_out[index]),
                "events_in": int(columns.events_in[index]),
                "counterparts": int(columns.counterparts[index]),
                "new_counterparts": int(columns.new_counterparts[index]),
                "error": float(columns.error[index]),
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
