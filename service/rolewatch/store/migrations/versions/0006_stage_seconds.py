"""Stage timings of every window close.

Windows get ``stage_seconds``: JSON ``{stage: seconds}`` of the close (load, features, ties,
memberships, history, bridging, scoring, evidence, store), null for windows closed before.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-03 10:00:00
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("windows", schema=None) as batch_op:
        batch_op.add_column(sa.Column("stage_seconds", sa.Text(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("windows", schema=None) as batch_op:
        batch_op.drop_column("stage_seconds")
