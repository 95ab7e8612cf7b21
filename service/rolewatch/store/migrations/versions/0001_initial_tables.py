"""Create every table of the store (schema.py as of the first release).

Revision ID: 0001
Revises: (none)
Create Date: 2026-12-02 00:31:26.973935
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('api_keys',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=True, nullable=False),
    sa.Column('key_id', sa.String(length=32), nullable=False),
    sa.Column('secret_hash', sa.String(length=128), nullable=False),
    sa.Column('scopes', sa.String(length=100), nullable=False),
    sa.Column('label', sa.String(length=200), nullable=True),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('revoked_us', sa.BigInteger(), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_api_keys')),
    sa.UniqueConstraint('key_id', name=op.f('uq_api_keys_key_id'))
    )
    op.create_table('events',
    sa.Column('seq', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=True, nullable=False),
    sa.Column('event_id', sa.String(length=200), nullable=False),
    sa.Column('time_us', sa.BigInteger(), nullable=False),
    sa.Column('actor', sa.String(length=200), nullable=False),
    sa.Column('target', sa.String(length=200), nullable=False),
    sa.Column('kind', sa.String(length=64), nullable=True),
    sa.Column('weight', sa.Float(), nullable=False),
    sa.Column('received_us', sa.BigInteger(), nullable=False),
    sa.Column('late', sa.Boolean(), nullable=False),
    sa.PrimaryKeyConstraint('seq', name=op.f('pk_events')),
    sa.UniqueConstraint('event_id', name=op.f('uq_events_event_id'))
    )
    with op.batch_alter_table('events', schema=None) as batch_op:
        batch_op.create_index('ix_events_time_us', ['time_us'], unique=False)

    op.create_table('recipes',
    sa.Column('version', sa.String(length=64), nullable=False),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('body', sa.Text(), nullable=False),
    sa.PrimaryKeyConstraint('version', name=op.f('pk_recipes'))
    )
    op.create_table('service_state',
    sa.Column('key', sa.String(length=64), nullable=False),
    sa.Column('value', sa.Text(), nullable=False),
    sa.PrimaryKeyConstraint('key', name=op.f('pk_service_state'))
    )
    op.create_table('subscriptions',
    sa.Column('id', sa.String(length=40), nullable=False),
    sa.Column('url', sa.Text(), nullable=False),
    sa.Column('format', sa.String(length=16), nullable=False),
    sa.Column('min_score', sa.Float(), nullable=False),
    sa.Column('roles', sa.Text(), nullable=True),
    sa.Column('secret', sa.String(length=200), nullable=False),
    sa.Column('previous_secret', sa.String(length=200), nullable=True),
    sa.Column('previous_secret_until_us', sa.BigInteger(), nullable=True),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('paused', sa.Boolean(), nullable=False),
    sa.Column('paused_reason', sa.Text(), nullable=True),
    sa.Column('consecutive_failures', sa.Integer(), nullable=False),
    sa.Column('deleted_us', sa.BigInteger(), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_subscriptions'))
    )
    op.create_table('windows',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=True, nullable=False),
    sa.Column('start_us', sa.BigInteger(), nullable=False),
    sa.Column('end_us', sa.BigInteger(), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('closed_us', sa.BigInteger(), nullable=False),
    sa.Column('event_count', sa.Integer(), nullable=False),
    sa.Column('account_count', sa.Integer(), nullable=False),
    sa.Column('late_count', sa.Integer(), nullable=False),
    sa.Column('alert_count', sa.Integer(), nullable=False),
    sa.Column('new_count', sa.Integer(), nullable=False),
    sa.Column('inactive_count', sa.Integer(), nullable=False),
    sa.Column('scored_count', sa.Integer(), nullable=False),
    sa.Column('training', sa.Boolean(), nullable=False),
    sa.Column('recipe_version', sa.String(length=64), nullable=True),
    sa.Column('basis_version', sa.String(length=64), nullable=True),
    sa.Column('reconstruction_error', sa.Float(), nullable=True),
    sa.Column('close_seconds', sa.Float(), nullable=True),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_windows')),
    sa.UniqueConstraint('end_us', name=op.f('uq_windows_end_us'))
    )
    op.create_table('alerts',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=True, nullable=False),
    sa.Column('window_id', sa.BigInteger(), nullable=False),
    sa.Column('account', sa.String(length=200), nullable=False),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('window_end_us', sa.BigInteger(), nullable=False),
    sa.Column('score', sa.Float(), nullable=False),
    sa.Column('basis_version', sa.String(length=64), nullable=False),
    sa.Column('role_before', sa.Integer(), nullable=True),
    sa.Column('role_after', sa.Integer(), nullable=False),
    sa.Column('evidence', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['window_id'], ['windows.id'], name=op.f('fk_alerts_window_id_windows')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_alerts')),
    sa.UniqueConstraint('window_id', 'account', name=op.f('uq_alerts_window_id_account'))
    )
    with op.batch_alter_table('alerts', schema=None) as batch_op:
        batch_op.create_index('ix_alerts_account', ['account'], unique=False)
        batch_op.create_index('ix_alerts_score', ['score'], unique=False)
        batch_op.create_index('ix_alerts_window_end_us', ['window_end_us'], unique=False)

    op.create_table('bases',
    sa.Column('version', sa.String(length=64), nullable=False),
    sa.Column('recipe_version', sa.String(length=64), nullable=False),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('active', sa.Boolean(), nullable=False),
    sa.Column('trained_from_us', sa.BigInteger(), nullable=False),
    sa.Column('trained_to_us', sa.BigInteger(), nullable=False),
    sa.Column('body', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['recipe_version'], ['recipes.version'], name=op.f('fk_bases_recipe_version_recipes')),
    sa.PrimaryKeyConstraint('version', name=op.f('pk_bases'))
    )
    op.create_table('memberships',
    sa.Column('account', sa.String(length=200), nullable=False),
    sa.Column('window_id', sa.BigInteger(), nullable=False),
    sa.Column('basis_version', sa.String(length=64), nullable=False),
    sa.Column('mixture', sa.Text(), nullable=False),
    sa.Column('dominant_role', sa.Integer(), nullable=False),
    sa.Column('score', sa.Float(), nullable=True),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('events_out', sa.Integer(), nullable=False),
    sa.Column('events_in', sa.Integer(), nullable=False),
    sa.Column('counterparts', sa.Integer(), nullable=False),
    sa.Column('new_counterparts', sa.Integer(), nullable=False),
    sa.Column('error', sa.Float(), nullable=False),
    sa.ForeignKeyConstraint(['window_id'], ['windows.id'], name=op.f('fk_memberships_window_id_windows')),
    sa.PrimaryKeyConstraint('account', 'window_id', name=op.f('pk_memberships'))
    )
    with op.batch_alter_table('memberships', schema=None) as batch_op:
        batch_op.create_index('ix_memberships_window_id', ['window_id'], unique=False)

    op.create_table('deliveries',
    sa.Column('id', sa.String(length=64), nullable=False),
    sa.Column('subscription_id', sa.String(length=40), nullable=False),
    sa.Column('alert_id', sa.BigInteger(), nullable=True),
    sa.Column('event_type', sa.String(length=64), nullable=False),
    sa.Column('body', sa.Text(), nullable=False),
    sa.Column('status', sa.String(length=16), nullable=False),
    sa.Column('attempts', sa.Integer(), nullable=False),
    sa.Column('next_attempt_us', sa.BigInteger(), nullable=False),
    sa.Column('created_us', sa.BigInteger(), nullable=False),
    sa.Column('delivered_us', sa.BigInteger(), nullable=True),
    sa.Column('last_status_code', sa.Integer(), nullable=True),
    sa.Column('last_error', sa.Text(), nullable=True),
    sa.ForeignKeyConstraint(['alert_id'], ['alerts.id'], name=op.f('fk_deliveries_alert_id_alerts')),
    sa.ForeignKeyConstraint(['subscription_id'], ['subscriptions.id'], name=op.f('fk_deliveries_subscription_id_subscriptions')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_deliveries'))
    )
    with op.batch_alter_table('deliveries', schema=None) as batch_op:
        batch_op.create_index('ix_deliveries_status_next_attempt_us', ['status', 'next_attempt_us'], unique=False)
        batch_op.create_index('ix_deliveries_subscription_id', ['subscription_id'], unique=False)

    op.create_table('roles',
    sa.Column('basis_version', sa.String(length=64), nullable=False),
    sa.Column('role_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=100), nullable=False),
    sa.Column('description', sa.Text(), nullable=False),
    sa.Column('profile', sa.Text(), nullable=False),
    sa.ForeignKeyConstraint(['basis_version'], ['bases.version'], name=op.f('fk_roles_basis_version_bases')),
    sa.PrimaryKeyConstraint('basis_version', 'role_id', name=op.f('pk_roles'))
    )
    op.create_table('delivery_attempts',
    sa.Column('id', sa.BigInteger().with_variant(sa.Integer(), 'sqlite'), autoincrement=True, nullable=False),
    sa.Column('delivery_id', sa.String(length=64), nullable=False),
    sa.Column('attempted_us', sa.BigInteger(), nullable=False),
    sa.Column('status_code', sa.Integer(), nullable=True),
    sa.Column('error', sa.Text(), nullable=True),
    sa.Column('duration_ms', sa.Float(), nullable=True),
    sa.ForeignKeyConstraint(['delivery_id'], ['deliveries.id'], name=op.f('fk_delivery_attempts_delivery_id_deliveries')),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_delivery_attempts'))
    )
    with op.batch_alter_table('delivery_attempts', schema=None) as batch_op:
        batch_op.create_index('ix_delivery_attempts_delivery_id', ['delivery_id'], unique=False)



def downgrade() -> None:
    with op.batch_alter_table('delivery_attempts', schema=None) as batch_op:
        batch_op.drop_index('ix_delivery_attempts_delivery_id')

    op.drop_table('delivery_attempts')
    op.drop_table('roles')
    with op.batch_alter_table('deliveries', schema=None) as batch_op:
        batch_op.drop_index('ix_deliveries_subscription_id')
        batch_op.drop_index('ix_deliveries_status_next_attempt_us')

    op.drop_table('deliveries')
    with op.batch_alter_table('memberships', schema=None) as batch_op:
        batch_op.drop_index('ix_memberships_window_id')

    op.drop_table('memberships')
    op.drop_table('bases')
    with op.batch_alter_table('alerts', schema=None) as batch_op:
        batch_op.drop_index('ix_alerts_window_end_us')
        batch_op.drop_index('ix_alerts_score')
        batch_op.drop_index('ix_alerts_account')

    op.drop_table('alerts')
    op.drop_table('windows')
    op.drop_table('subscriptions')
    op.drop_table('service_state')
    op.drop_table('recipes')
    with op.batch_alter_table('events', schema=None) as batch_op:
        batch_op.drop_index('ix_events_time_us')

    op.drop_table('events')
    op.drop_table('api_keys')
