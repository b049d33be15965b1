"""Verification results and the metric-value cache.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01 23:40:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0002'
down_revision = '0001'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('metric_value',
    sa.Column('key', sa.String(length=64), nullable=False),
    sa.Column('metric', sa.String(length=60), nullable=False),
    sa.Column('values_json', sa.Text(), nullable=False),
    sa.Column('engine_version', sa.String(length=20), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('key', name=op.f('pk_metric_value'))
    )
    op.create_table('result',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('revision_id', sa.Integer(), nullable=False),
    sa.Column('requirement_version_id', sa.Integer(), nullable=False),
    sa.Column('plant_version_id', sa.Integer(), nullable=False),
    sa.Column('verdict', sa.String(length=5), nullable=False),
    sa.Column('value', sa.Float(), nullable=True),
    sa.Column('headroom', sa.Float(), nullable=True),
    sa.Column('headroom_fraction', sa.Float(), nullable=True),
    sa.Column('worst_variant', sa.String(length=80), nullable=False),
    sa.Column('pass_fraction', sa.Float(), nullable=True),
    sa.Column('variants', sa.Integer(), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('metric_key', sa.String(length=64), nullable=False),
    sa.Column('engine_version', sa.String(length=20), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("verdict IN ('pass', 'fail', 'error', 'n/a')", name=op.f('ck_result_verdict_known')),
    sa.ForeignKeyConstraint(['plant_version_id'], ['plant_version.id'], name=op.f('fk_result_plant_version_id_plant_version'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['requirement_version_id'], ['requirement_version.id'], name=op.f('fk_result_requirement_version_id_requirement_version'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['revision_id'], ['revision.id'], name=op.f('fk_result_revision_id_revision'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_result')),
    sa.UniqueConstraint('revision_id', 'requirement_version_id', 'plant_version_id', name='uq_result_subject')
    )
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_result_plant_version_id'), ['plant_version_id'], unique=False)
        batch_op.create_index('ix_result_requirement_revision', ['requirement_version_id', 'revision_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_result_revision_id'), ['revision_id'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_result_revision_id'))
        batch_op.drop_index('ix_result_requirement_revision')
        batch_op.drop_index(batch_op.f('ix_result_plant_version_id'))

    op.drop_table('result')
    op.drop_table('metric_value')
