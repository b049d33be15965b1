"""The audit's checks over one session (:class:`Checker`); the report and the whole-ledger
audit are :mod:`ledger.audit`, which documents every finding."""

from __future__ import annotations

import math

from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Iterable

from sqlalchemy import select

from .chain import (
    CHAINED_KINDS,
    GENESIS,
    baseline_entries,
    batch_digest,
    chained_table,
    content_of,
    float_columns,
    link_hash,
    metric_row_hash,
    result_row_hash,
)
from ..hashing import sha256_of
from ..validate import model_canonical, plant_content_hash, requirement_hash, revision_hash
from .baselines import frozen_matrix_hash
from .queries import chunks
from .models import (
    Baseline,
    BaselineEntry,
    ChainLink,
    Loop,
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

__all__ = ["PROBLEMS", "COVERED", "Finding", "Checker"]

PROBLEMS = ("link altered", "record altered", "record deleted", "record inserted",
            "baseline altered", "sign-off mismatch")
#: Record kinds the audit counts and checks, in the order it reports them.
COVERED = CHAINED_KINDS + ("result", "metric_value")
_STREAM = {"yield_per": 2000}


@dataclass(frozen=True)
class Finding:
    """One problem found.

    Attributes
    ----------
    problem : str
        One of :data:`PROBLEMS`.
    kind : str
        Record kind (one of :data:`COVERED`) or ``chain_link``.
    record_id : int, str or None
        Primary key of the record (the sequence number for a chain link, the key for a metric
        value; ``None`` for a deleted result, which is named by its label).
    detail : str
        One line saying what differs.
    label : str
        The record as a person names it (``x/r2``, ``PZ-1 v3``, ``pz v1``), when known.
    """

    problem: str
    kind: str
    record_id: int | str | None
    detail: str
    label: str = ""

    def __str__(self) -> str:
        rid = "" if self.record_id is None else f" {self.record_id}"
        label = f" ({self.label})" if self.label else ""
        return f"{self.problem}: {self.kind}{rid}{label}: {self.detail}"


def _chunks(ids: Iterable):
    return chunks(sorted(set(ids)))


def _aware_iso(dt: datetime) -> str:
    """The form revision content hashes take their time from (``datetime.isoformat`` in UTC)."""
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.astimezone(timezone.utc).isoformat()


class Checker:
    """The audit's checks over one session, usable on the whole ledger or on chosen records
    (sign-off uses the latter); findings accumulate in :attr:`findings`."""

    def __init__(self, s):
        self.s = s
        self.findings: list[Finding] = []
        self.links: list = []
        self.newest: dict[tuple[str, int], object] = {}
        self._labels: dict[str, dict] | None = None
        self.altered: set[tuple[str, object]] = set()
        #: metric keys of the results checked for chosen revisions
        self.metric_keys: set[str] = set()

    # -- naming --------------------------------------------------------------------------
    def labels(self) -> dict[str, dict]:
        if self._labels is None:
            s = self.s
            plants = dict(s.execute(select(Plant.id, Plant.name)).all())
            loops = dict(s.execute(select(Loop.id, Loop.name)).all())
            reqs = dict(s.execute(select(Requirement.id, Requirement.key)).all())
            revs = {i: f"{loops.get(lid, '?')}/{lbl}" for i, lid, lbl in
                    s.execute(select(Revision.id, Revision.loop_id, Revision.label))}
            self._labels = {
                "plant": plants, "loop": loops, "requirement": reqs, "revision": revs,
                "plant_version": {i: f"{plants.get(p, '?')} v{n}" for i, p, n in s.execute(
                    select(PlantVersion.id, PlantVersion.plant_id, PlantVersion.number))},
                "requirement_version": {i: f"{reqs.get(r, '?')} v{n}" for i, r, n in s.execute(
                    select(RequirementVersion.id, RequirementVersion.requirement_id,
                           RequirementVersion.number))},
                "baseline": dict(s.execute(select(Baseline.id, Baseline.name)).all()),
                "result_batch": {i: f"results of {revs.get(r, '?')}" for i, r in s.execute(
                    select(ResultBatch.id, ResultBatch.revision_id))},
            }
            bases = self._labels["baseline"]
            self._labels["waiver"] = {
                i: f"{reqs.get(q, '?')} on " + (revs.get(r, '?') if r is not None
                                                else f"baseline {bases.get(b, '?')}")
                for i, q, r, b in s.execute(select(Waiver.id, Waiver.requirement_id,
                                                   Waiver.revision_id, Waiver.baseline_id))}
            self._labels["waiver_withdrawal"] = {
                i: f"of waiver {w}" for i, w in s.execute(
                    select(WaiverWithdrawal.id, WaiverWithdrawal.waiver_id))}
            self._labels["signoff"] = {i: f"{n}, baseline {self._labels['baseline'].get(b, '?')}"
                                       for i, n, b in s.execute(select(Signoff.id, Signoff.name,
                                                                       Signoff.baseline_id))}
        return self._labels

    def label(self, kind: str, rid) -> str:
        return str(self.labels().get(kind, {}).get(rid, ""))

    def result_label(self, revision_id, rv_id, pv_id) -> str:
        lab = self.labels()
        return (f"{lab['revision'].get(revision_id, '?')} "
                f"{lab['requirement_version'].get(rv_id, '?')} "
                f"on {lab['plant_version'].get(pv_id, '?')}")

    def add(self, problem: str, kind: str, rid, detail: str, label: str | None = None) -> None:
        if label is None:
            label = self.label(kind, rid) if rid is not None else ""
        if problem == "record altered":
            self.altered.add((kind, rid))
        self.findings.append(Finding(problem, kind, rid, detail, label))

    def _altered(self, kind: str, rid) -> bool:
        """Already named altered (a content-hash finding on top would say nothing new)."""
        return (kind, rid) in self.altered

    # -- the chain -----------------------------------------------------------------------
    def chain(self) -> None:
        """Every link: sequence, previous-link hash and its own hash (time stamp included)."""
        c = ChainLink.__table__
        self.links = self.s.execute(select(c).order_by(c.c.seq)).all()
        expected_prev, expected_seq = GENESIS, 1
        for ln in self.links:
            where = f"{ln.kind} {ln.record_id}"
            if ln.seq != expected_seq:
                self.add("link altered", "chain_link", ln.seq,
                         f"sequence jumps from {expected_seq - 1} to {ln.seq} "
                         "(links removed or renumbered)", where)
            if ln.prev_hash != expected_prev:
                self.add("link altered", "chain_link", ln.seq,
                         "previous-link hash does not match the link before it", where)
            if link_hash(ln.prev_hash, ln.kind, ln.record_id, ln.record_hash,
                         ln.created_at) != ln.chain_hash:
                self.add("link altered", "chain_link", ln.seq,
                         "chain hash is not the hash of its fields and time stamp", where)
            if ln.kind not in CHAINED_KINDS:
                self.add("link altered", "chain_link", ln.seq,
                         f"unknown record kind {ln.kind!r}", where)
            expected_prev, expected_seq = ln.chain_hash, ln.seq + 1
            self.newest[(ln.kind, ln.record_id)] = ln

    @property
    def head(self) -> str:
        return self.links[-1].chain_hash if self.links else GENESIS

    # -- chained records -----------------------------------------------------------------
    def _children(self, kind: str, ids: list[int] | None) -> dict[int, dict]:
        s = self.s
        out: dict[int, dict] = {}
        if kind != "requirement_version":
            return out
        for model, col, key in ((RequirementParent, RequirementParent.parent_id, "parents"),
                                (RequirementLoop, RequirementLoop.loop_id, "loops")):
            q = select(model.version_id, col)
            parts = [q] if ids is None else [q.where(model.version_id.in_(ch))
                                             for ch in _chunks(ids)]
            for part in parts:
                for vid, other in s.execute(part):
                    out.setdefault(vid, {"parents": [], "loops": []})[key].append(other)
        for v in out.values():
            v["parents"].sort()
            v["loops"].sort()
        return out

    def records(self, kind: str, ids: Iterable[int] | None = None) -> int:
        """Recompute the record hash of every row of ``kind`` (or of ``ids``) against its
        newest link; name rows without a link and links without a row.  Returns the count."""
        s = self.s
        table = chained_table(kind)
        floats = float_columns(kind)
        ids = None if ids is None else sorted(set(ids))
        children = self._children(kind, ids)
        empty = {"parents": [], "loops": []} if kind == "requirement_version" else {}
        queries = ([select(table).order_by(table.c.id)] if ids is None else
                   [select(table).where(table.c.id.in_(ch)).order_by(table.c.id)
                    for ch in _chunks(ids)])
        seen: set[int] = set()
        for q in queries:
            for row in s.execute(q, execution_options=_STREAM).mappings():
                rid = row["id"]
                seen.add(rid)
                kids = children.get(rid, empty)
                if kind == "baseline":
                    kids = {"entries": baseline_entries(s, rid)}
                ln = self.newest.get((kind, rid))
                if ln is None:
                    self.add("record inserted", kind, rid,
                             "row has no chain link (written outside the ledger, or its link "
                             "was removed)")
                elif sha256_of(content_of(kind, row, kids, floats)) != ln.record_hash:
                    self.add("record altered", kind, rid,
                             f"content differs from chain link {ln.seq}")
        linked = {rid for (k, rid) in self.newest if k == kind}
        if ids is not None:
            linked &= set(ids)
        for rid in sorted(linked - seen):
            self.add("record deleted", kind, rid,
                     f"chain link {self.newest[(kind, rid)].seq} names a row that no longer "
                     "exists", "")
        return len(seen)

    # -- results, batches, metric values --------------------------------------------------
    def results(self, revision_ids: Iterable[int] | None = None) -> int:
        """Recompute every result's row hash and check each batch: the subjects it wrote, the
        revision, and its digest over the stored row hashes of its results and of the metric
        values they were judged from.  One streaming pass in batch order.  Returns the
        number of results checked."""
        s = self.s
        r, mv, bt = Result.__table__, MetricValue.__table__, ResultBatch.__table__
        if revision_ids is None:
            batch_q = [select(bt)]
            result_q = [select(r, mv.c.row_hash.label("mv_hash"))
                        .outerjoin(mv, mv.c.key == r.c.metric_key)
                        .order_by(r.c.batch_id, r.c.id)]
        else:
            chunks = list(_chunks(revision_ids))
            batch_q = [select(bt).where(bt.c.revision_id.in_(ch)) for ch in chunks]
            result_q = [select(r, mv.c.row_hash.label("mv_hash"))
                        .outerjoin(mv, mv.c.key == r.c.metric_key)
                        .where(r.c.revision_id.in_(ch)).order_by(r.c.batch_id, r.c.id)
                        for ch in chunks]
        batches = {row.id: row for q in batch_q for row in s.execute(q)}
        seen_batches: set[int] = set()
        n = 0
        for q in result_q:
            group: list = []
            for row in s.execute(q, execution_options=_STREAM):
                n += 1
                if revision_ids is not None:
                    self.metric_keys.add(row.metric_key)
                if group and row.batch_id != group[0].batch_id:
                    self._batch(group, batches, seen_batches)
                    group = []
                group.append(row)
            if group:
                self._batch(group, batches, seen_batches)
        for bid in sorted(set(batches) - seen_batches):
            self._batch([], batches, seen_batches, bid)
        return n

    def _batch(self, members: list, batches: dict, seen: set, bid: int | None = None) -> None:
        bid = members[0].batch_id if members else bid
        batch = batches.get(bid)
        if batch is None and bid is not None and bid not in seen:
            batch = self.s.execute(select(ResultBatch.__table__).where(
                ResultBatch.__table__.c.id == bid)).first()
            if batch is not None:
                batches[bid] = batch
        seen.add(bid)
        for m in members:
            if result_row_hash(m._mapping) != m.row_hash and not _signed_zero_match(m):
                self.add("record altered", "result", m.id, "content differs from its row hash",
                         self.result_label(m.revision_id, m.requirement_version_id,
                                           m.plant_version_id))
        if batch is None:
            for m in members:
                self.add("record inserted", "result", m.id,
                         f"its result batch {bid} does not exist (written outside the ledger)",
                         self.result_label(m.revision_id, m.requirement_version_id,
                                           m.plant_version_id))
            return
        own = []
        for m in members:
            if m.revision_id != batch.revision_id:
                self.add("record altered", "result", m.id,
                         f"points at revision {self.label('revision', m.revision_id) or '?'}, "
                         f"but its result batch {bid} was written for "
                         f"{self.label('revision', batch.revision_id) or '?'} (link re-pointed)",
                         self.result_label(m.revision_id, m.requirement_version_id,
                                           m.plant_version_id))
            else:
                own.append(m)
        wrote = set(batch.subjects.split(",")) if batch.subjects else set()
        have = {f"{m.requirement_version_id}:{m.plant_version_id}": m for m in own}
        problems = False
        for subj in sorted(wrote - set(have)):
            rv, pv = (int(x) for x in subj.split(":"))
            self.add("record deleted", "result", None,
                     f"written in result batch {bid}, no longer in it (deleted or re-pointed)",
                     self.result_label(batch.revision_id, rv, pv))
            problems = True
        for subj in sorted(set(have) - wrote):
            m = have[subj]
            self.add("record inserted", "result", m.id,
                     f"not among the results result batch {bid} wrote",
                     self.result_label(m.revision_id, m.requirement_version_id,
                                       m.plant_version_id))
            problems = True
        if not problems and len(own) == len(members) and members:
            digest = batch_digest([m.row_hash for m in members],
                                  {m.metric_key: m.mv_hash for m in members})
            if digest != batch.digest:
                self.add("record altered", "result_batch", bid,
                         "the stored row hashes of its results or of the metric values they "
                         "were judged from do not give its digest (rewritten with recomputed "
                         "hashes)")

    def metric_values(self, keys: Iterable[str] | None = None) -> int:
        """Recompute every cached metric value's row hash (or those of ``keys``); for the
        whole cache, also name rows no result was judged from and metric values results were
        judged from that are gone."""
        s = self.s
        mv, r = MetricValue.__table__, Result.__table__
        n = 0
        queries = ([select(mv).order_by(mv.c.key)] if keys is None else
                   [select(mv).where(mv.c.key.in_(ch)) for ch in _chunks(keys)])
        for q in queries:
            for row in s.execute(q, execution_options=_STREAM).mappings():
                n += 1
                if metric_row_hash(row) != row["row_hash"]:
                    self.add("record altered", "metric_value", row["key"],
                             "content differs from its row hash", row["metric"])
        if keys is not None:
            return n
        for (key,) in s.execute(select(mv.c.key).except_(select(r.c.metric_key))):
            self.add("record inserted", "metric_value", key,
                     "no result was judged from this cached metric value (inserted outside "
                     "the ledger, or the results judged from it were deleted)")
        for (key,) in s.execute(select(r.c.metric_key).except_(select(mv.c.key))):
            self.add("record deleted", "metric_value", key,
                     "results were judged from this metric value; it is gone")
        return n

    # -- baselines and sign-offs ----------------------------------------------------------
    def baselines(self, ids: Iterable[int] | None = None) -> None:
        q = select(Baseline).order_by(Baseline.id)
        if ids is not None:
            q = q.where(Baseline.id.in_(list(ids)))
        for b in self.s.scalars(q):
            if frozen_matrix_hash(self.s, b.id) != b.matrix_hash:
                self.add("baseline altered", "baseline", b.id,
                         "frozen entries do not give its matrix hash", b.name)

    def signoffs(self) -> int:
        s = self.s
        seq_of = {ln.chain_hash: ln.seq for ln in self.links}
        own_seq = {rid: ln.seq for (k, rid), ln in self.newest.items() if k == "signoff"}
        rows = s.scalars(select(Signoff).order_by(Signoff.id)).all()
        for so in rows:
            if s.get(Baseline, so.baseline_id) is None:
                self.add("sign-off mismatch", "signoff", so.id, "its baseline no longer exists")
                continue
            if frozen_matrix_hash(s, so.baseline_id) != so.matrix_hash:
                self.add("sign-off mismatch", "signoff", so.id,
                         "matrix hash differs from the baseline's frozen entries")
            head_seq = 0 if so.chain_head == GENESIS else seq_of.get(so.chain_head)
            mine = own_seq.get(so.id)
            if head_seq is None or (mine is not None and head_seq >= mine):
                self.add("sign-off mismatch", "signoff", so.id,
                         "recorded chain head is not a link before the sign-off")
        return len(rows)

    # -- content hashes the frozen matrix carries (sign-off) ------------------------------
    def content_hashes(self, revision_ids=None, rv_ids=None, pv_ids=None, *,
                       parse: bool = False) -> None:
        """Recompute the ``content_hash`` column of revisions, requirement versions and plant
        versions from their rows (the hashes a baseline's matrix freezes); all of them, or the
        ids given.  ``parse`` also checks that the stored canonical forms are those of the
        model and controller texts (the model parser; used by sign-off on what it freezes)."""
        s = self.s
        lab = self.labels()

        def rows(model, ids):
            if ids is None:
                yield from s.execute(select(model).order_by(model.id),
                                     execution_options=_STREAM).scalars()
                return
            for ch in _chunks(ids):
                yield from s.scalars(select(model).where(model.id.in_(ch)))

        for pv in rows(PlantVersion, pv_ids):
            h = plant_content_hash(pv)  # the one rule (parameters read in canonical order)
            if self._altered("plant_version", pv.id):
                continue
            if h != pv.content_hash:
                self.add("record altered", "plant_version", pv.id,
                         "content hash does not match its model and parameters")
            elif parse and self._canonical_differs(model_canonical, pv.model_text,
                                                   pv.sample_time, pv.canonical):
                self.add("record altered", "plant_version", pv.id,
                         "canonical form does not match its model text")
        kids = self._children("requirement_version", None if rv_ids is None else list(rv_ids))
        for v in rows(RequirementVersion, rv_ids):
            k = kids.get(v.id, {"parents": [], "loops": []})
            fields = {f: getattr(v, f) for f in (
                "title", "statement", "rationale", "method", "status", "metric",
                "settings_json", "comparator", "limit_value", "limit_text")}
            fields["parents"] = sorted(lab["requirement"].get(p, "?") for p in k["parents"])
            fields["loops"] = sorted(lab["loop"].get(x, "?") for x in k["loops"])
            if self._altered("requirement_version", v.id):
                continue
            if requirement_hash(fields) != v.content_hash:
                self.add("record altered", "requirement_version", v.id,
                         "content hash does not match its statement, limit and trace")
        revs = list(rows(Revision, revision_ids))
        parent_ids = {r.parent_id for r in revs if r.parent_id is not None}
        parents = {r.id: r.content_hash for r in revs}
        for ch in _chunks(parent_ids - set(parents)):
            parents.update(s.execute(select(Revision.id, Revision.content_hash)
                                     .where(Revision.id.in_(ch))).all())
        loop_dt = {}
        if parse:
            loop_dt = dict(s.execute(select(Loop.id, Loop.sample_time)).all())
        for rv in revs:
            h = revision_hash(
                loop=lab["loop"].get(rv.loop_id, "?"), label=rv.label,
                controller_canonical=rv.controller_canonical,
                parent_hash=parents.get(rv.parent_id) if rv.parent_id else None,
                rationale=rv.rationale, author=rv.author,
                created_at_iso=_aware_iso(rv.created_at),
                prefilter_canonical=rv.prefilter_canonical or "",
                anti_windup=rv.anti_windup or "none", anti_windup_gain=rv.anti_windup_gain,
                discretization=rv.discretization, number_format=rv.number_format,
                verified_text=rv.verified_text)
            if self._altered("revision", rv.id):
                continue
            if h != rv.content_hash:
                self.add("record altered", "revision", rv.id,
                         "content hash does not match its controller, parent and rationale")
            elif parse and self._canonical_differs(model_canonical, rv.controller_text,
                                                   loop_dt.get(rv.loop_id),
                                                   rv.controller_canonical):
                self.add("record altered", "revision", rv.id,
                         "canonical form does not match its controller text")
            elif parse and rv.prefilter_text and self._canonical_differs(
                    model_canonical, rv.prefilter_text, loop_dt.get(rv.loop_id),
                    rv.prefilter_canonical):
                self.add("record altered", "revision", rv.id,
                         "canonical form does not match its prefilter text")

    @staticmethod
    def _canonical_differs(canonical_of, text_: str, sample_time, stored: str) -> bool:
        from ..errors import LedgerError

        try:
            return canonical_of(text_, what="audit", sample_time=sample_time) != stored
        except LedgerError:
            return True

    def frozen(self, baseline_id: int) -> None:
        """Everything a baseline freezes: the chain, the baseline record, its revisions (and
        their loops), requirement versions (and requirements), plant versions (and plants),
        the results of its revisions with their metric values and batches, and the content
        hashes its matrix carries."""
        s = self.s
        self.chain()
        e = BaselineEntry.__table__
        rev_ids, rv_ids, pv_ids = set(), set(), set()
        for rid, rv, pv in s.execute(select(e.c.revision_id, e.c.requirement_version_id,
                                            e.c.plant_version_id)
                                     .where(e.c.baseline_id == baseline_id)):
            rev_ids.add(rid)
            pv_ids.add(pv)
            if rv is not None:
                rv_ids.add(rv)
        loop_ids = {x for ch in _chunks(rev_ids) for x in s.scalars(
            select(Revision.loop_id).where(Revision.id.in_(ch)))}
        req_ids = {x for ch in _chunks(rv_ids) for x in s.scalars(
            select(RequirementVersion.requirement_id).where(RequirementVersion.id.in_(ch)))}
        plant_ids = {x for ch in _chunks(pv_ids) for x in s.scalars(
            select(PlantVersion.plant_id).where(PlantVersion.id.in_(ch)))}
        self.records("baseline", [baseline_id])
        self.baselines([baseline_id])
        for kind, ids in (("plant", plant_ids), ("plant_version", pv_ids), ("loop", loop_ids),
                          ("requirement", req_ids), ("requirement_version", rv_ids),
                          ("revision", rev_ids)):
            self.records(kind, ids)
        batch_ids = {x for ch in _chunks(rev_ids) for x in s.scalars(
            select(ResultBatch.id).where(ResultBatch.revision_id.in_(ch)))}
        self.records("result_batch", batch_ids)
        self.results(rev_ids)
        self.metric_values(self.metric_keys)
        self.content_hashes(rev_ids, rv_ids, pv_ids, parse=True)


def _signed_zero_match(m) -> bool:
    """True when the row hash matches once zero fields are read as -0.0: ledgers written
    before zeros were stored with one sign hashed a computed -0.0 that SQLite hands back as 0.0
    (the sign of a zero carries no result; ``ledger.store.results.cap``)."""
    from itertools import product

    row = dict(m._mapping)
    zeros = [k for k in ("value", "headroom", "headroom_fraction", "pass_fraction")
             if row.get(k) is not None and row[k] == 0]
    for signs in product((0.0, -0.0), repeat=len(zeros)):
        if any(math.copysign(1.0, z) < 0 for z in signs):
            trial = dict(row, **dict(zip(zeros, signs)))
            if result_row_hash(trial) == m.row_hash:
                return True
    return False
