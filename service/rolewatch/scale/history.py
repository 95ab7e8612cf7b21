"""An account's role history over every closed window: from the SQL store, and from the
Parquet outputs for the windows whose memberships only went there
(``store_memberships_max_accounts``). The REST history and the account page read it here.

Without ``output_archive`` this is exactly the store's history (no extra statement).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.engine import Engine

from rolewatch.config import Settings
from rolewatch.store import queries

__all__ = ["account_history", "account_known"]


def _archived_entries(
    settings: Settings, account: str, windows: list[dict[str, Any]]
) -> list[dict[str, Any]]:
    """The account's entries in ``windows`` (records without stored memberships), in the
    form of :func:`rolewatch.store.queries.account_history`."""
    if not windows or not settings.output_archive:
        return []
    from rolewatch.scale.output_reads import output_index

    by_end = {int(window["end_us"]): window for window in windows}
    found = output_index(settings.output_archive).account_rows(account, list(by_end))
    entries = []
    for end_us, row in found.items():
        window = by_end[end_us]
        dominant = row["dominant_role"]
        fitted = row["status"] != "too_little" and dominant is not None and dominant >= 0
        entries.append(
            {
                "window_id": window["id"],
                "window_start_us": window["start_us"],
                "window_end_us": end_us,
                "basis_version": row["basis_version"],
                "mixture": row["mixture"],
                "dominant_role": int(dominant) if fitted else None,
                "score": row["score"],
                "status": row["status"],
                "events_out": row["events_out"],
                "events_in": row["events_in"],
                "counterparts": row["counterparts"],
                "new_counterparts": row["new_counterparts"],
                "error": row["error"],
            }
        )
    return entries


def account_history(
    engine: Engine,
    settings: Settings,
    account: str,
    from_us: int | None = None,
    to_us: int | None = None,
) -> list[dict[str, Any]]:
    """:func:`rolewatch.store.queries.account_history` over every closed window, the
    windows kept only in the Parquet outputs included; oldest first."""
    entries = queries.account_history(engine, account, from_us, to_us)
    if not settings.output_archive:
        return entries
    missing = queries.windows_without_memberships(engine, from_us, to_us)
    archived = _archived_entries(settings, account, missing)
    return sorted(entries + archived, key=lambda entry: entry["window_end_us"])


def account_known(engine: Engine, settings: Settings, account: str) -> bool:
    """:func:`rolewatch.store.queries.account_exists`, or the account has a row in a window
    kept only in the Parquet outputs."""
    if queries.account_exists(engine, account):
        return True
    if not settings.output_archive:
        return False
    missing = queries.windows_without_memberships(engine)
    return bool(_archived_entries(settings, account, missing))
