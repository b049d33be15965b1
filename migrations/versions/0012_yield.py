"""Sample counts of results (yield with confidence): ``result.samples`` and
``result.sample_passes``, the random samples of the judged family and how many pass (NULL for
families without random samples and for results recorded before).  They enter a result's row
hash only when set, so existing rows keep their hashes and nothing is back-filled.

Revision ID: 0012
Revises: 0011
Create Date: 2026-12-03 06:00:00
"""
from alembic import op
import sqlalchemy as sa


revision = '0012'
down_revision = '0011'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.add_column(sa.Column('samples', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('sample_passes', sa.Integer(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.drop_column('sample_passes')
        batch_op.drop_column('samples')
