"""What each view shows, read from the Python API (run inside worker threads).

These functions hold no logic of their own beyond arranging API results for display: every
verdict, value and headroom comes from :meth:`ledger.api.Ledger.results` or
:func:`ledger.history.matrix.build_matrix`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..judge import count_verdicts
from ..records import RequirementInfo, RevisionInfo

__all__ = ["RevisionRow", "LineageData", "load_lineage", "MatrixData", "load_matrix",
           "TraceLink", "RequirementData", "load_requirement", "verdict_counts", "load_drivers"]

VERDICTS = ("pass", "fail", "error", "stale")


def verdict_counts(results) -> dict[str, int]:
    """Number of results per verdict (every verdict in :data:`VERDICTS` present)."""
    return count_verdicts(results, VERDICTS)


@dataclass(frozen=True)
class RevisionRow:
    revision: RevisionInfo
    counts: dict
    depth: int


@dataclass(frozen=True)
class LineageData:
    """Per loop name, the revisions in tree order (depth-first, children in recorded order);
    ``hidden`` counts a loop's older revisions left out of the view; ``tips`` names each
    loop's tip (latest recorded revision, ``None`` before the first)."""

    loops: dict = field(default_factory=dict)
    hidden: dict = field(default_factory=dict)
    tips: dict = field(default_factory=dict)


#: deepest indentation of the lineage tree
MAX_DEPTH = 16
#: most revisions per loop shown in the lineage view (the latest; the CLI lists them all)
MAX_SHOWN = 400


def load_lineage(lg) -> LineageData:
    loops, hidden, tips = {}, {}, {}
    for lp in lg.loops():
        tips[lp.name] = lp.tip
        revs = lg.revisions(lp.name)
        hidden[lp.name] = max(0, len(revs) - MAX_SHOWN)
        revs = revs[-MAX_SHOWN:]
        shown = {r.label for r in revs}
        counts = lg.verdict_counts(lp.name, [r.label for r in revs] if hidden[lp.name] else None)
        by_label = {r.label: r for r in revs}
        rows: list[RevisionRow] = []
        # depth-first, children in recorded order, without recursion (chains can be long);
        # a revision whose parent is not shown starts a tree of its own
        roots = [r for r in revs if r.parent is None or r.parent not in shown]
        stack = [(r, 0) for r in reversed(roots)]
        while stack:
            r, depth = stack.pop()
            rows.append(RevisionRow(r, counts[r.label], depth))
            # true nesting for the first MAX_DEPTH levels; deeper revisions stay in one column
            # (the detail pane names each one's parent) so long histories never nest
            # thousands deep
            stack.extend((by_label[c], min(depth + 1, MAX_DEPTH)) for c in reversed(r.children)
                         if c in by_label)
        loops[lp.name] = tuple(rows)
    return LineageData(loops, hidden, tips)


@dataclass(frozen=True)
class MatrixData:
    """Rows (requirements, grouped by loop then trace parent), columns and cells.

    ``cells[(key, loop, label)]`` is the :class:`ResultInfo` or ``None`` (never verified);
    a missing key means the requirement does not apply to that column's loop (n/a).
    ``broke`` holds the cells that fail where the column's parent revision passed.
    ``waivers`` holds the live waiver of each waived cell.
    """

    rows: tuple
    columns: tuple
    cells: dict
    broke: frozenset
    loops: tuple
    caution: str
    #: ``(key, loop, label)`` -> the live waiver covering that cell's fail or error
    waivers: dict = field(default_factory=dict)


def _group_order(reqs: list[RequirementInfo], loops: list[str]) -> list[RequirementInfo]:
    def sort_key(r):
        first_loop = min((loops.index(l) for l in r.loops if l in loops), default=len(loops))
        parent = r.parents[0] if r.parents else ""
        return (first_loop, parent, r.key)

    return sorted(reqs, key=sort_key)


