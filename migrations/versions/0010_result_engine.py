"""A result's subject includes the engine version that computed it: when the engine changes,
every revision is verified again and the new result sits beside the old one (append-only),
instead of the old result blocking it.  The unique key ``uq_result_subject`` becomes
(revision, requirement version, plant version, engine version).  No row changes, so the row
hashes and the chain stay as they are.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-03 06:00:00
"""
from alembic import op


revision = '0010'
down_revision = '0009'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.drop_constraint('uq_result_subject', type_='unique')
        batch_op.create_unique_constraint(
            'uq_result_subject',
            ['revision_id', 'requirement_version_id', 'plant_version_id', 'engine_version'])


def downgrade() -> None:
    # only possible while no subject has results of two engine versions
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.drop_constraint('uq_result_subject', type_='unique')
        batch_op.create_unique_constraint(
            'uq_result_subject', ['revision_id', 'requirement_version_id', 'plant_version_id'])
