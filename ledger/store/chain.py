"""The append-only hash chain over the ledger's records, and the content hashes of results.

Every plant, plant version, loop, requirement, requirement version (with its trace parents and
loops), revision, result batch, baseline (with its frozen entries), sign-off, loop spectrum,
waiver and waiver withdrawal gets one link,
appended in the same transaction as the record:

* ``record_hash`` = SHA-256 of the record's canonical content (:func:`record_content`): the
  columns listed in :data:`HASHED_FIELDS` plus the record's child rows;
* ``chain_hash`` = SHA-256 of ``prev_hash : kind : record_id : record_hash : created_at``,
  where ``prev_hash`` is the ``chain_hash`` of the previous link (:data:`GENESIS` for the
  first) and ``created_at`` the link's own time stamp (UTC, ``YYYY-MM-DD HH:MM:SS.ffffff``).

Results are written in large numbers, so they are not chained one by one: each result row
carries ``row_hash`` (:func:`result_row_hash`, every column but ``id`` and ``batch_id``), each
cached metric value ``row_hash`` (:func:`metric_row_hash`), and every write of results is one
chained :class:`~ledger.store.models.ResultBatch` naming the subjects it wrote and a digest of
their row hashes and of the row hashes of the metric values they were judged from
(:func:`batch_digest`).  The audit recomputes all of it, so an edited, deleted, inserted or
re-pointed result is named.

Writers are serialised: SQLite transactions of the ledger start with ``BEGIN IMMEDIATE``; on
PostgreSQL :func:`append_link` takes a transaction-level advisory lock before reading the chain
head.  The audit (``ledger.audit``) recomputes all of this.

The field lists are fixed on purpose: a later schema change to a chained table must decide
explicitly whether the new column joins the hash (and then re-link existing rows in its
migration), instead of silently invalidating every existing link.
"""

from __future__ import annotations

import hashlib
import json
import math
from json.encoder import encode_basestring as _encode_str
from datetime import datetime, timezone
from typing import Any, Iterable, Mapping

from sqlalchemy import Float, insert, select, text
from sqlalchemy.orm import Session

from ..errors import IntegrityViolation
from ..hashing import sha256_of
from .queries import in_chunks
from .models import (
    Baseline,
    BaselineEntry,
    ChainLink,
    Loop,
    LoopSpectrum,
    MetricValue,
    Plant,
    PlantVersion,
    Requirement,
    RequirementLoop,
    RequirementParent,
    RequirementVersion,
    Result,
    ResultBatch,
    Revision,
    Signoff,
    Waiver,
    WaiverWithdrawal,
)

__all__ = [
    "GENESIS",
    "ADVISORY_LOCK_KEY",
    "HASHED_FIELDS",
    "CHAINED_KINDS",
    "chained_table",
    "record_content",
    "record_hash",
    "link_hash",
    "chain_head",
    "append_link",
    "RESULT_FIELDS",
    "RESULT_OPTIONAL_FIELDS",
    "METRIC_FIELDS",
    "result_row_hash",
    "metric_row_hash",
    "batch_digest",
    "subjects_text",
    "append_results",
]

#: ``prev_hash`` of the first link.
GENESIS = "0" * 64
#: Key of the PostgreSQL transaction-level advisory lock that serialises chain writers.
ADVISORY_LOCK_KEY = 0x6C6C_6368_6169_6E  # fits a signed 64-bit integer

#: Columns of each chained table that enter its record hash (frozen; see the module note).
HASHED_FIELDS: dict[str, tuple[str, ...]] = {
    "plant": ("id", "name", "description", "created_at"),
    "plant_version": ("id", "plant_id", "number", "model_text", "canonical", "sample_time",
                      "parameters_json", "fidelity_json", "samples", "seed", "input_unit",
                      "output_unit", "note", "author", "content_hash", "created_at"),
    "loop": ("id", "name", "plant_id", "kind", "description", "sensor_text", "prefilter_text",
             "input_delay", "output_delay", "sample_time", "computation_delay",
             "actuator_limit", "created_at"),
    "requirement": ("id", "key", "created_at"),
    "requirement_version": ("id", "requirement_id", "number", "title", "statement", "rationale",
                            "method", "status", "metric", "settings_json", "comparator",
                            "limit_value", "limit_text", "author", "note", "content_hash",
                            "created_at"),
    "revision": ("id", "loop_id", "label", "seq", "parent_id", "author", "rationale",
                 "controller_text", "controller_canonical", "content_hash", "created_at"),
    "result_batch": ("id", "revision_id", "results", "subjects", "digest", "created_at"),
    "baseline": ("id", "name", "note", "author", "supersedes_id", "matrix_hash", "created_at"),
    "signoff": ("id", "baseline_id", "name", "role", "statement", "author", "matrix_hash",
                "chain_head", "signed_at"),
    "loop_spectrum": ("id", "loop_id", "source", "kind", "shaping_text", "intensity",
                      "table_json", "unit_text", "frequency_unit", "label", "content_hash",
                      "author", "created_at"),
    "waiver": ("id", "requirement_id", "revision_id", "baseline_id", "reason", "approver", "role",
               "expires_on", "condition", "author", "created_at"),
    "waiver_withdrawal": ("id", "waiver_id", "reason", "approver", "role", "author",
                          "created_at"),
}

