"""Content hashes for results and cached metric values, chained result batches, every record
kind on the chain, link time stamps inside the link hash.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02 10:30:00

Back-fill, computed exactly as ``ledger.chain`` computes it:

* every cached metric value gets its ``row_hash`` (a cache row no result was judged from is
  dropped; it is recomputed when needed);
* existing results are grouped into one ``result_batch`` per revision (time = the earliest of
  its results), and each gets its ``row_hash`` and ``batch_id``;
* the chain is re-linked with the new link rule (the link's time stamp enters its hash); the
  record hashes already stored in links are kept as they are, so a record altered before the
  upgrade is still named after it.  A sign-off's recorded chain head is moved to the re-linked
  hash of the same link.  When the existing chain does not verify under the old rule, its links
  are left untouched (the audit keeps naming them);
* existing plants, plant versions, loops, requirements and the new batches get links, appended
  in order of creation.  Those links vouch for the rows as they were at the upgrade.

Self-contained: rows are read through this file's own table descriptions and hashed with its
own copy of the rules, so later changes to the live models cannot change what it does.
"""
import hashlib
import json
import math
from datetime import datetime, timezone

from alembic import op
import sqlalchemy as sa


revision = '0005'
down_revision = '0004'
branch_labels = None
depends_on = None

GENESIS = "0" * 64
TS = sa.DateTime(timezone=True)

_FIELDS = {
    "plant": ("id", "name", "description", "created_at"),
    "plant_version": ("id", "plant_id", "number", "model_text", "canonical", "sample_time",
                      "parameters_json", "fidelity_json", "samples", "seed", "input_unit",
                      "output_unit", "note", "author", "content_hash", "created_at"),
    "loop": ("id", "name", "plant_id", "kind", "description", "sensor_text", "prefilter_text",
             "input_delay", "output_delay", "sample_time", "computation_delay",
             "actuator_limit", "created_at"),
    "requirement": ("id", "key", "created_at"),
    "result_batch": ("id", "revision_id", "results", "subjects", "digest", "created_at"),
    "signoff": ("id", "baseline_id", "name", "role", "statement", "author", "matrix_hash",
                "chain_head", "signed_at"),
}
_FLOATS = {"plant_version": {"sample_time"},
           "loop": {"input_delay", "output_delay", "sample_time", "actuator_limit"}}
_TYPES = {"id": sa.Integer, "plant_id": sa.Integer, "number": sa.Integer, "samples": sa.Integer,
          "seed": sa.Integer, "computation_delay": sa.Integer, "revision_id": sa.Integer,
          "results": sa.Integer, "baseline_id": sa.Integer, "sample_time": sa.Float,
          "input_delay": sa.Float, "output_delay": sa.Float, "actuator_limit": sa.Float,
          "created_at": TS, "signed_at": TS}


def _table(name, fields):
    return sa.table(name, *[sa.column(f, _TYPES.get(f, sa.Text)) for f in fields])


_CHAIN = sa.table(
    "chain_link", sa.column("seq", sa.Integer), sa.column("kind", sa.String),
    sa.column("record_id", sa.Integer), sa.column("record_hash", sa.String),
    sa.column("prev_hash", sa.String), sa.column("chain_hash", sa.String),
    sa.column("created_at", TS))
_RESULT_FIELDS = ("revision_id", "requirement_version_id", "plant_version_id", "verdict",
                  "value", "headroom", "headroom_fraction", "worst_variant", "pass_fraction",
                  "variants", "reason", "metric_key", "engine_version", "created_at")
_RESULT_FLOATS = {"value", "headroom", "headroom_fraction", "pass_fraction"}
_RESULT = sa.table(
    "result", sa.column("id", sa.Integer), sa.column("batch_id", sa.Integer),
    sa.column("row_hash", sa.String),
    *[sa.column(f, sa.Float if f in _RESULT_FLOATS else
                (sa.Integer if f.endswith("_id") or f == "variants" else
                 (TS if f == "created_at" else sa.Text))) for f in _RESULT_FIELDS])
_METRIC_FIELDS = ("key", "metric", "values_json", "engine_version", "created_at")
_METRIC = sa.table("metric_value", sa.column("row_hash", sa.String),
                   *[sa.column(f, TS if f == "created_at" else sa.Text) for f in _METRIC_FIELDS])


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


def _stamp(value):
    if isinstance(value, datetime):
        if value.tzinfo is not None:
            value = value.astimezone(timezone.utc).replace(tzinfo=None)
        return value.isoformat(sep=" ", timespec="microseconds")
    return value


def _norm(kind, name, value):
    if isinstance(value, datetime):
        return _stamp(value)
    if name in _FLOATS.get(kind, ()) and value is not None:
        return float(value)
    return value


