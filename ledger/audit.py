"""The audit: recompute every record hash, the whole hash chain, every result's and cached
metric value's row hash, every result batch, and every sign-off's matrix.

Findings, one per problem, each naming the record (kind, id, label):

* ``link altered`` - a chain link's stored ``chain_hash`` is not the hash of its own fields
  (time stamp included), or its ``prev_hash`` is not the previous link's ``chain_hash`` (a link
  edited, removed or inserted), or its sequence number skips, or it names an unknown kind;
* ``record altered`` - a chained row's content no longer gives the record hash of its newest
  link; a revision's, requirement version's or plant version's ``content_hash`` column (the
  hash baselines freeze) is not the hash of its content; a result's or metric value's content no longer gives its stored row hash; a result
  points at another revision than the batch it was written in; a batch's results or metric
  values carry row hashes that do not give the batch's digest (rewritten with recomputed
  hashes);
* ``record deleted`` - a link names a row that no longer exists; a result a batch wrote is gone;
  a metric value results were judged from is gone;
* ``record inserted`` - a row exists that no link names; a result is not among those its batch
  wrote (or its batch does not exist); a cached metric value no result was judged from;
* ``baseline altered`` - a baseline's stored entries do not give its ``matrix_hash``;
* ``sign-off mismatch`` - a sign-off's ``matrix_hash`` differs from the one recomputed from its
  baseline's frozen entries, or the chain head it recorded is not a link before its own.

The audit reads each table once, in a streaming pass (results in batch order).  What it cannot
see is described in ``docs/signoff.md``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

from .store.audit import COVERED, PROBLEMS, Checker, Finding
from .store.chain import CHAINED_KINDS

__all__ = ["PROBLEMS", "COVERED", "Finding", "AuditReport", "audit", "Checker"]


@dataclass(frozen=True)
class AuditReport:
    """Result of :func:`audit`; ``ok`` is true when nothing was found.  ``records`` counts
    the rows checked of each kind in :data:`COVERED`."""

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

    def coverage(self) -> str:
        """One line: what was checked (record kinds and counts, chain links)."""
        recs = ", ".join(f"{n} {k}" for k, n in self.records.items())
        return f"{recs}; {self.links} chain link(s) (time stamps included)"


def audit(lg) -> AuditReport:
    """Check the whole ledger; read-only, one consistent snapshot.

    Parameters
    ----------
    lg : Ledger

    Returns
    -------
    AuditReport
        Every problem found (empty when the ledger is intact), with counts of what was
        checked.
    """
    with lg.reading() as s:
        c = Checker(s)
        c.chain()
        counts: dict[str, int] = {}
        for kind in CHAINED_KINDS:
            counts[kind] = c.records(kind)
        counts["result"] = c.results()
        counts["metric_value"] = c.metric_values()
        c.content_hashes()
        c.baselines()
        signoffs = c.signoffs()
        return AuditReport(findings=tuple(c.findings), links=len(c.links), records=counts,
                           signoffs=signoffs, head=c.head)