#: Columns added after the chain existed (migrations 0008, 0010): they enter a record's content only
#: when they differ from the default given here, so every link made before stays valid.
OPTIONAL_HASHED_FIELDS: dict[str, dict[str, Any]] = {
    "loop": {"rate_limit": None},
    "revision": {"prefilter_text": "", "prefilter_canonical": "", "anti_windup": "none",
                 "anti_windup_gain": None},
    # migration 0010: what a sign-off accepted explicitly and the waivers it relied on
    "signoff": {"accepted_json": ""},
}

_TABLES = {
    "plant": Plant.__table__,
    "plant_version": PlantVersion.__table__,
    "loop": Loop.__table__,
    "requirement": Requirement.__table__,
    "revision": Revision.__table__,
    "result_batch": ResultBatch.__table__,
    "requirement_version": RequirementVersion.__table__,
    "baseline": Baseline.__table__,
    "signoff": Signoff.__table__,
    "loop_spectrum": LoopSpectrum.__table__,
    "waiver": Waiver.__table__,
    "waiver_withdrawal": WaiverWithdrawal.__table__,
}

#: Record kinds that carry chain links, in the order the audit reports them.
CHAINED_KINDS = tuple(HASHED_FIELDS)


def chained_table(kind: str):
    """The SQLAlchemy table holding records of ``kind`` (one of :data:`CHAINED_KINDS`)."""
    if kind not in _TABLES:
        raise IntegrityViolation(f"record kind {kind!r} is not chained; use one of {CHAINED_KINDS}")
    return _TABLES[kind]


def _norm(value: Any, *, is_float: bool) -> Any:
    """One column value in a form that survives a database round trip unchanged."""
    if isinstance(value, datetime):
        if value.tzinfo is not None:
            value = value.astimezone(timezone.utc).replace(tzinfo=None)
        return value.isoformat(sep=" ", timespec="microseconds")
    if is_float and value is not None:
        return float(value)
    return value


def float_columns(kind: str) -> frozenset[str]:
    """Hashed columns of ``kind`` stored as floating point (normalised to ``float``)."""
    table = chained_table(kind)
    return frozenset(n for n in HASHED_FIELDS[kind] if isinstance(table.c[n].type, Float))


def content_of(kind: str, row: Mapping, children: Mapping | None = None,
               floats: frozenset[str] | None = None) -> dict:
    """Canonical content of a chained record from its row (a mapping of column values) and,
    for requirement versions and baselines, its child rows (``parents``/``loops`` id lists or
    ``entries``)."""
    floats = float_columns(kind) if floats is None else floats
    content: dict[str, Any] = {"kind": kind, "fields": {
        name: _norm(row[name], is_float=name in floats) for name in HASHED_FIELDS[kind]}}
    for name, default in OPTIONAL_HASHED_FIELDS.get(kind, {}).items():
        value = row[name] if name in row else default
        if value is not None and value != default:
            content["fields"][name] = _norm(value, is_float=isinstance(value, float))
    for k, v in (children or {}).items():
        content[k] = v
    return content


def baseline_entries(s: Session, baseline_id: int) -> list[list]:
    """The frozen entries of a baseline as they enter its record content."""
    e = BaselineEntry.__table__
    return [
        [r.id, r.kind, r.revision_id, r.requirement_version_id, r.plant_version_id, r.data_json]
        for r in s.execute(select(e).where(e.c.baseline_id == baseline_id).order_by(e.c.id))
    ]


def record_content(s: Session, kind: str, record_id: int) -> dict | None:
    """Canonical content of one chained record as stored now, or ``None`` if the row is gone.

    Parameters
    ----------
    s : Session
        Any session; the rows are read through it (so unflushed ORM changes are flushed first).
    kind : str
        One of :data:`CHAINED_KINDS`.
    record_id : int
        Primary key of the record.
    """
    table = chained_table(kind)
    row = s.execute(select(table).where(table.c.id == record_id)).mappings().first()
    if row is None:
        return None
    children: dict[str, Any] = {}
    if kind == "requirement_version":
        children["parents"] = sorted(s.scalars(select(RequirementParent.parent_id).where(
            RequirementParent.version_id == record_id)).all())
        children["loops"] = sorted(s.scalars(select(RequirementLoop.loop_id).where(
            RequirementLoop.version_id == record_id)).all())
    elif kind == "baseline":
        children["entries"] = baseline_entries(s, record_id)
    return content_of(kind, row, children)


