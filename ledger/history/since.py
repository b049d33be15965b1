"""First failing revision: where the current failing run of a requirement began.

Starting from a revision (default: the loop's tip), the lineage is walked back through the
parents (:meth:`Ledger.ancestry`).  While the requirement does not pass (``fail`` or
``error``: an error counts as not passing) the walk goes on; the oldest revision of that
unbroken run is the *first failing revision*, reported with its rationale.  The walk stops at:

- a passing revision: the run began just after it;
- the root: the requirement has failed since the root;
- a revision where the requirement was not judged, or judged against an older requirement or
  plant version (stale), or ``n/a``: the run is known to reach back at least to the revision
  after it, and the answer says it is uncertain (verify the whole loop to settle it).

Only the revisions on the path from the root to the queried one count; sibling branches are
ignored.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..records import ResultInfo, RevisionInfo

__all__ = ["FailingRun", "first_failing"]

_NOT_PASSING = ("fail", "error")


@dataclass(frozen=True)
class FailingRun:
    """Answer of :func:`first_failing`.

    Attributes
    ----------
    loop, requirement, label : str
        What was asked (``label`` resolved to a real revision label).
    state : str
        ``passes`` (the requirement passes on ``label``), ``failing`` (it does not), or
        ``unknown`` (not judged, stale or n/a on ``label`` itself).
    first : RevisionInfo or None
        The oldest revision of the unbroken failing run ending at ``label`` (when failing).
    first_result : ResultInfo or None
        The result on ``first``.
    run : tuple of str
        Labels of the failing run, oldest first (empty unless failing).
    since_root : bool
        The run reaches back to the lineage root.
    boundary : RevisionInfo or None
        The revision just before the run: the last passing one, or the one that was not
        judged (then ``certain`` is False).
    boundary_verdict : str or None
        ``pass``, ``stale``, ``n/a`` or ``unverified``.
    current : ResultInfo or None
        The result on ``label``.
    """

    loop: str
    requirement: str
    label: str
    state: str
    first: RevisionInfo | None
    first_result: ResultInfo | None
    run: tuple[str, ...]
    since_root: bool
    boundary: RevisionInfo | None
    boundary_verdict: str | None
    current: ResultInfo | None

    @property
    def certain(self) -> bool:
        """False when the walk stopped at a revision that was not judged (or stale)."""
        return self.state == "failing" and (self.since_root or self.boundary_verdict == "pass")

    def summary(self) -> str:
        """One or two plain sentences for people."""
        where = f"{self.requirement} on {self.loop}/{self.label}"
        if self.state == "passes":
            return f"{where} passes; there is no failing run."
        if self.state == "unknown":
            v = self.current.verdict if self.current is not None else "unverified"
            return (f"{where} is {v}; cannot tell whether it fails. Run 'loopledger verify "
                    f"--loop {self.loop}' first.")
        first = self.first
        text = f"{where} fails; the failing run began at {first.label}"
        if self.since_root:
            text += " (it has failed since the root)"
        elif self.boundary_verdict == "pass":
            text += f" (it passed on {self.boundary.label})"
        else:
            text += (f" or earlier: {self.boundary.label} is {self.boundary_verdict}; run "
                     f"'loopledger verify --loop {self.loop}' to settle it")
        n = len(self.run)
        text += f"; {n} failing revision{'s' if n != 1 else ''}. Rationale of {first.label}: "
        return text + (first.rationale.strip().splitlines()[0] if first.rationale.strip() else "-")


def _result_for(lg, loop: str, label: str, requirement: str) -> ResultInfo | None:
    for r in lg.results(loop, label):
        if r.requirement == requirement:
            return r
    return None


def _verdict(res: ResultInfo | None) -> str:
    if res is None:
        return "unverified"
    if res.stale:
        return "stale"
    return res.verdict


def first_failing(lg, loop: str, requirement: str, label: str | None = None) -> FailingRun:
    """Find where the current failing run of ``requirement`` on ``loop`` began.

    Parameters
    ----------
    lg : Ledger
    loop : str
    requirement : str
        Requirement ID.
    label : str, optional
        Revision to start from (default: the loop's tip).

    Returns
    -------
    FailingRun

    Raises
    ------
    NotFoundError
        Unknown loop, revision or requirement.
    """
    lg.requirement(requirement)  # raises NotFoundError for an unknown ID
    start = lg.revision(loop, label)
    chain = lg.ancestry_labels(loop, start.label)  # newest first
    current = _result_for(lg, loop, start.label, requirement)
    v = _verdict(current)
    base = dict(loop=loop, requirement=requirement, label=start.label, current=current)
    if v == "pass":
        return FailingRun(state="passes", first=None, first_result=None, run=(),
                          since_root=False, boundary=None, boundary_verdict=None, **base)
    if v not in _NOT_PASSING:
        return FailingRun(state="unknown", first=None, first_result=None, run=(),
                          since_root=False, boundary=None, boundary_verdict=None, **base)
    run = [(start.label, current)]
    boundary, boundary_verdict = None, None
    fetched: dict[str, ResultInfo | None] = {}
    block = 16  # results are read a block of ancestors at a time (long runs cost few queries)
    for i, rev_label in enumerate(chain[1:]):
        if rev_label not in fetched:
            labels = chain[1 + i:1 + i + block]
            block *= 2
            many = lg.results_many(loop, labels, keys=[requirement])
            for lbl in labels:
                fetched[lbl] = next((r for r in many[lbl] if r.requirement == requirement), None)
        res = fetched[rev_label]
        rv = _verdict(res)
        if rv in _NOT_PASSING:
            run.append((rev_label, res))
            continue
        boundary, boundary_verdict = lg.revision(loop, rev_label), rv
        break
    first_label, first_result = run[-1]
    first = start if first_label == start.label else lg.revision(loop, first_label)
    return FailingRun(state="failing", first=first, first_result=first_result,
                      run=tuple(lbl for lbl, _ in reversed(run)), since_root=boundary is None,
                      boundary=boundary, boundary_verdict=boundary_verdict, **base)
