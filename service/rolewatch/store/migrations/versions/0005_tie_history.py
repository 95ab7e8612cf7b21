"""Tie-level history: counterparts by direction and novelty, communities, the known pairs.

Memberships get the counts of distinct counterparts sent to / received from that were
known before or new (over the account's known history), the account's community in the
window, and a nullable dominant role (an account with too little activity to fit a role
has none). The new ``pair_history`` table keeps, per window, the keys of the account pairs
that interacted there for the first time.

Revision ID: 0005
Revises: 0001
Create Date: 2026-12-03 08:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

_TIE_COLUMNS = ("ties_out_known", "ties_out_new", "ties_in_known", "ties_in_new", "community")


def upgrade() -> None:
    op.create_table(
        "pair_history",
        sa.Column("window_id", sa.BigInteger(), nullable=False),
        sa.Column("pair_count", sa.Integer(), nullable=False),
        sa.Column("pairs", sa.LargeBinary(), nullable=False),
        sa.ForeignKeyConstraint(
            ["window_id"], ["windows.id"], name=op.f("fk_pair_history_window_id_windows")
        ),
        sa.PrimaryKeyConstraint("window_id", name=op.f("pk_pair_history")),
    )
    with op.batch_alter_table("memberships", schema=None) as batch_op:
        batch_op.alter_column("dominant_role", existing_type=sa.Integer(), nullable=True)
        for name in _TIE_COLUMNS:
            batch_op.add_column(sa.Column(name, sa.Integer(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("memberships", schema=None) as batch_op:
        for name in reversed(_TIE_COLUMNS):
            batch_op.drop_column(name)
        batch_op.alter_column("dominant_role", existing_type=sa.Integer(), nullable=False)
    op.drop_table("pair_history")