def record_hash(s: Session, kind: str, record_id: int) -> str | None:
    """SHA-256 (hex) of :func:`record_content`; ``None`` if the row does not exist."""
    content = record_content(s, kind, record_id)
    return None if content is None else sha256_of(content)


def stamp(value: datetime | None) -> str | None:
    """A time stamp as it enters a hash: UTC, ``YYYY-MM-DD HH:MM:SS.ffffff`` (the form that
    survives a round trip through either back end)."""
    return _norm(value, is_float=False)


def link_hash(prev_hash: str, kind: str, record_id: int, rec_hash: str,
              created_at: datetime | str) -> str:
    """``SHA-256(prev_hash : kind : record_id : record_hash : created_at)`` as 64 hex digits
    (``created_at`` as :func:`stamp` writes it)."""
    when = created_at if isinstance(created_at, str) else stamp(created_at)
    data = f"{prev_hash}:{kind}:{int(record_id)}:{rec_hash}:{when}".encode("utf-8")
    return hashlib.sha256(data).hexdigest()


def chain_head(s: Session) -> str:
    """``chain_hash`` of the newest link, or :data:`GENESIS` for an empty chain."""
    head = s.scalar(select(ChainLink.chain_hash).order_by(ChainLink.seq.desc()).limit(1))
    return head or GENESIS


def lock(s: Session) -> None:
    """Serialise with every chain writer, sign-offs and result writes (PostgreSQL advisory
    lock held to the end of the transaction; SQLite writers are serialised already)."""
    if s.get_bind().dialect.name == "postgresql":
        s.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": ADVISORY_LOCK_KEY})
    # SQLite: the ledger's write transactions begin IMMEDIATE, which already serialises them.


def append_link(s: Session, kind: str, row: Any) -> ChainLink:
    """Append the link of a freshly flushed record ``row`` (same transaction).

    Parameters
    ----------
    s : Session
        The write session that inserted ``row``.
    kind : str
        One of :data:`CHAINED_KINDS`.
    row
        The ORM object (its ``id`` must be assigned, i.e. flushed).

    Returns
    -------
    ChainLink
        The new link (flushed).
    """
    if getattr(row, "id", None) is None:
        raise IntegrityViolation(f"{kind} record must be flushed before it is chained")
    s.flush()
    lock(s)
    head = s.execute(select(ChainLink.seq, ChainLink.chain_hash)
                     .order_by(ChainLink.seq.desc()).limit(1)).first()
    seq, prev = (head.seq + 1, head.chain_hash) if head else (1, GENESIS)
    rh = record_hash(s, kind, row.id)
    if rh is None:
        raise IntegrityViolation(f"{kind} {row.id} is not in the database; cannot chain it")
    now = datetime.now(timezone.utc)
    link = ChainLink(seq=seq, kind=kind, record_id=row.id, record_hash=rh, prev_hash=prev,
                     chain_hash=link_hash(prev, kind, row.id, rh, now), created_at=now)
    s.add(link)
    s.flush()
    return link


# -- results: per-row content hashes and chained write batches ------------------------------
#: Columns of a result that enter its row hash (all but ``id``, ``batch_id`` and ``row_hash``;
#: membership in a batch is checked through the batch's subjects and digest).
RESULT_FIELDS = ("revision_id", "requirement_version_id", "plant_version_id", "verdict", "value",
                 "headroom", "headroom_fraction", "worst_variant", "pass_fraction", "variants",
                 "reason", "metric_key", "engine_version", "created_at")
#: Columns appended to a result's row hash only when set (sample counts, migration
#: 0012_yield), so rows recorded before them keep their hashes.
RESULT_OPTIONAL_FIELDS = ("samples", "sample_passes")
#: Columns of a cached metric value that enter its row hash.
METRIC_FIELDS = ("key", "metric", "values_json", "engine_version", "created_at")


_LAST_STAMP: tuple = (None, None)  # (time, its stamp): a batch's rows share one time


