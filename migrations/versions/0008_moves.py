"""Large moves and two-degree-of-freedom designs: a loop's optional actuator rate limit; a
revision's own prefilter (reference shaping / feedforward, model text and canonical form) and
anti-windup scheme with its gain.

Revision ID: 0008
Revises: 0005
Create Date: 2026-12-02 21:20:00

Existing rows take the defaults (no rate limit, no revision prefilter, no anti-windup), which
enter neither the content hashes nor the chain's record hashes (both leave default values
out), so every existing hash and link stays valid.
"""
from alembic import op
import sqlalchemy as sa


revision = '0008'
down_revision = '0007_measured'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('loop', schema=None) as batch_op:
        batch_op.add_column(sa.Column('rate_limit', sa.Float(), nullable=True))
    with op.batch_alter_table('revision', schema=None) as batch_op:
        batch_op.add_column(sa.Column('prefilter_text', sa.Text(), nullable=False,
                                      server_default=sa.text("''")))
        batch_op.add_column(sa.Column('prefilter_canonical', sa.Text(), nullable=False,
                                      server_default=sa.text("''")))
        batch_op.add_column(sa.Column('anti_windup', sa.String(length=20), nullable=False,
                                      server_default=sa.text("'none'")))
        batch_op.add_column(sa.Column('anti_windup_gain', sa.Float(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table('revision', schema=None) as batch_op:
        batch_op.drop_column('anti_windup_gain')
        batch_op.drop_column('anti_windup')
        batch_op.drop_column('prefilter_canonical')
        batch_op.drop_column('prefilter_text')
    with op.batch_alter_table('loop', schema=None) as batch_op:
        batch_op.drop_column('rate_limit')
