"""The gate for scripts: does every applicable requirement pass on the chosen revisions?

A cell (requirement x revision, one per requirement with a metric that applies to the
revision's loop) *holds* when its verdict is ``pass``; it *offends* when it is ``fail``,
``error``, ``stale`` (judged on an older requirement or plant version, or by another engine version: run ``verify``) or
``unverified`` (never judged).  Requirements named in ``exclude`` are left out explicitly and
listed as such.  The gate holds when no cell offends.  Waivers are not part of the ledger yet:
when they are, a waived failure will be a third state that holds (docs/history.md).
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
    passing: int
    offending: tuple[GateCell, ...]
    excluded: tuple[str, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        return not self.offending


def gate(lg, selection: str | Sequence[tuple[str, str]] = "tips", *, loop: str | None = None,
         exclude: Iterable[str] = ()) -> GateReport:
    """Check the revisions of ``selection`` (``"tips"``, ``"all"`` or ``(loop, label)`` pairs,
    as :func:`ledger.history.matrix.build_matrix`).

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
    m = build_matrix(lg, selection, loop=loop, title="gate")
    offending, passing, cells = [], 0, 0
    for e in m.entries:
        if e.requirement.key in skip:
            continue
        cells += 1
        v = e.verdict
        if v not in OFFENDING:
            passing += 1
            continue
        r = e.result
        value = (value_text(r.value, r.unit, e.requirement.limit_text)
                 if r is not None and r.value is not None else "-")
        reason = (r.reason if r is not None and r.reason else
                  "stale: run verify" if v == "stale" else
                  "never verified: run verify" if v == "unverified" else "")
        offending.append(GateCell(e.requirement.key, e.loop, e.revision.label, v, value,
                                  e.requirement.limit_text, reason))
    return GateReport(tuple(f"{c.loop}/{c.label}" for c in m.columns), cells, passing,
                      tuple(offending), skip)
