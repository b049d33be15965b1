"""The verification matrix: requirements x revisions with verdict, value and headroom.

A *selection* names the revision columns: the tip of every loop (default), chosen revisions
``[(loop, label), ...]``, or every revision of one loop.  Each entry pairs a requirement's
latest version with one revision of a loop it applies to and the result the ledger holds
for it (``None`` when never verified).  Exports, the terminal UI and sign-off all read this one
structure.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Iterable, Sequence

from ..judge import count_verdicts
from ..records import RequirementInfo, ResultInfo, RevisionInfo, WaiverInfo

__all__ = ["CAUTION", "MatrixEntry", "Matrix", "build_matrix", "measured_members"]

CAUTION = (
    "Model-based verification does not replace hardware testing, applicable safety standards "
    "and qualified review."
)


@dataclass(frozen=True)
class MatrixEntry:
    requirement: RequirementInfo
    loop: str
    revision: RevisionInfo
    result: ResultInfo | None
    #: the live waiver covering a ``fail`` or ``error`` verdict here (``ledger.waivers``)
    waiver: WaiverInfo | None = None

    @property
    def verdict(self) -> str:
        """``pass``, ``fail``, ``error``, ``stale`` or ``unverified`` (the judged verdict,
        whether waived or not)."""
        return self.result.verdict if self.result is not None else "unverified"

    @property
    def state(self) -> str:
        """What the cell shows: its verdict, or ``waived`` for a failure (or error) a live
        waiver covers (never ``pass``)."""
        return "waived" if self.waiver is not None else self.verdict


@dataclass(frozen=True)
class Matrix:
    """Requirements (rows) x revisions (columns).

    Attributes
    ----------
    requirements : tuple of RequirementInfo
        Latest versions, every status except retired; needs without a metric included (they
        have no entries of their own; see ``history.trace`` for their roll-up).
    columns : tuple of RevisionInfo
        The selected revisions, grouped by loop.
    entries : tuple of MatrixEntry
        One per (requirement with a metric, column of a loop it applies to).
    generated_at : datetime
    caution : str
    """

    requirements: tuple
    columns: tuple
    entries: tuple
    generated_at: datetime
    caution: str = CAUTION
    title: str = "Verification matrix"
    #: (loop, plant version) -> names of the measured members of that plant version's family
    #: (``measured:<name>``; docs/measured.md), for the versions the results judged
    measured: dict = field(default_factory=dict)

    def cell(self, key: str, loop: str, label: str) -> MatrixEntry | None:
        for e in self.entries:
            if e.requirement.key == key and e.loop == loop and e.revision.label == label:
                return e
        return None

    def counts(self) -> dict[str, int]:
        """Cells per verdict (a waived cell counts under its judged verdict)."""
        return count_verdicts(self.entries, ())

    def state_counts(self) -> dict[str, int]:
        """Cells per shown state (``waived`` counted apart)."""
        return count_verdicts(self.entries, (), attr="state")

    @property
    def loops(self) -> tuple[str, ...]:
        seen = []
        for c in self.columns:
            if c.loop not in seen:
                seen.append(c.loop)
        return tuple(seen)


def build_matrix(lg, selection: str | Sequence[tuple[str, str]] = "tips", *,
                 loop: str | None = None, title: str = "Verification matrix",
                 as_of=None) -> Matrix:
    """Build the matrix for a selection of revisions.

    Parameters
    ----------
    lg : Ledger
    selection : ``"tips"``, ``"all"`` or a sequence of ``(loop, label)``
        Which revisions become columns: each loop's tip, every revision, or the named ones.
    loop : str, optional
        Restrict to one loop.
    as_of : date or ``YYYY-MM-DD``, optional
        The day waivers are judged on (default today, UTC): an expired or withdrawn waiver
        covers nothing.
    """
    from ..waivers import WaiverIndex

    loops = [l.name for l in lg.loops() if loop is None or l.name == loop]
    columns: list[RevisionInfo] = []
    if selection == "tips":
        for name in loops:
            try:
                columns.append(lg.revision(name))
            except LookupError:
                continue
    elif selection == "all":
        for name in loops:
            columns.extend(lg.revisions(name))
    else:
        for lname, label in selection:
            columns.append(lg.revision(lname, label))
    shown_loops = {c.loop for c in columns}
    # needs without a metric stay (their roll-up is shown elsewhere); a requirement with a
    # metric is a row when it applies to a loop among the columns (or, unfiltered, to no loop
    # at all: a coverage gap the reader should see)
    reqs = tuple(r for r in lg.requirements() if r.status != "retired"
                 and (not r.metric or shown_loops.intersection(r.loops)
                      or (loop is None and not r.loops)))
    by_loop: dict[str, list[str]] = {}
    for col in columns:
        by_loop.setdefault(col.loop, []).append(col.label)
    fetched = {(lname, label): res for lname, labels in by_loop.items()
               for label, res in lg.results_many(lname, labels).items()}
    waived = WaiverIndex(lg.waivers() if columns else (), as_of)
    entries = []
    for col in columns:
        results = {r.requirement: r for r in fetched[(col.loop, col.label)]}
        for r in reqs:
            if r.metric and col.loop in r.loops:
                res = results.get(r.key)
                verdict = res.verdict if res is not None else "unverified"
                entries.append(MatrixEntry(r, col.loop, col, res,
                                           waived.cover(r.key, col.loop, col.label, verdict)))
    return Matrix(requirements=reqs, columns=tuple(columns), entries=tuple(entries),
                  generated_at=datetime.now(timezone.utc), title=title,
                  measured=measured_members(lg, (e.result for e in entries)))


def measured_members(lg, results) -> dict:
    """(loop, plant version) -> the names of the measured members of that plant version's
    family (``measured:<name>``), for every plant version one of ``results`` (``ResultInfo``,
    ``None`` skipped) judged."""
    out: dict = {}
    plant_of: dict = {}
    for r in results:
        if r is None or (r.loop, r.plant_version) in out:
            continue
        if r.loop not in plant_of:
            plant_of[r.loop] = lg.loop(r.loop).plant
        info = lg.plant(plant_of[r.loop], r.plant_version)
        out[(r.loop, r.plant_version)] = tuple(f"measured:{k}" for k in info.measured)
    return out
