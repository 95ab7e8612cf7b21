"""Web sign-in sessions held by the server (the cookie carries a session token, not a key).

Revision ID: 0003
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "web_sessions",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("key_id", sa.String(length=32), nullable=False),
        sa.Column("created_us", sa.BigInteger(), nullable=False),
        sa.Column("expires_us", sa.BigInteger(), nullable=False),
        sa.Column("ended_us", sa.BigInteger(), nullable=True),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_web_sessions")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_web_sessions_token_hash")),
    )
    with op.batch_alter_table("web_sessions", schema=None) as batch_op:
        batch_op.create_index("ix_web_sessions_expires_us", ["expires_us"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("web_sessions", schema=None) as batch_op:
        batch_op.drop_index("ix_web_sessions_expires_us")
    op.drop_table("web_sessions")