def _record_hash(kind, row) -> str:
    return _sha256_of({"kind": kind, "fields": {f: _norm(kind, f, row[f]) for f in _FIELDS[kind]}})


def _old_link_hash(prev, kind, rid, rh) -> str:
    return hashlib.sha256(f"{prev}:{kind}:{int(rid)}:{rh}".encode("utf-8")).hexdigest()


def _link_hash(prev, kind, rid, rh, created_at) -> str:
    data = f"{prev}:{kind}:{int(rid)}:{rh}:{_stamp(created_at)}"
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _num(value):
    if value is None:
        return None
    v = float(value)
    return None if math.isnan(v) else v


def _result_hash(row) -> str:
    vals = [_num(row[f]) if f in _RESULT_FLOATS else
            (_stamp(row[f]) if f == "created_at" else row[f]) for f in _RESULT_FIELDS]
    data = json.dumps(vals, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _metric_hash(row) -> str:
    vals = [_stamp(row[f]) if f == "created_at" else row[f] for f in _METRIC_FIELDS]
    data = json.dumps(vals, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _digest(row_hashes, metric_hashes) -> str:
    data = json.dumps({"results": sorted(row_hashes),
                       "metric_values": [[k, metric_hashes[k]] for k in sorted(metric_hashes)]},
                      separators=(",", ":"), sort_keys=True)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _backfill_results(conn) -> None:
    # a cache row no result was judged from (left by two writers racing on one revision
    # before this schema) is dropped: it is recomputed when needed, and the audit names such
    # rows from now on
    conn.execute(_METRIC.delete().where(
        _METRIC.c.key.not_in(sa.select(_RESULT.c.metric_key))))
    mv_hash = {}
    updates = []
    for row in conn.execute(sa.select(_METRIC)).mappings():
        h = _metric_hash(row)
        mv_hash[row["key"]] = h
        updates.append({"k": row["key"], "h": h})
    if updates:
        conn.execute(_METRIC.update().where(_METRIC.c.key == sa.bindparam("k"))
                     .values(row_hash=sa.bindparam("h")), updates)
    batch = _table("result_batch", _FIELDS["result_batch"])
    groups = {}
    for row in conn.execute(sa.select(_RESULT).order_by(_RESULT.c.revision_id, _RESULT.c.id)
                            ).mappings():
        groups.setdefault(row["revision_id"], []).append((row["id"], _result_hash(row), row))
    for revision_id, members in groups.items():
        subjects = ",".join(f"{a}:{b}" for a, b in sorted(
            (r["requirement_version_id"], r["plant_version_id"]) for _, _, r in members))
        keys = {r["metric_key"] for _, _, r in members}
        digest = _digest([h for _, h, _ in members], {k: mv_hash.get(k) for k in keys})
        created = min(r["created_at"] for _, _, r in members)
        bid = conn.execute(batch.insert().values(
            revision_id=revision_id, results=len(members), subjects=subjects, digest=digest,
            created_at=created).returning(batch.c.id)).scalar_one()
        conn.execute(_RESULT.update().where(_RESULT.c.id == sa.bindparam("i"))
                     .values(row_hash=sa.bindparam("h"), batch_id=bid),
                     [{"i": i, "h": h} for i, h, _ in members])


def _relink(conn) -> None:
    links = list(conn.execute(sa.select(_CHAIN).order_by(_CHAIN.c.seq)).mappings())
    prev, intact = GENESIS, True
    for ln in links:
        if (ln["prev_hash"] != prev
                or _old_link_hash(prev, ln["kind"], ln["record_id"], ln["record_hash"])
                != ln["chain_hash"]):
            intact = False
            break
        prev = ln["chain_hash"]
    seq_of_old = {ln["chain_hash"]: ln["seq"] for ln in links}
    links = [dict(ln) for ln in links]
    linked = {(ln["kind"], ln["record_id"]) for ln in links}
    # links for the kinds chained from now on, in order of creation
    new = []
    for rank, kind in enumerate(("plant", "plant_version", "loop", "requirement",
                                 "result_batch")):
        for row in conn.execute(sa.select(_table(kind, _FIELDS[kind]))).mappings():
            if (kind, row["id"]) not in linked:
                new.append((_stamp(row["created_at"]), rank, row["id"], kind,
                            _record_hash(kind, row)))
    new.sort(key=lambda r: r[:3])
    now = datetime.now(timezone.utc)
    next_seq = (links[-1]["seq"] if links else 0) + 1
    appended = []
    for i, (_, _, rid, kind, rh) in enumerate(new):
        appended.append({"seq": next_seq + i, "kind": kind, "record_id": rid, "record_hash": rh,
                         "prev_hash": None, "chain_hash": None, "created_at": now, "new": True})
    signoffs = _table("signoff", _FIELDS["signoff"])
    so_rows = {r["id"]: dict(r) for r in conn.execute(sa.select(signoffs)).mappings()}
    new_hash_of_seq = {}
    prev = GENESIS if intact else (links[-1]["chain_hash"] if links else GENESIS)
    for ln in (links if intact else []) + appended:
        if ln["kind"] == "signoff" and ln["record_id"] in so_rows and not ln.get("new"):
            so = so_rows[ln["record_id"]]
            was_valid = _record_hash("signoff", so) == ln["record_hash"]
            old_seq = 0 if so["chain_head"] == GENESIS else seq_of_old.get(so["chain_head"])
            if old_seq is not None and (old_seq == 0 or old_seq in new_hash_of_seq):
                head = GENESIS if old_seq == 0 else new_hash_of_seq[old_seq]
                if head != so["chain_head"]:
                    conn.execute(signoffs.update().where(signoffs.c.id == so["id"])
                                 .values(chain_head=head))
                    so["chain_head"] = head
                    if was_valid:
                        ln["record_hash"] = _record_hash("signoff", so)
        ch = _link_hash(prev, ln["kind"], ln["record_id"], ln["record_hash"], ln["created_at"])
        new_hash_of_seq[ln["seq"]] = ch
        values = {"prev_hash": prev, "chain_hash": ch, "record_hash": ln["record_hash"]}
        if ln.get("new"):
            conn.execute(_CHAIN.insert().values(seq=ln["seq"], kind=ln["kind"],
                                                record_id=ln["record_id"],
                                                created_at=ln["created_at"], **values))
        else:
            conn.execute(_CHAIN.update().where(_CHAIN.c.seq == ln["seq"]).values(**values))
        prev = ch


def upgrade() -> None:
    op.create_table('result_batch',
    sa.Column('id', sa.Integer(), nullable=False),
    sa.Column('revision_id', sa.Integer(), nullable=False),
    sa.Column('results', sa.Integer(), nullable=False),
    sa.Column('subjects', sa.Text(), nullable=False),
    sa.Column('digest', sa.String(length=64), nullable=False),
    sa.Column('created_at', sa.DateTime(timezone=True), nullable=False),
    sa.ForeignKeyConstraint(['revision_id'], ['revision.id'], name=op.f('fk_result_batch_revision_id_revision'), ondelete='RESTRICT'),
    sa.PrimaryKeyConstraint('id', name=op.f('pk_result_batch'))
    )
    with op.batch_alter_table('result_batch', schema=None) as batch_op:
        batch_op.create_index(batch_op.f('ix_result_batch_revision_id'), ['revision_id'], unique=False)

    with op.batch_alter_table('metric_value', schema=None) as batch_op:
        batch_op.add_column(sa.Column('row_hash', sa.String(length=64), nullable=True))
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.add_column(sa.Column('batch_id', sa.Integer(), nullable=True))
        batch_op.add_column(sa.Column('row_hash', sa.String(length=64), nullable=True))

    conn = op.get_bind()
    _backfill_results(conn)
    _relink(conn)

    with op.batch_alter_table('metric_value', schema=None) as batch_op:
        batch_op.alter_column('row_hash', existing_type=sa.String(length=64), nullable=False)
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.alter_column('batch_id', existing_type=sa.Integer(), nullable=False)
        batch_op.alter_column('row_hash', existing_type=sa.String(length=64), nullable=False)
        batch_op.create_index(batch_op.f('ix_result_batch_id'), ['batch_id'], unique=False)
        batch_op.create_foreign_key(batch_op.f('fk_result_batch_id_result_batch'), 'result_batch', ['batch_id'], ['id'], ondelete='RESTRICT')


def downgrade() -> None:
    with op.batch_alter_table('result', schema=None) as batch_op:
        batch_op.drop_constraint(batch_op.f('fk_result_batch_id_result_batch'), type_='foreignkey')
        batch_op.drop_index(batch_op.f('ix_result_batch_id'))
        batch_op.drop_column('row_hash')
        batch_op.drop_column('batch_id')
    with op.batch_alter_table('metric_value', schema=None) as batch_op:
        batch_op.drop_column('row_hash')
    with op.batch_alter_table('result_batch', schema=None) as batch_op:
        batch_op.drop_index(batch_op.f('ix_result_batch_revision_id'))
    op.drop_table('result_batch')
    # the chain keeps the links of this schema's rule; 0004's audit would name them
    op.execute("DELETE FROM chain_link WHERE kind IN "
               "('plant', 'plant_version', 'loop', 'requirement', 'result_batch')")
