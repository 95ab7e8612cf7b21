"""The review tables: cases, the alerts they group, their audit history, and suppressions.

They sit on the same :data:`rolewatch.store.schema.metadata` as every other table (schema.py
imports this module at its end, so Alembic and ``metadata.create_all`` see them). Times are
integer microseconds since the Unix epoch, UTC, like everywhere in the store.

``case_history`` is append-only: :mod:`rolewatch.store.review` only ever inserts into it, so
who saw and decided what about an account stays traceable.
"""

from __future__ import annotations

from sqlalchemy import BigInteger, Column, Float, ForeignKey, Index, Integer, String, Table, Text

from rolewatch.store.schema import ID, MAX_ACCOUNT_CHARS, metadata

cases = Table(
    "cases",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("account", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("state", String(16), nullable=False),  # open | in_review | confirmed | dismissed
    # Optimistic concurrency: every change that a reviewer could race on adds one.
    Column("version", Integer, nullable=False),
    Column("assignee", String(32), nullable=True),  # key_id of the reviewer's API key
    Column("opened_us", BigInteger, nullable=False),
    Column("updated_us", BigInteger, nullable=False),
    Column("first_window_end_us", BigInteger, nullable=False),
    Column("last_window_end_us", BigInteger, nullable=False),
    Column("alert_count", Integer, nullable=False),
    Column("peak_score", Float, nullable=False),
    Column("latest_score", Float, nullable=False),
    Column("latest_alert_id", BigInteger, nullable=False),
    # The last decision (confirmed or dismissed); kept when the case is reopened.
    Column("decision", String(16), nullable=True),  # confirmed | dismissed
    Column("decision_reason", String(32), nullable=True),
    Column("decision_text", Text, nullable=True),
    Column("decided_us", BigInteger, nullable=True),
    Column("decided_by", String(32), nullable=True),
    # Highest alert score when the case was last dismissed: a new alert reopens the case only
    # when it scores clearly above it (Settings.case_reopen_ratio).
    Column("dismissed_score", Float, nullable=True),
    Index("ix_cases_account", "account"),
    Index("ix_cases_state", "state"),
    Index("ix_cases_latest_score", "latest_score"),
)

case_alerts = Table(
    "case_alerts",
    metadata,
    Column("alert_id", BigInteger, ForeignKey("alerts.id"), primary_key=True),
    Column("case_id", BigInteger, ForeignKey("cases.id"), nullable=False),
    Column("joined_us", BigInteger, nullable=False),
    # The case's current decision as it applies to this alert (None while undecided), and
    # the time of the first decision after the alert was raised (time to review).
    Column("decision", String(16), nullable=True),
    Column("reason", String(32), nullable=True),
    Column("first_decided_us", BigInteger, nullable=True),
    Index("ix_case_alerts_case_id", "case_id"),
)

case_history = Table(
    "case_history",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("case_id", BigInteger, ForeignKey("cases.id"), nullable=False),
    Column("at_us", BigInteger, nullable=False),
    Column("actor", String(32), nullable=True),  # key_id; None: the window close (system)
    Column("actor_name", String(100), nullable=True),  # display name when it happened
    # opened | alert_added | reopened | state | assigned | note | viewed
    Column("action", String(16), nullable=False),
    Column("from_state", String(16), nullable=True),
    Column("to_state", String(16), nullable=True),
    Column("reason", String(32), nullable=True),
    Column("text", Text, nullable=True),
    Column("alert_id", BigInteger, nullable=True),
    Column("assignee", String(32), nullable=True),
    Column("version", Integer, nullable=False),  # the case's version after this entry
    Index("ix_case_history_case_id", "case_id"),
)

suppressions = Table(
    "suppressions",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("kind", String(16), nullable=False),  # account | pattern
    Column("value", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("reason", Text, nullable=False),
    Column("created_us", BigInteger, nullable=False),
    Column("created_by", String(32), nullable=True),
    Column("expires_us", BigInteger, nullable=False),
    Column("lifted_us", BigInteger, nullable=True),
    Column("lifted_by", String(32), nullable=True),
)

suppressed_alerts = Table(
    "suppressed_alerts",
    metadata,
    Column("id", ID, primary_key=True, autoincrement=True),
    Column("window_id", BigInteger, ForeignKey("windows.id"), nullable=False),
    Column("account", String(MAX_ACCOUNT_CHARS), nullable=False),
    Column("suppression_id", BigInteger, ForeignKey("suppressions.id"), nullable=False),
    Column("score", Float, nullable=False),
    Column("basis_version", String(64), nullable=False),
    Column("role_before", Integer, nullable=True),
    Column("role_after", Integer, nullable=False),
    Index("ix_suppressed_alerts_window_id", "window_id"),
    Index("ix_suppressed_alerts_suppression_id", "suppression_id"),
)
