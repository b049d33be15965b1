"""The audit: recompute every record hash and the whole hash chain, and every sign-off's matrix.

Findings, one per problem:

* ``link altered`` - a chain link's stored ``chain_hash`` is not the hash of its own fields, or
  its ``prev_hash`` is not the previous link's ``chain_hash`` (a link edited, removed or
  inserted), or its sequence number skips;
* ``record altered`` - the row's content no longer gives the record hash of its newest link;
* ``record deleted`` - a link names a row that no longer exists;
* ``record unlinked`` - a row exists that no link names (written behind the ledger's back);
* ``baseline altered`` - a baseline's stored entries do not give its ``matrix_hash``;
* ``sign-off mismatch`` - a sign-off's ``matrix_hash`` differs from the one recomputed from its
  baseline's frozen entries, or the chain head it recorded is not a link before its own.

What the audit cannot see is described in ``docs/signoff.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

from sqlalchemy import select

from .chain import CHAINED_KINDS, GENESIS, chained_table, link_hash, record_hash
from .signoff import frozen_matrix_hash
from .store.models import Baseline, ChainLink, Signoff

__all__ = ["PROBLEMS", "Finding", "AuditReport", "audit"]

PROBLEMS = ("link altered", "record altered", "record deleted", "record unlinked",
            "baseline altered", "sign-off mismatch")


@dataclass(frozen=True)
class Finding:
    """One problem found.

    Attributes
    ----------
    problem : str
        One of :data:`PROBLEMS`.
    kind : str
        Record kind (``revision``, ``requirement_version``, ``baseline``, ``signoff``) or
        ``chain_link``.
    record_id : int or None
        Primary key of the record (the sequence number for a chain link).
    detail : str
        One line saying what differs.
    """

    problem: str
    kind: str
    record_id: int | None
    detail: str

    def __str__(self) -> str:
        return f"{self.problem}: {self.kind} {self.record_id}: {self.detail}"


@dataclass(frozen=True)
class AuditReport:
    """Result of :func:`audit`; ``ok`` is true when nothing was found."""

    findings: tuple[Finding, ...]
    links: int
    records: dict[str, int]
    signoffs: int
    head: str
    checked_at: datetime = field(default_factory=lambda: datetime.now(timezone.utc))

    @property
    def ok(self) -> bool:
        return not self.findings

    def named(self, problem: str, kind: str | None = None) -> list[Finding]:
        """Findings of one problem (and kind)."""
        return [f for f in self.findings
                if f.problem == problem and (kind is None or f.kind == kind)]


def _check_chain(links, findings: list[Finding]) -> None:
    expected_prev, expected_seq = GENESIS, 1
    for ln in links:
        if ln.seq != expected_seq:
            findings.append(Finding("link altered", "chain_link", ln.seq,
                                    f"sequence jumps from {expected_seq - 1} to {ln.seq} "
                                    "(links removed or renumbered)"))
        if ln.prev_hash != expected_prev:
            findings.append(Finding("link altered", "chain_link", ln.seq,
                                    "previous-link hash does not match the link before it"))
        if link_hash(ln.prev_hash, ln.kind, ln.record_id, ln.record_hash) != ln.chain_hash:
            findings.append(Finding("link altered", "chain_link", ln.seq,
                                    f"chain hash is not the hash of its fields ({ln.kind} "
                                    f"{ln.record_id})"))
        expected_prev, expected_seq = ln.chain_hash, ln.seq + 1


def audit(lg) -> AuditReport:
    """Check the whole ledger; read-only, one consistent snapshot.

    Parameters
    ----------
    lg : Ledger

    Returns
    -------
    AuditReport
        Every problem found (empty when the ledger is intact), with counts.
    """
    findings: list[Finding] = []
    with lg.reading() as s:
        links = s.scalars(select(ChainLink).order_by(ChainLink.seq)).all()
        _check_chain(links, findings)
        newest: dict[tuple[str, int], ChainLink] = {}
        for ln in links:
            newest[(ln.kind, ln.record_id)] = ln
        for key, ln in newest.items():
            if key[0] not in CHAINED_KINDS:
                findings.append(Finding("link altered", "chain_link", ln.seq,
                                        f"unknown record kind {key[0]!r}"))
        counts: dict[str, int] = {}
        for kind in CHAINED_KINDS:
            table = chained_table(kind)
            ids = set(s.scalars(select(table.c.id)).all())
            counts[kind] = len(ids)
            linked = {rid for (k, rid) in newest if k == kind}
            for rid in sorted(ids - linked):
                findings.append(Finding("record unlinked", kind, rid,
                                        "row has no chain link (written outside the ledger)"))
            for rid in sorted(linked - ids):
                findings.append(Finding("record deleted", kind, rid,
                                        f"chain link {newest[(kind, rid)].seq} names a row that "
                                        "no longer exists"))
            for rid in sorted(linked & ids):
                ln = newest[(kind, rid)]
                if record_hash(s, kind, rid) != ln.record_hash:
                    findings.append(Finding("record altered", kind, rid,
                                            f"content differs from chain link {ln.seq}"))
        for b in s.scalars(select(Baseline).order_by(Baseline.id)):
            if frozen_matrix_hash(s, b.id) != b.matrix_hash:
                findings.append(Finding("baseline altered", "baseline", b.id,
                                        f"frozen entries of {b.name!r} do not give its matrix hash"))
        seq_of = {ln.chain_hash: ln.seq for ln in links}
        own_seq = {rid: ln.seq for (k, rid), ln in newest.items() if k == "signoff"}
        signoffs = s.scalars(select(Signoff).order_by(Signoff.id)).all()
        for so in signoffs:
            if s.get(Baseline, so.baseline_id) is None:
                findings.append(Finding("sign-off mismatch", "signoff", so.id,
                                        "its baseline no longer exists"))
                continue
            if frozen_matrix_hash(s, so.baseline_id) != so.matrix_hash:
                findings.append(Finding("sign-off mismatch", "signoff", so.id,
                                        "matrix hash differs from the baseline's frozen entries"))
            head_seq = 0 if so.chain_head == GENESIS else seq_of.get(so.chain_head)
            mine = own_seq.get(so.id)
            if head_seq is None or (mine is not None and head_seq >= mine):
                findings.append(Finding("sign-off mismatch", "signoff", so.id,
                                        "recorded chain head is not a link before the sign-off"))
        head = links[-1].chain_hash if links else GENESIS
    return AuditReport(findings=tuple(findings), links=len(links), records=counts,
                       signoffs=len(signoffs), head=head)
