"""Baselines, sign-offs and the hash chain; links backfilled for existing records.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-01 23:42:03

Existing revisions and requirement versions get chain links in order of creation (time, then
kind, then id), computed exactly as ``ledger.chain`` computes them.  This revision is
self-contained: it reads rows through its own table descriptions and hashes with its own copy of
the canonical JSON rules, so later changes to the live models cannot change what it does.
"""
import hashlib
import json
import math
from datetime import datetime, timezone

from alembic import op
import sqlalchemy as sa


revision = '0003'
down_revision = '0002'
branch_labels = None
depends_on = None

GENESIS = "0" * 64

_REVISION = sa.table(
    "revision",
    sa.column("id", sa.Integer), sa.column("loop_id", sa.Integer), sa.column("label", sa.String),
    sa.column("seq", sa.Integer), sa.column("parent_id", sa.Integer),
    sa.column("author", sa.String), sa.column("rationale", sa.Text),
    sa.column("controller_text", sa.Text), sa.column("controller_canonical", sa.Text),
    sa.column("content_hash", sa.String), sa.column("created_at", sa.DateTime(timezone=True)),
)
_REQ_VERSION = sa.table(
    "requirement_version",
    sa.column("id", sa.Integer), sa.column("requirement_id", sa.Integer),
    sa.column("number", sa.Integer), sa.column("title", sa.String),
    sa.column("statement", sa.Text), sa.column("rationale", sa.Text),
    sa.column("method", sa.String), sa.column("status", sa.String),
    sa.column("metric", sa.String), sa.column("settings_json", sa.Text),
    sa.column("comparator", sa.String), sa.column("limit_value", sa.Float),
    sa.column("limit_text", sa.String), sa.column("author", sa.String),
    sa.column("note", sa.Text), sa.column("content_hash", sa.String),
    sa.column("created_at", sa.DateTime(timezone=True)),
)
_REQ_PARENT = sa.table("requirement_parent", sa.column("version_id", sa.Integer),
                       sa.column("parent_id", sa.Integer))
_REQ_LOOP = sa.table("requirement_loop", sa.column("version_id", sa.Integer),
                     sa.column("loop_id", sa.Integer))
_CHAIN = sa.table(
    "chain_link",
    sa.column("seq", sa.Integer), sa.column("kind", sa.String),
    sa.column("record_id", sa.Integer), sa.column("record_hash", sa.String),
    sa.column("prev_hash", sa.String), sa.column("chain_hash", sa.String),
    sa.column("created_at", sa.DateTime(timezone=True)),
)
_FIELDS = {
    "revision": ("id", "loop_id", "label", "seq", "parent_id", "author", "rationale",
                 "controller_text", "controller_canonical", "content_hash", "created_at"),
    "requirement_version": ("id", "requirement_id", "number", "title", "statement", "rationale",
                            "method", "status", "metric", "settings_json", "comparator",
                            "limit_value", "limit_text", "author", "note", "content_hash",
                            "created_at"),
}
_FLOATS = {"limit_value"}


