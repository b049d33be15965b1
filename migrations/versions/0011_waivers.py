"""Waivers: tables ``waiver`` and ``waiver_withdrawal`` (append-only, chained as record kinds
``waiver`` and ``waiver_withdrawal``), and a sign-off's ``accepted_json`` (the cells it
accepted explicitly and the waivers that covered cells when it was signed).

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03 06:00:00

Existing sign-offs take ``accepted_json = ''``, which does not enter the chain's record hash
(a default value is left out), so every existing link stays valid.
"""
from alembic import op
import sqlalchemy as sa


revision = '0011'
down_revision = '0010'
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('waiver',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('requirement_id', sa.Integer(), nullable=False),
    sa.Column('revision_id', sa.Integer(), nullable=True),
    sa.Column('baseline_id', sa.Integer(), nullable=True),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('approver', sa.String(length=120), nullable=False),
    sa.Column('role', sa.String(length=120), nullable=False),
    sa.Column('expires_on', sa.String(length=10), nullable=True),
    sa.Column('condition', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint('(revision_id IS NULL) <> (baseline_id IS NULL)', name=op.f('ck_waiver_waiver_one_scope')),
    sa.ForeignKeyConstraint(['requirement_id'], ['requirement.id'], name=op.f('fk_waiver_requirement_id_requirement'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['revision_id'], ['revision.id'], name=op.f('fk_waiver_revision_id_revision'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['baseline_id'], ['baseline.id'], name=op.f('fk_waiver_baseline_id_baseline'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_waiver'))
    )
    with op.batch_alter_table('waiver', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_waiver_requirement_id'), ['requirement_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_waiver_revision_id'), ['revision_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_waiver_baseline_id'), ['baseline_id'], unique=False)
    op.create_table('waiver_withdrawal',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('waiver_id', sa.Integer(), nullable=False),
    sa.Column('reason', sa.Text(), nullable=False),
    sa.Column('approver', sa.String(length=120), nullable=False),
    sa.Column('role', sa.String(length=120), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['waiver_id'], ['waiver.id'], name=op.f('fk_waiver_withdrawal_waiver_id_waiver'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_waiver_withdrawal')),
    sa.UniqueConstraint('waiver_id', name=op.f('uq_waiver_withdrawal_waiver_id'))
    )
    with op.batch_alter_table('signoff', schema=None) as batch_op:
        batch_op.add_column(sa.Column('accepted_json', sa.Text(), nullable=False,
                                      server_default=sa.text("''")))


def downgrade() -> None:
    with op.batch_alter_table('signoff', schema=None) as batch_op:
        batch_op.drop_column('accepted_json')
    op.drop_table('waiver_withdrawal')
    with op.batch_alter_table('waiver', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_waiver_baseline_id'))
        batch_op.drop_index(batch_op.f('ix_waiver_revision_id'))
        batch_op.drop_index(batch_op.f('ix_waiver_requirement_id'))
    op.drop_table('waiver')
