"""Traceability and coverage: the requirement tree rolled up over each loop's tip.

The tree runs from system needs (requirements nobody derives them from) down through the
requirements derived from them (``parents`` of a requirement version).  Retired requirements
are left out.  A requirement derived from several parents appears under each.

States, from best to worst: ``satisfied``, ``incomplete``, ``violated``.

- A requirement with a metric is judged on the tip of each loop it applies to: ``pass`` ->
  satisfied, ``fail`` -> violated, anything else (``error``, ``stale``, ``n/a``, no result,
  loop without revisions) -> incomplete.  Its own state is the worst over its loops; with no
  loop at all it is incomplete.
- A requirement without a metric and without children is incomplete (nothing verifies it).
- The rolled-up state of a requirement is the worst of its own state (when it has a metric)
  and the rolled-up states of its non-retired children: a parent is satisfied only if all its
  children are.

Coverage gaps (approved requirements only, except ``stale`` which lists every stale result on
a tip): ``no loop`` (a metric but no loop to judge it on), ``unverified`` (never judged on a
loop's tip), ``stale`` (judged against an older requirement or plant version, or by another engine version), ``no evidence``
(no metric and nothing derived from it).  Orphans: requirements whose parent is retired.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

from ..errors import NotFoundError
from ..records import RequirementInfo, ResultInfo
from .matrix import CAUTION

__all__ = ["STATES", "LoopVerdict", "TraceNode", "Gap", "Orphan", "Trace", "worst_state",
           "build_trace"]

#: states from best to worst
STATES = ("satisfied", "incomplete", "violated")


def worst_state(states) -> str:
    """The worst of some states (``satisfied`` for none)."""
    return max(states, key=STATES.index, default="satisfied")


def _state_of(verdict: str) -> str:
    return {"pass": "satisfied", "fail": "violated"}.get(verdict, "incomplete")


@dataclass(frozen=True)
class LoopVerdict:
    """A requirement's verdict on one loop's tip.

    ``verdict`` is ``pass``, ``fail``, ``error``, ``stale``, ``n/a``, ``unverified`` (no result
    on the tip) or ``no revision`` (the loop has none yet); ``revision`` is the tip label or
    ``None``.
    """

    loop: str
    revision: str | None
    verdict: str
    result: ResultInfo | None

    @property
    def state(self) -> str:
        return _state_of(self.verdict)


@dataclass(frozen=True)
class TraceNode:
    """One requirement in the tree, with its own verdicts and its rolled-up state."""

    requirement: RequirementInfo
    verdicts: tuple[LoopVerdict, ...]
    own_state: str | None
    state: str
    children: tuple["TraceNode", ...] = field(default_factory=tuple)

    @property
    def key(self) -> str:
        return self.requirement.key

    def walk(self, depth: int = 0):
        """Yield ``(depth, node)`` over this subtree, depth first."""
        yield depth, self
        for c in self.children:
            yield from c.walk(depth + 1)


@dataclass(frozen=True)
class Gap:
    """A hole in verification coverage.

    ``kind`` is ``no loop``, ``unverified``, ``stale`` or ``no evidence``; ``loop`` and
    ``revision`` are set where one applies.
    """

    requirement: str
    kind: str
    detail: str
    loop: str | None = None
    revision: str | None = None


@dataclass(frozen=True)
class Orphan:
    """A live requirement derived from a retired one."""

    requirement: str
    retired_parents: tuple[str, ...]


@dataclass(frozen=True)
class Trace:
    """The rolled-up requirement tree with coverage gaps and orphans."""

    roots: tuple[TraceNode, ...]
    gaps: tuple[Gap, ...]
    orphans: tuple[Orphan, ...]
    generated_at: datetime
    caution: str = CAUTION

    def node(self, key: str) -> TraceNode:
        """The first node for requirement ``key`` (depth first)."""
        for root in self.roots:
            for _, n in root.walk():
                if n.key == key:
                    return n
        raise NotFoundError(f"requirement {key!r} is not in the trace (retired or unknown)")

    def counts(self) -> dict[str, int]:
        """Distinct requirements per rolled-up state."""
        seen: dict[str, str] = {}
        for root in self.roots:
            for _, n in root.walk():
                seen[n.key] = n.state
        out: dict[str, int] = {}
        for s in seen.values():
            out[s] = out.get(s, 0) + 1
        return out


def build_trace(lg) -> Trace:
    """Read the ledger and build the rolled-up tree, coverage gaps and orphans.

    Parameters
    ----------
    lg : Ledger

    Returns
    -------
    Trace
        Uses the results the ledger holds on each loop's tip (nothing is computed).
    """
    reqs = {r.key: r for r in lg.requirements()}
    live = {k: r for k, r in reqs.items() if r.status != "retired"}
    tips: dict[str, str | None] = {}
    tip_results: dict[str, dict[str, ResultInfo]] = {}
    for lp in lg.loops():
        tips[lp.name] = lp.tip
        tip_results[lp.name] = ({r.requirement: r for r in lg.results(lp.name, lp.tip)}
                                if lp.tip else {})

    def verdicts(r: RequirementInfo) -> tuple[LoopVerdict, ...]:
        out = []
        for ln in r.loops:
            tip = tips.get(ln)
            if tip is None:
                out.append(LoopVerdict(ln, None, "no revision", None))
                continue
            res = tip_results[ln].get(r.key)
            if res is None:
                out.append(LoopVerdict(ln, tip, "unverified", None))
            else:
                out.append(LoopVerdict(ln, tip, "stale" if res.stale else res.verdict, res))
        return tuple(out)

    children: dict[str, list[str]] = {k: [] for k in live}
    for k, r in live.items():
        for p in r.parents:
            if p in live:
                children[p].append(k)

    memo: dict[str, TraceNode] = {}

    def node(key: str) -> TraceNode:
        if key in memo:
            return memo[key]
        r = live[key]
        kids = tuple(node(c) for c in sorted(children[key]))
        vs = verdicts(r) if r.metric else ()
        own = None
        if r.metric:
            own = worst_state(v.state for v in vs) if vs else "incomplete"
        elif not kids:
            own = "incomplete"
        states = ([own] if own is not None else []) + [c.state for c in kids]
        memo[key] = TraceNode(r, vs, own, worst_state(states), kids)
        return memo[key]

    roots = tuple(node(k) for k in sorted(live)
                  if not any(p in live for p in live[k].parents))

    gaps: list[Gap] = []
    for k in sorted(live):
        r = live[k]
        if r.metric:
            for v in verdicts(r):
                if v.verdict == "stale":
                    res = v.result
                    gaps.append(Gap(k, "stale", f"judged against requirement v{res.requirement_version}"
                                    f" (latest v{r.version}) and plant v{res.plant_version}",
                                    v.loop, v.revision))
                elif r.status == "approved" and v.verdict in ("unverified", "no revision"):
                    detail = ("the loop has no revision yet" if v.verdict == "no revision"
                              else f"never judged on the tip {v.revision}")
                    gaps.append(Gap(k, "unverified", detail, v.loop, v.revision))
            if r.status == "approved" and not r.loops:
                gaps.append(Gap(k, "no loop", "has a metric but applies to no loop"))
        elif r.status == "approved" and not children[k]:
            gaps.append(Gap(k, "no evidence", "no metric and no requirement derived from it"))

    orphans = tuple(
        Orphan(k, tuple(p for p in r.parents if p in reqs and reqs[p].status == "retired"))
        for k, r in sorted(live.items())
        if any(p in reqs and reqs[p].status == "retired" for p in r.parents)
    )
    return Trace(roots=roots, gaps=tuple(gaps), orphans=orphans,
                 generated_at=datetime.now(timezone.utc))
