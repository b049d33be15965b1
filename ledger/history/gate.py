"""The gate for scripts: does every applicable requirement pass on the chosen revisions?

A cell (requirement x revision, one per requirement with a metric that applies to the
revision's loop) *holds* when its verdict is ``pass`` or when it is ``waived`` (a ``fail`` or
``error`` a live waiver covers, ``ledger.waivers``); it *offends* when it is ``fail``,
``error`` (without a live waiver: an expired or withdrawn one covers nothing), ``stale``
(judged on an older requirement or plant version, or by another engine
version: run ``verify``) or ``unverified`` (never
judged).  Requirements named in ``exclude`` are left out explicitly and listed as such.  The
gate holds when no cell offends.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Sequence

from ..errors import NotFoundError
from .matrix import build_matrix

__all__ = ["GateCell", "GateReport", "gate", "OFFENDING"]

#: verdicts that make the gate fail
OFFENDING = ("fail", "error", "stale", "unverified")


@dataclass(frozen=True)
class GateCell:
    """One offending cell: what a script needs to name it and see why."""

    requirement: str
    loop: str
    revision: str
    state: str
    value: str
    limit: str
    reason: str = ""


@dataclass(frozen=True)
class GateReport:
    revisions: tuple[str, ...]          # "loop/label" of every revision checked
    cells: int                          # applicable cells checked (excluded ones not counted)
    passing: int                        # pass or waived
    offending: tuple[GateCell, ...]
    excluded: tuple[str, ...] = field(default_factory=tuple)
    waived: tuple[GateCell, ...] = field(default_factory=tuple)  # held by a live waiver
    as_of: str = ""                     # the day waivers were judged on

    @property
    def ok(self) -> bool:
        return not self.offending


def gate(lg, selection: str | Sequence[tuple[str, str]] = "tips", *, loop: str | None = None,
         exclude: Iterable[str] = (), as_of=None) -> GateReport:
    """Check the revisions of ``selection`` (``"tips"``, ``"all"`` or ``(loop, label)`` pairs,
    as :func:`ledger.history.matrix.build_matrix`), waivers judged on ``as_of`` (a date or
    ``YYYY-MM-DD``; default today, UTC).

    Raises
    ------
    NotFoundError
        A requirement ID in ``exclude`` is not in the ledger, or a named revision is not.
    """
    from ..display import value_text

    skip = tuple(dict.fromkeys(exclude))
    known = {r.key for r in lg.requirements()}
    unknown = [k for k in skip if k not in known]
    if unknown:
        raise NotFoundError(f"no requirement with ID {unknown[0]!r} to exclude")
    from ..waivers import as_date

    day = as_date(as_of)
    m = build_matrix(lg, selection, loop=loop, title="gate", as_of=day)
    offending, waived, passing, cells = [], [], 0, 0
    for e in m.entries:
        if e.requirement.key in skip:
            continue
        cells += 1
        v = e.state
        if v not in OFFENDING:
            passing += 1
            if v != "waived":
                continue
        r = e.result
        value = (value_text(r.value, r.unit, e.requirement.limit_text)
                 if r is not None and r.value is not None else "-")
        if v == "waived":
            w = e.waiver
            waived.append(GateCell(e.requirement.key, e.loop, e.revision.label, v, value,
                                   e.requirement.limit_text,
                                   f"{e.verdict} waived by waiver {w.id}, {w.approver} "
                                   f"({w.role}), {w.until()}"))
            continue
        reason = (r.reason if r is not None and r.reason else
                  "stale: run verify" if v == "stale" else
                  "never verified: run verify" if v == "unverified" else "")
        offending.append(GateCell(e.requirement.key, e.loop, e.revision.label, v, value,
                                  e.requirement.limit_text, reason))
    return GateReport(tuple(f"{c.loop}/{c.label}" for c in m.columns), cells, passing,
                      tuple(offending), skip, tuple(waived), day.isoformat())