def result_row_hash(row: Mapping) -> str:
    """SHA-256 (hex) of one result row's content: the compact JSON list (``json.dumps`` with
    ``separators=(",", ":")``, ``ensure_ascii=False``) of :data:`RESULT_FIELDS` in that order;
    floats as shortest round-trip decimals, NaN as null, the time as :func:`stamp`; then, only
    when ``samples`` is set, :data:`RESULT_OPTIONAL_FIELDS`."""
    global _LAST_STAMP
    when, last = row["created_at"], _LAST_STAMP  # one tuple read: safe across threads
    if last[0] is None or last[0] != when:
        last = _LAST_STAMP = (when, stamp(when))
    data = (f"[{_int(row['revision_id'])},{_int(row['requirement_version_id'])},"
            f"{_int(row['plant_version_id'])},{_str(row['verdict'])},{_flt(row['value'])},"
            f"{_flt(row['headroom'])},{_flt(row['headroom_fraction'])},"
            f"{_str(row['worst_variant'])},{_flt(row['pass_fraction'])},"
            f"{_int(row['variants'])},{_str(row['reason'])},{_str(row['metric_key'])},"
            f"{_str(row['engine_version'])},{_str(last[1])}")
    if row.get("samples") is not None:
        data += f",{_int(row['samples'])},{_int(row.get('sample_passes'))}"
    data += "]"
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def _int(v: Any) -> str:
    return "null" if v is None else int.__repr__(int(v))


def _str(v: Any) -> str:
    return "null" if v is None else _encode_str(v)


def _flt(v: Any) -> str:
    if v is None:
        return "null"
    v = float(v)
    if v - v == 0.0:  # finite
        return float.__repr__(v)
    if v != v:
        return "null"  # NaN: SQLite stores it as NULL
    raise ValueError("an infinite value cannot be hashed; results store the cap")


def metric_row_hash(row: Mapping) -> str:
    """SHA-256 (hex) of one cached metric value's content (:data:`METRIC_FIELDS`)."""
    vals = [stamp(row[f]) if f == "created_at" else row[f] for f in METRIC_FIELDS]
    data = json.dumps(vals, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def subjects_text(pairs: Iterable[tuple[int, int]]) -> str:
    """``"rv:pv,rv:pv,..."`` of (requirement version id, plant version id) pairs, sorted."""
    return ",".join(f"{a}:{b}" for a, b in sorted(pairs))


def batch_digest(row_hashes: Iterable[str], metric_hashes: Mapping[str, str | None]) -> str:
    """SHA-256 (hex) over a batch's result row hashes (sorted) and the (key, row hash) of each
    metric value its results were judged from (sorted by key; ``None`` when missing)."""
    data = json.dumps({"results": sorted(row_hashes),
                       "metric_values": [[k, metric_hashes[k]] for k in sorted(metric_hashes)]},
                      separators=(",", ":"), sort_keys=True)
    return hashlib.sha256(data.encode("utf-8")).hexdigest()


def append_results(s: Session, revision_id: int, rows: list[dict],
                   metric_rows: list[dict]) -> ResultBatch | None:
    """Write one batch of results of ``revision_id`` (and the cache rows of metric values
    computed for them) in the caller's transaction, chained as one ``result_batch`` link.

    Subjects that already have a result (another writer got there first) are skipped, and so
    are cache rows already present or not used by the results written.  Returns the batch, or
    ``None`` when nothing was left to write.

    Parameters
    ----------
    rows : list of dict
        Result column values (:data:`RESULT_FIELDS`); ``revision_id`` must be ``revision_id``.
    metric_rows : list of dict
        Cache rows (``key, metric, values_json, engine_version, created_at``).
    """
    lock(s)  # serialise with every chain writer and sign-offs (PostgreSQL)
    r = Result.__table__
    done = set(s.execute(select(r.c.requirement_version_id, r.c.plant_version_id,
                                r.c.engine_version)
                         .where(r.c.revision_id == revision_id)).all())
    rows = [dict(x) for x in rows
            if (x["requirement_version_id"], x["plant_version_id"], x["engine_version"])
            not in done]
    if not rows:
        return None
    used = sorted({x["metric_key"] for x in rows})
    mv = MetricValue.__table__
    stored: dict[str, str] = dict(in_chunks(
        s, lambda ch: select(mv.c.key, mv.c.row_hash).where(mv.c.key.in_(ch)), used))
    fresh = []
    for m in metric_rows:
        if m["key"] in used and m["key"] not in stored:
            m = dict(m, row_hash=metric_row_hash(m))
            stored[m["key"]] = m["row_hash"]
            fresh.append(m)
    if fresh:
        s.execute(insert(mv), fresh)
    for x in rows:
        x["row_hash"] = result_row_hash(x)
    batch = ResultBatch(
        revision_id=revision_id, results=len(rows),
        subjects=subjects_text((x["requirement_version_id"], x["plant_version_id"]) for x in rows),
        digest=batch_digest([x["row_hash"] for x in rows], {k: stored.get(k) for k in used}),
        created_at=datetime.now(timezone.utc))
    s.add(batch)
    s.flush()
    for x in rows:
        x["batch_id"] = batch.id
    s.execute(insert(r), rows)
    append_link(s, "result_batch", batch)
    return batch
