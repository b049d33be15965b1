"""Initial ledger schema: plants, loops, controller revisions, requirements with versions and traces.

Revision ID: 0001
Revises: 
Create Date: 2026-12-01 23:31:43.988407
"""
from alembic import op
import sqlalchemy as sa


revision = '0001'
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table('plant',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=80), nullable=False),
    sa.Column('description', sa.Text(), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_plant')),
    sa.UniqueConstraint('name', name=op.f('uq_plant_name'))
    )
    op.create_table('requirement',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('key', sa.String(length=40), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_requirement')),
    sa.UniqueConstraint('key', name=op.f('uq_requirement_key'))
    )
    op.create_table('loop',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=80), nullable=False),
    sa.Column('plant_id', sa.Integer(), nullable=False),
    sa.Column('kind', sa.String(length=20), nullable=False),
    sa.Column('description', sa.Text(), nullable=False),
    sa.Column('sensor_text', sa.Text(), nullable=False),
    sa.Column('prefilter_text', sa.Text(), nullable=False),
    sa.Column('input_delay', sa.Float(), nullable=False),
    sa.Column('output_delay', sa.Float(), nullable=False),
    sa.Column('sample_time', sa.Float(), nullable=True),
    sa.Column('computation_delay', sa.Integer(), nullable=False),
    sa.Column('actuator_limit', sa.Float(), nullable=True),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['plant_id'], ['plant.id'], name=op.f('fk_loop_plant_id_plant'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_loop')),
    sa.UniqueConstraint('name', name=op.f('uq_loop_name'))
    )
    with op.batch_alter_table('loop', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_loop_plant_id'), ['plant_id'], unique=False)

    op.create_table('plant_version',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('plant_id', sa.Integer(), nullable=False),
    sa.Column('number', sa.Integer(), nullable=False),
    sa.Column('model_text', sa.Text(), nullable=False),
    sa.Column('canonical', sa.Text(), nullable=False),
    sa.Column('sample_time', sa.Float(), nullable=True),
    sa.Column('parameters_json', sa.Text(), nullable=False),
    sa.Column('fidelity_json', sa.Text(), nullable=False),
    sa.Column('samples', sa.Integer(), nullable=False),
    sa.Column('seed', sa.Integer(), nullable=False),
    sa.Column('input_unit', sa.String(length=40), nullable=False),
    sa.Column('output_unit', sa.String(length=40), nullable=False),
    sa.Column('note', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['plant_id'], ['plant.id'], name=op.f('fk_plant_version_plant_id_plant'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_plant_version')),
    sa.UniqueConstraint('plant_id', 'number', name='uq_plant_version_number')
    )
    with op.batch_alter_table('plant_version', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_plant_version_plant_id'), ['plant_id'], unique=False)

    op.create_table('requirement_version',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('requirement_id', sa.Integer(), nullable=False),
    sa.Column('number', sa.Integer(), nullable=False),
    sa.Column('title', sa.String(length=200), nullable=False),
    sa.Column('statement', sa.Text(), nullable=False),
    sa.Column('rationale', sa.Text(), nullable=False),
    sa.Column('method', sa.String(length=20), nullable=False),
    sa.Column('status', sa.String(length=10), nullable=False),
    sa.Column('metric', sa.String(length=60), nullable=True),
    sa.Column('settings_json', sa.Text(), nullable=False),
    sa.Column('comparator', sa.String(length=2), nullable=True),
    sa.Column('limit_value', sa.Float(), nullable=True),
    sa.Column('limit_text', sa.String(length=60), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('note', sa.Text(), nullable=False),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint("method IN ('analysis', 'test', 'inspection', 'demonstration')", name=op.f('ck_requirement_version_method_known')),
    sa.CheckConstraint("status IN ('draft', 'approved', 'retired')", name=op.f('ck_requirement_version_status_known')),
    sa.ForeignKeyConstraint(['requirement_id'], ['requirement.id'], name=op.f('fk_requirement_version_requirement_id_requirement'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_requirement_version')),
    sa.UniqueConstraint('requirement_id', 'number', name='uq_requirement_version_number')
    )
    with op.batch_alter_table('requirement_version', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_requirement_version_requirement_id'), ['requirement_id'], unique=False)

    op.create_table('requirement_loop',
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('loop_id', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['loop_id'], ['loop.id'], name=op.f('fk_requirement_loop_loop_id_loop'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['version_id'], ['requirement_version.id'], name=op.f('fk_requirement_loop_version_id_requirement_version'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('version_id', 'loop_id', name=op.f('pk_requirement_loop'))
    )
    with op.batch_alter_table('requirement_loop', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_requirement_loop_loop_id'), ['loop_id'], unique=False)

    op.create_table('requirement_parent',
    sa.Column('version_id', sa.Integer(), nullable=False),
    sa.Column('parent_id', sa.Integer(), nullable=False),
    sa.ForeignKeyConstraint(['parent_id'], ['requirement.id'], name=op.f('fk_requirement_parent_parent_id_requirement'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['version_id'], ['requirement_version.id'], name=op.f('fk_requirement_parent_version_id_requirement_version'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('version_id', 'parent_id', name=op.f('pk_requirement_parent'))
    )
    with op.batch_alter_table('requirement_parent', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_requirement_parent_parent_id'), ['parent_id'], unique=False)

    op.create_table('revision',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('loop_id', sa.Integer(), nullable=False),
    sa.Column('label', sa.String(length=40), nullable=False),
    sa.Column('seq', sa.Integer(), nullable=False),
    sa.Column('parent_id', sa.Integer(), nullable=True),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('rationale', sa.Text(), nullable=False),
    sa.Column('controller_text', sa.Text(), nullable=False),
    sa.Column('controller_canonical', sa.Text(), nullable=False),
    sa.Column('content_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.CheckConstraint('length(trim(rationale)) > 0', name=op.f('ck_revision_rationale_not_empty')),
    sa.ForeignKeyConstraint(['loop_id'], ['loop.id'], name=op.f('fk_revision_loop_id_loop'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['parent_id'], ['revision.id'], name=op.f('fk_revision_parent_id_revision'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_revision')),
    sa.UniqueConstraint('loop_id', 'label', name='uq_revision_label')
    )
    with op.batch_alter_table('revision', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_revision_loop_id'), ['loop_id'], unique=False)
        batch_op.create_index(batch_op.f('ix_revision_parent_id'), ['parent_id'], unique=False)


def downgrade() -> None:
    with op.batch_alter_table('revision', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_revision_parent_id'))
        batch_op.drop_index(batch_op.f('ix_revision_loop_id'))

    op.drop_table('revision')
    with op.batch_alter_table('requirement_parent', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_requirement_parent_parent_id'))

    op.drop_table('requirement_parent')
    with op.batch_alter_table('requirement_loop', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_requirement_loop_loop_id'))

    op.drop_table('requirement_loop')
    with op.batch_alter_table('requirement_version', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_requirement_version_requirement_id'))

    op.drop_table('requirement_version')
    with op.batch_alter_table('plant_version', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_plant_version_plant_id'))

    op.drop_table('plant_version')
    with op.batch_alter_table('loop', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_loop_plant_id'))

    op.drop_table('loop')
    op.drop_table('requirement')
    op.drop_table('plant')

