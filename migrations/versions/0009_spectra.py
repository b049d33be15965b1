"""Noise and disturbance spectra of loops (the rms budgets): table ``loop_spectrum``, one row
per loop and source, chained as record kind ``loop_spectrum``.

Revision ID: 0009
Revises: 0005
Create Date: 2026-12-02 21:55:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0009'
down_revision = '0008'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('loop_spectrum',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('loop_id', sa.Integer(), nullable=False),
    sa.Column('source', sa.String(length=30), nullable=False),
    sa.Column('kind', sa.String(length=10), nullable=False),
    sa.Column('shaping_text', sa.Text(), nullable=False),
    sa.Column('intensity', sa.Float(), nullable=True),
    sa.Column('table_json', sa.Text(), nullable=False),
    sa.Column('unit_text', sa.String(length=60), nullable=False),
    sa.Column('frequency_unit', sa.String(length=20), nullable=False),
    sa.Column('label', sa.Text(), nullable=False),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("kind IN ('rational', 'table')", name=op.f('ck_loop_spectrum_spectrum_kind_known')),
    sa.ForeignKeyConstraint(['loop_id'], ['loop.id'], name=op.f('fk_loop_spectrum_loop_id_loop'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_loop_spectrum')),
    sa.UniqueConstraint('loop_id', 'source', name='uq_loop_spectrum_source')
    )
    with op.batch_alter_table('loop_spectrum', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_loop_spectrum_loop_id'), ['loop_id'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('loop_spectrum', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_loop_spectrum_loop_id'))
    op.drop_table('loop_spectrum')
