"""Digital controllers on a revision: the discretisation method, the number format of the
coefficients and the discrete controller actually verified (issue 14).

Revision ID: 0006_digital
Revises: 0005
Create Date: 2026-12-02 21:30:00

Three columns on ``revision``, empty for every existing row (a revision entered in the loop's
own time domain, verified as written).  The revision's ``content_hash`` covers them only when
they are not empty, so existing hashes and the chain stay valid without a back-fill.
"""
from alembic import op
import sqlalchemy as sa


revision = '0006_digital'
down_revision = '0005'
branch_labels = None
depends_on = None


def upgrade() -> None:
    # plain ADD COLUMN (valid on SQLite and PostgreSQL with a constant default): the table is
    # not rebuilt, existing rows and pages stay where they are
    op.add_column('revision', sa.Column('discretization', sa.String(length=80), nullable=False,
                                        server_default=sa.text("''")))
    op.add_column('revision', sa.Column('number_format', sa.String(length=40), nullable=False,
                                        server_default=sa.text("''")))
    op.add_column('revision', sa.Column('verified_text', sa.Text(), nullable=False,
                                        server_default=sa.text("''")))


def downgrade() -> None:
    with op.batch_alter_table('revision', schema=None) as batch_op:
        batch_op.drop_column('verified_text')
        batch_op.drop_column('number_format')
        batch_op.drop_column('discretization')
