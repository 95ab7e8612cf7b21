"""Review: cases, the alerts they group, their audit history, suppressions; reviewer display
names on API keys and event types on subscriptions.

Revision ID: 0004
Revises: 0001
Create Date: 2026-12-03 09:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

_ID = sa.BigInteger().with_variant(sa.Integer(), "sqlite")


def upgrade() -> None:
    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.add_column(sa.Column("display_name", sa.String(length=100), nullable=True))
    with op.batch_alter_table("subscriptions", schema=None) as batch_op:
        batch_op.add_column(sa.Column("event_types", sa.Text(), nullable=True))
    _create_cases()
    _create_case_alerts_and_history()
    _create_suppressions()


def _create_cases() -> None:
    op.create_table(
        "cases",
        sa.Column("id", _ID, autoincrement=True, nullable=False),
        sa.Column("account", sa.String(length=200), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("assignee", sa.String(length=32), nullable=True),
        sa.Column("opened_us", sa.BigInteger(), nullable=False),
        sa.Column("updated_us", sa.BigInteger(), nullable=False),
        sa.Column("first_window_end_us", sa.BigInteger(), nullable=False),
        sa.Column("last_window_end_us", sa.BigInteger(), nullable=False),
        sa.Column("alert_count", sa.Integer(), nullable=False),
        sa.Column("peak_score", sa.Float(), nullable=False),
        sa.Column("latest_score", sa.Float(), nullable=False),
        sa.Column("latest_alert_id", sa.BigInteger(), nullable=False),
        sa.Column("decision", sa.String(length=16), nullable=True),
        sa.Column("decision_reason", sa.String(length=32), nullable=True),
        sa.Column("decision_text", sa.Text(), nullable=True),
        sa.Column("decided_us", sa.BigInteger(), nullable=True),
        sa.Column("decided_by", sa.String(length=32), nullable=True),
        sa.Column("dismissed_score", sa.Float(), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_cases")),
    )
    with op.batch_alter_table("cases", schema=None) as batch_op:
        batch_op.create_index("ix_cases_account", ["account"], unique=False)
        batch_op.create_index("ix_cases_state", ["state"], unique=False)
        batch_op.create_index("ix_cases_latest_score", ["latest_score"], unique=False)


def _create_case_alerts_and_history() -> None:
    op.create_table(
        "case_alerts",
        sa.Column("alert_id", sa.BigInteger(), nullable=False),
        sa.Column("case_id", sa.BigInteger(), nullable=False),
        sa.Column("joined_us", sa.BigInteger(), nullable=False),
        sa.Column("decision", sa.String(length=16), nullable=True),
        sa.Column("reason", sa.String(length=32), nullable=True),
        sa.Column("first_decided_us", sa.BigInteger(), nullable=True),
        sa.ForeignKeyConstraint(
            ["alert_id"], ["alerts.id"], name=op.f("fk_case_alerts_alert_id_alerts")
        ),
        sa.ForeignKeyConstraint(
            ["case_id"], ["cases.id"], name=op.f("fk_case_alerts_case_id_cases")
        ),
        sa.PrimaryKeyConstraint("alert_id", name=op.f("pk_case_alerts")),
    )
    with op.batch_alter_table("case_alerts", schema=None) as batch_op:
        batch_op.create_index("ix_case_alerts_case_id", ["case_id"], unique=False)
    op.create_table(
        "case_history",
        sa.Column("id", _ID, autoincrement=True, nullable=False),
        sa.Column("case_id", sa.BigInteger(), nullable=False),
        sa.Column("at_us", sa.BigInteger(), nullable=False),
        sa.Column("actor", sa.String(length=32), nullable=True),
        sa.Column("actor_name", sa.String(length=100), nullable=True),
        sa.Column("action", sa.String(length=16), nullable=False),
        sa.Column("from_state", sa.String(length=16), nullable=True),
        sa.Column("to_state", sa.String(length=16), nullable=True),
        sa.Column("reason", sa.String(length=32), nullable=True),
        sa.Column("text", sa.Text(), nullable=True),
        sa.Column("alert_id", sa.BigInteger(), nullable=True),
        sa.Column("assignee", sa.String(length=32), nullable=True),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["case_id"], ["cases.id"], name=op.f("fk_case_history_case_id_cases")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_case_history")),
    )
    with op.batch_alter_table("case_history", schema=None) as batch_op:
        batch_op.create_index("ix_case_history_case_id", ["case_id"], unique=False)


def _create_suppressions() -> None:
    op.create_table(
        "suppressions",
        sa.Column("id", _ID, autoincrement=True, nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column("value", sa.String(length=200), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("created_us", sa.BigInteger(), nullable=False),
        sa.Column("created_by", sa.String(length=32), nullable=True),
        sa.Column("expires_us", sa.BigInteger(), nullable=False),
        sa.Column("lifted_us", sa.BigInteger(), nullable=True),
        sa.Column("lifted_by", sa.String(length=32), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_suppressions")),
    )
    op.create_table(
        "suppressed_alerts",
        sa.Column("id", _ID, autoincrement=True, nullable=False),
        sa.Column("window_id", sa.BigInteger(), nullable=False),
        sa.Column("account", sa.String(length=200), nullable=False),
        sa.Column("suppression_id", sa.BigInteger(), nullable=False),
        sa.Column("score", sa.Float(), nullable=False),
        sa.Column("basis_version", sa.String(length=64), nullable=False),
        sa.Column("role_before", sa.Integer(), nullable=True),
        sa.Column("role_after", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["suppression_id"],
            ["suppressions.id"],
            name=op.f("fk_suppressed_alerts_suppression_id_suppressions"),
        ),
        sa.ForeignKeyConstraint(
            ["window_id"], ["windows.id"], name=op.f("fk_suppressed_alerts_window_id_windows")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_suppressed_alerts")),
    )
    with op.batch_alter_table("suppressed_alerts", schema=None) as batch_op:
        batch_op.create_index("ix_suppressed_alerts_window_id", ["window_id"], unique=False)
        batch_op.create_index(
            "ix_suppressed_alerts_suppression_id", ["suppression_id"], unique=False
        )


def downgrade() -> None:
    op.drop_table("suppressed_alerts")
    op.drop_table("suppressions")
    op.drop_table("case_history")
    op.drop_table("case_alerts")
    op.drop_table("cases")
    with op.batch_alter_table("subscriptions", schema=None) as batch_op:
        batch_op.drop_column("event_types")
    with op.batch_alter_table("api_keys", schema=None) as batch_op:
        batch_op.drop_column("display_name")