def load_matrix(lg, loop: str | None = None, *, tips_only: bool = False) -> MatrixData:
    """Every revision (or each loop's tip) of ``loop`` (or of every loop) against the
    requirements with a metric."""
    from ..history.matrix import build_matrix

    m = build_matrix(lg, "tips" if tips_only else "all", loop=loop)
    loops = [c.loop for c in m.columns]
    loops = list(dict.fromkeys(loops))
    cells = {(e.requirement.key, e.loop, e.revision.label): e.result for e in m.entries}
    reqs = [r for r in m.requirements if r.metric and (loop is None or loop in r.loops)]
    broke = set()
    for (key, lname, label), res in cells.items():
        col = next(c for c in m.columns if c.loop == lname and c.label == label)
        if res is None or res.verdict != "fail" or not col.parent:
            continue
        before = cells.get((key, lname, col.parent))
        if before is not None and before.verdict == "pass":
            broke.add((key, lname, label))
    return MatrixData(rows=tuple(_group_order(reqs, [l.name for l in lg.loops()])),
                      columns=tuple(m.columns), cells=cells, broke=frozenset(broke),
                      loops=tuple(l.name for l in lg.loops()), caution=m.caution,
                      waivers={(e.requirement.key, e.loop, e.revision.label): e.waiver
                               for e in m.entries if e.waiver is not None})


@dataclass(frozen=True)
class TraceLink:
    """A trace parent or child, with its verdict on the tip of each loop it applies to."""

    key: str
    title: str
    verdicts: tuple  # of (loop, tip label, ResultInfo | None)


@dataclass(frozen=True)
class RequirementData:
    requirement: RequirementInfo
    history: tuple
    parents: tuple
    children: tuple
    trend: tuple  # of (loop, RevisionInfo, ResultInfo | None), revisions in recorded order
    keys: tuple   # every requirement ID (for next/previous)
    waivers: tuple = ()  # every waiver of it (WaiverInfo), withdrawn and expired included


def _tip_verdicts(lg, req: RequirementInfo) -> tuple:
    out = []
    for lname in req.loops:
        try:
            tip = lg.revision(lname)
        except LookupError:
            continue
        res = {r.requirement: r for r in lg.results(lname, tip.label)}.get(req.key)
        out.append((lname, tip.label, res))
    return tuple(out)


def load_requirement(lg, key: str | None) -> RequirementData | None:
    """One requirement in full; ``key=None`` picks the first requirement with a metric."""
    reqs = lg.requirements()
    if not reqs:
        return None
    by_key = {r.key: r for r in reqs}
    if key not in by_key:
        key = next((r.key for r in reqs if r.metric), reqs[0].key)
    req = by_key[key]
    parents = tuple(TraceLink(p, by_key[p].title if p in by_key else "?",
                              _tip_verdicts(lg, by_key[p]) if p in by_key else ())
                    for p in req.parents)
    children = tuple(TraceLink(r.key, r.title, _tip_verdicts(lg, r))
                     for r in reqs if key in r.parents)
    trend = []
    for lname in req.loops:
        for rev in lg.revisions(lname):
            res = {r.requirement: r for r in lg.results(lname, rev.label)}.get(key)
            trend.append((lname, rev, res))
    return RequirementData(req, tuple(lg.requirement_history(key)), parents, children,
                           tuple(trend), tuple(by_key), tuple(lg.waivers(key)))


def load_drivers(lg, key: str) -> tuple:
    """What drives requirement ``key``'s worst value on the tip of each loop it applies to:
    ``(loop, WorstCaseDrivers or the LedgerError that stopped it)`` per loop with a tip
    (:func:`ledger.verification.drivers.worst_case_drivers`; computed, stored nowhere)."""
    from ..errors import LedgerError
    from ..verification.drivers import worst_case_drivers

    out = []
    for lname in lg.requirement(key).loops:
        try:
            tip = lg.revision(lname)
        except LookupError:
            continue
        try:
            out.append((lname, worst_case_drivers(lg, lname, tip.label, [key])[0]))
        except LedgerError as e:
            out.append((lname, e))
    return tuple(out)