def _normalise(obj):
    if isinstance(obj, float):
        if math.isinf(obj):
            return "inf" if obj > 0 else "-inf"
        return float(repr(obj)) if obj != 0 else 0.0
    if isinstance(obj, dict):
        return {str(k): _normalise(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_normalise(v) for v in obj]
    return obj


def _sha256_of(obj) -> str:
    data = json.dumps(_normalise(obj), sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _norm(name, value):
    if isinstance(value, datetime):
        if value.tzinfo is not None:
            value = value.astimezone(timezone.utc).replace(tzinfo=None)
        return value.isoformat(sep=" ", timespec="microseconds")
    if name in _FLOATS and value is not None:
        return float(value)
    return value


def _backfill_links(conn) -> None:
    parents, loops = {}, {}
    for vid, pid in conn.execute(sa.select(_REQ_PARENT.c.version_id, _REQ_PARENT.c.parent_id)):
        parents.setdefault(vid, []).append(pid)
    for vid, lid in conn.execute(sa.select(_REQ_LOOP.c.version_id, _REQ_LOOP.c.loop_id)):
        loops.setdefault(vid, []).append(lid)
    records = []
    for rank, (kind, table) in enumerate((("requirement_version", _REQ_VERSION),
                                          ("revision", _REVISION))):
        for row in conn.execute(sa.select(table)).mappings():
            content = {"kind": kind,
                       "fields": {f: _norm(f, row[f]) for f in _FIELDS[kind]}}
            if kind == "requirement_version":
                content["parents"] = sorted(parents.get(row["id"], []))
                content["loops"] = sorted(loops.get(row["id"], []))
            records.append((content["fields"]["created_at"], rank, row["id"], kind, content))
    records.sort(key=lambda r: r[:3])
    prev, now = GENESIS, datetime.now(timezone.utc)
    for seq, (_, _, rid, kind, content) in enumerate(records, start=1):
        rh = _sha256_of(content)
        ch = hashlib.sha256(f"{prev}:{kind}:{int(rid)}:{rh}".encode("utf-8")).hexdigest()
        conn.execute(_CHAIN.insert().values(seq=seq, kind=kind, record_id=rid, record_hash=rh,
                                            prev_hash=prev, chain_hash=ch, created_at=now))
        prev = ch


def upgrade() -> None:
    op.create_table('baseline',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=80), nullable=False),
    sa.Column('note', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('supersedes_id', sa.Integer(), nullable=True),
    sa.Column('matrix_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['supersedes_id'], ['baseline.id'], name=op.f('fk_baseline_supersedes_id_baseline'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_baseline')),
    sa.UniqueConstraint('name', name=op.f('uq_baseline_name')),
    sa.UniqueConstraint('supersedes_id', name=op.f('uq_baseline_supersedes_id'))
    )
    op.create_table('chain_link',
    sa.Column('seq', sa.Integer(), autoincrement=False, nullable=False),
    sa.Column('kind', sa.String(length=30), nullable=False),
    sa.Column('record_id', sa.Integer(), nullable=False),
    sa.Column('record_hash', sa.String(length=64), nullable=False),
    sa.Column('prev_hash', sa.String(length=64), nullable=False),
    sa.Column('chain_hash', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.PrimaryKeyConstraint('seq', name=op.f('pk_chain_link')),
    sa.UniqueConstraint('chain_hash', name=op.f('uq_chain_link_chain_hash'))
    )
    with op.batch_alter_table('chain_link', schema=None) as batch_op:
        batch_op.create_index('ix_chain_link_record', ['kind', 'record_id'], unique=False)

    op.create_table('signoff',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('baseline_id', sa.Integer(), nullable=False),
    sa.Column('name', sa.String(length=120), nullable=False),
    sa.Column('role', sa.String(length=120), nullable=False),
    sa.Column('statement', sa.Text(), nullable=False),
    sa.Column('author', sa.String(length=120), nullable=False),
    sa.Column('matrix_hash', sa.String(length=64), nullable=False),
    sa.Column('chain_head', sa.String(length=64), nullable=False),
    sa.Column('signed_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['baseline_id'], ['baseline.id'], name=op.f('fk_signoff_baseline_id_baseline'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_signoff'))
    )
    with op.batch_alter_table('signoff', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_signoff_baseline_id'), ['baseline_id'], unique=False)

    op.create_table('baseline_entry',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('baseline_id', sa.Integer(), nullable=False),
    sa.Column('kind', sa.String(length=10), nullable=False),
    sa.Column('revision_id', sa.Integer(), nullable=False),
    sa.Column('requirement_version_id', sa.Integer(), nullable=True),
    sa.Column('plant_version_id', sa.Integer(), nullable=False),
    sa.Column('data_json', sa.Text(), nullable=False),
    sa.CheckConstraint("kind IN ('column', 'cell')", name=op.f('ck_baseline_entry_kind_known')),
    sa.ForeignKeyConstraint(['baseline_id'], ['baseline.id'], name=op.f('fk_baseline_entry_baseline_id_baseline'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['plant_version_id'], ['plant_version.id'], name=op.f('fk_baseline_entry_plant_version_id_plant_version'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['requirement_version_id'], ['requirement_version.id'], name=op.f('fk_baseline_entry_requirement_version_id_requirement_version'), ondelete='RESTRICT'),
    sa.ForeignKeyConstraint(['revision_id'], ['revision.id'], name=op.f('fk_baseline_entry_revision_id_revision'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_baseline_entry'))
    )
    with op.batch_alter_table('baseline_entry', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_baseline_entry_baseline_id'), ['baseline_id'], unique=False)

    _backfill_links(op.get_bind())


def downgrade() -> None:
    with op.batch_alter_table('baseline_entry', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_baseline_entry_baseline_id'))

    op.drop_table('baseline_entry')
    with op.batch_alter_table('signoff', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_signoff_baseline_id'))

    op.drop_table('signoff')
    with op.batch_alter_table('chain_link', schema=None) as batch_op:
        batch_op.drop_index('ix_chain_link_record')

    op.drop_table('chain_link')
    op.drop_table('baseline')
