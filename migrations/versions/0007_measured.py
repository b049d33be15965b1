"""Measured plants: a plant version may carry frequency-response measurements.

Revision ID: 0007_measured
Revises: 0005
Create Date: 2026-12-02 22:00:00

``plant_version.measured_json``: name -> measurement (frequencies, complex response,
coherence, declared right-half-plane poles and integrators, metadata), ``{}`` for every
existing version (their content hashes do not change: the hash covers this field only when it
is not empty).
"""
from alembic import op
import sqlalchemy as sa


revision = '0007_measured'
down_revision = '0006_digital'
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("plant_version") as batch:
        batch.add_column(sa.Column("measured_json", sa.Text(), nullable=False,
                                   server_default="{}"))


def downgrade() -> None:
    with op.batch_alter_table("plant_version") as batch:
        batch.drop_column("measured_json")
