"""Regressions between two revisions of a loop, requirement by requirement.

Each requirement judged on both revisions falls in one class:

``broke``
    passed on the older revision, does not pass on the newer one (``fail`` or ``error``; an
    error counts as not passing).
``fixed``
    did not pass on the older revision (``fail`` or ``error``), passes on the newer one.
``eroded``
    passes on both, and the headroom shrank by *more than* ``threshold`` times the older
    revision's headroom magnitude.
``improved``
    passes on both, and the headroom grew by more than the same amount.
``moved``
    fails on both (a value on each side), and the value moved by more than ``threshold`` times
    the older headroom magnitude (its distance from the limit), closer to the limit or further
    from it; the note says which.  Not a regression: it was failing already.
``unchanged``
    anything else where both sides were judged: a change within (or exactly at) the threshold,
    still failing with a small move, an ``error`` on a side, both ``n/a``.

and, when the two sides cannot be compared:

``new`` / ``dropped``
    judged on the newer revision only / on the older revision only.
``incomparable``
    judged on both, but not against the same requirement version and plant version, or one
    side is stale or ``n/a``; the note says which and what to do (re-verify).

The threshold edge belongs to ``unchanged``: with ``threshold=0.25`` and an older headroom of
4 deg, a newer headroom of exactly 3 deg (or 5 deg) is ``unchanged``, 2.99 deg ``eroded``.
Infinite headroom (e.g. a gain margin of inf: no phase crossover) becomes finite = ``eroded``,
finite becomes infinite = ``improved``, infinite on both sides = ``unchanged`` with no delta.
An older headroom of exactly 0 (passing right at the limit) makes any growth ``improved``.
Boolean metrics (unit ``bool``, e.g. ``stable``) have no headroom to speak of: they are judged by
verdict only, never get a threshold note, and are never ``moved``.

:func:`classify` is a pure function over :class:`~ledger.records.ResultInfo` lists;
:func:`diff` reads two revisions of a ledger and classifies their results.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Iterable, Mapping, Sequence

from ..errors import SpecError
from ..records import ResultInfo, RevisionInfo

__all__ = [
    "CLASSES",
    "REGRESSIONS",
    "Change",
    "Diff",
    "classify_pair",
    "classify",
    "diff",
    "design_changes",
]

#: every class, in the order they are listed (regressions first)
CLASSES = ("broke", "eroded", "fixed", "improved", "moved", "new", "dropped", "incomparable",
           "unchanged")
#: the classes that count as a regression
REGRESSIONS = ("broke", "eroded")

_NOT_PASSING = ("fail", "error")


@dataclass(frozen=True)
class Change:
    """How one requirement's result changed between two revisions.

    Attributes
    ----------
    requirement : str
        Requirement ID.
    kind : str
        One of :data:`CLASSES`.
    old_verdict, new_verdict : str or None
        ``pass``, ``fail``, ``error``, ``stale``, ``n/a``; ``None`` on a side that was not judged.
    old_value, new_value : float or None
        Worst value over the plant family, in ``unit``.
    value_delta : float or None
        ``new_value - old_value`` in ``unit``; ``None`` when a side is missing or both are the
        same infinity.
    old_headroom, new_headroom : float or None
        Signed distance from the limit in ``unit`` (positive = passing side).
    headroom_delta : float or None
        ``new_headroom - old_headroom`` in ``unit`` (negative = less margin); ``None`` as for
        ``value_delta``; ``-inf``/``inf`` when one side only is infinite.
    headroom_change : float or None
        ``headroom_delta / |old_headroom|`` (dimensionless; the quantity compared with the
        threshold); ``None`` when the older headroom is 0, infinite or missing.
    old_worst_variant, new_worst_variant : str
        The plant variants that produced the worst values.
    old_requirement_version, new_requirement_version : int or None
    old_plant_version, new_plant_version : int or None
    unit : str
    limit_text : str
        The limit as judged on the newer side (the older side's when only it exists).
    note : str
        Why a requirement was not compared, or extra context; empty otherwise.
    status : str
        The requirement's status (``draft``, ``approved``...), filled in by :func:`diff`;
        empty from :func:`classify`.
    """

    requirement: str
    kind: str
    old_verdict: str | None
    new_verdict: str | None
    old_value: float | None
    new_value: float | None
    value_delta: float | None
    old_headroom: float | None
    new_headroom: float | None
    headroom_delta: float | None
    headroom_change: float | None
    old_worst_variant: str
    new_worst_variant: str
    old_requirement_version: int | None
    new_requirement_version: int | None
    old_plant_version: int | None
    new_plant_version: int | None
    unit: str
    limit_text: str
    note: str = ""
    status: str = ""

    @property
    def is_regression(self) -> bool:
        """True for ``broke`` and ``eroded``."""
        return self.kind in REGRESSIONS


@dataclass(frozen=True)
class Diff:
    """Regressions of one loop between two revisions.

    Attributes
    ----------
    loop : str
    new : RevisionInfo
        The newer revision.
    old : RevisionInfo or None
        The revision compared against (``None`` when ``new`` is a root and no older revision
        was named: every judged requirement is then ``new``).
    threshold : float
        Fraction of the older headroom beyond which a change counts as eroded or improved
        (or, among failures, moved).
    changes : tuple of Change
        Ordered by :data:`CLASSES`, then requirement ID.
    """

    loop: str
    new: RevisionInfo
    old: RevisionInfo | None
    threshold: float
    changes: tuple[Change, ...]

    def of(self, *kinds: str) -> tuple[Change, ...]:
        """The changes of the given classes."""
        return tuple(c for c in self.changes if c.kind in kinds)

    def counts(self) -> dict[str, int]:
        """Number of requirements per class (classes with none left out)."""
        out: dict[str, int] = {}
        for c in self.changes:
            out[c.kind] = out.get(c.kind, 0) + 1
        return out

    @property
    def regressions(self) -> tuple[Change, ...]:
        """``broke`` and ``eroded`` changes."""
        return self.of(*REGRESSIONS)

    @property
    def design_changes(self) -> tuple[tuple[str, str, str], ...]:
        """What the design itself changed: ``(part, old, new)`` for the controller, the
        revision's own prefilter and its anti-windup, where they differ (:func:`design_changes`)."""
        return design_changes(self.old, self.new)


def _anti_windup_text(r: RevisionInfo) -> str:
    if r.anti_windup == "none":
        return "none"
    gain = f" (gain {r.anti_windup_gain:g} 1/s)" if r.anti_windup_gain is not None else ""
    return f"{r.anti_windup}{gain}"


def design_changes(old: RevisionInfo | None, new: RevisionInfo) -> tuple:
    """``(part, old text, new text)`` of each design part that differs between two revisions:
    ``controller``, ``prefilter`` (the revision's own; ``"(loop's)"`` when it has none) and
    ``anti-windup``; empty when ``old`` is ``None``."""
    if old is None:
        return ()
    out = []
    if old.controller != new.controller:
        out.append(("controller", old.controller, new.controller))
    if (old.prefilter or "") != (new.prefilter or ""):
        out.append(("prefilter", old.prefilter or "(loop's)", new.prefilter or "(loop's)"))
    if _anti_windup_text(old) != _anti_windup_text(new):
        out.append(("anti-windup", _anti_windup_text(old), _anti_windup_text(new)))
    return tuple(out)


def _sub(a: float | None, b: float | None) -> float | None:
    """``a - b`` without NaN: ``None`` when a side is missing or both are the same infinity."""
    if a is None or b is None:
        return None
    if math.isinf(a) and math.isinf(b) and (a > 0) == (b > 0):
        return None
    return a - b


def _check_threshold(threshold: float) -> float:
    try:
        t = float(threshold)
    except (TypeError, ValueError) as e:
        raise SpecError(f"threshold must be a number (fraction of headroom), got {threshold!r}") from e
    if not math.isfinite(t) or t < 0:
        raise SpecError(f"threshold must be a finite fraction >= 0 (e.g. 0.25), got {threshold!r}")
    return t


def _passing_class(h0: float | None, h1: float | None, threshold: float,
                   edge_rtol: float) -> tuple[str, str]:
    """Class of a pass -> pass pair from the two headrooms."""
    if h0 is None or h1 is None:
        return "unchanged", "no headroom recorded; compared by verdict only"
    if math.isinf(h0) or math.isinf(h1):
        if math.isinf(h0) and math.isinf(h1):
            return "unchanged", "infinite headroom on both revisions"
        if math.isinf(h0):
            return "eroded", "headroom was infinite, is now finite"
        return "improved", "headroom was finite, is now infinite"
    delta = h1 - h0
    if delta == 0:
        return "unchanged", ""
    edge = threshold * abs(h0)
    if math.isclose(abs(delta), edge, rel_tol=edge_rtol, abs_tol=0.0):
        return "unchanged", "change exactly at the threshold"
    if delta < -edge:
        return "eroded", ""
    if delta > edge:
        return "improved", ""
    return "unchanged", ""


def _failing_class(h0: float | None, h1: float | None, threshold: float,
                   edge_rtol: float) -> tuple[str, str]:
    """Class of a fail -> fail pair (values on both sides) from the two headrooms (both < 0)."""
    if h0 is None or h1 is None:
        return "unchanged", "still not passing"
    if math.isinf(h0) or math.isinf(h1):
        if math.isinf(h0) and math.isinf(h1):
            return "unchanged", "still not passing"
        closer = math.isinf(h0)
    else:
        delta = h1 - h0
        edge = threshold * abs(h0)
        if delta == 0 or abs(delta) <= edge or math.isclose(abs(delta), edge, rel_tol=edge_rtol,
                                                            abs_tol=0.0):
            return "unchanged", "still not passing"
        closer = delta > 0
    return "moved", ("still not passing, much closer to the limit" if closer
                     else "still not passing, much further from the limit")


def classify_pair(old: ResultInfo | None, new: ResultInfo | None, threshold: float = 0.25, *,
                  edge_rtol: float = 1e-9) -> Change:
    """Classify one requirement's results on an older and a newer revision.

    Parameters
    ----------
    old, new : ResultInfo or None
        The results for the same requirement (``None`` = not judged on that side; at least one
        must be given).
    threshold : float
        Fraction of the older headroom magnitude (default 0.25 = 25 %) that a passing
        requirement's headroom must lose (gain) by *more than* to be ``eroded``
        (``improved``), and that a failing one's value must move by more than to be
        ``moved``.  Must be finite and >= 0.
    edge_rtol : float
        Relative tolerance (default 1e-9) within which a change equal to the threshold is taken
        as exactly at the edge (``unchanged``), so that decimal inputs such as 0.4 -> 0.3 with
        threshold 0.25 land on the edge despite binary rounding.

    Returns
    -------
    Change
    """
    threshold = _check_threshold(threshold)
    if old is None and new is None:
        raise SpecError("classify_pair needs a result on at least one side")
    if old is not None and new is not None and old.requirement != new.requirement:
        raise SpecError(f"cannot compare requirement {old.requirement!r} with {new.requirement!r}")
    ref = new if new is not None else old
    g = lambda r, name: getattr(r, name) if r is not None else None  # noqa: E731
    h0, h1 = g(old, "headroom"), g(new, "headroom")
    hdelta = _sub(h1, h0)
    hchange = None
    if hdelta is not None and h0 is not None and h0 != 0 and math.isfinite(h0):
        hchange = hdelta / abs(h0)
    note = ""
    if old is None:
        kind, note = "new", "judged on the newer revision only"
    elif new is None:
        kind, note = "dropped", "judged on the older revision only"
    elif old.stale or new.stale or "stale" in (old.verdict, new.verdict):
        kind = "incomparable"
        side = " and ".join(n for n, r in (("older", old), ("newer", new))
                            if r.stale or r.verdict == "stale")
        note = (f"stale result on the {side} revision (judged against an older requirement or "
                "plant version); run 'loopledger verify' and compare again")
    elif (old.requirement_version, old.plant_version) != (new.requirement_version,
                                                          new.plant_version):
        kind = "incomparable"
        note = (f"judged against different versions (requirement v{old.requirement_version} "
                f"plant v{old.plant_version} vs requirement v{new.requirement_version} plant "
                f"v{new.plant_version}); run 'loopledger verify' and compare again")
    elif old.verdict == "n/a" or new.verdict == "n/a":
        kind = "unchanged" if old.verdict == new.verdict else "incomparable"
        note = "not applicable" if kind == "unchanged" else "not applicable on one revision"
    elif old.verdict == "pass" and new.verdict in _NOT_PASSING:
        kind = "broke"
        note = new.reason if new.verdict == "error" else ""
    elif old.verdict in _NOT_PASSING and new.verdict == "pass":
        kind = "fixed"
    elif old.verdict == "pass" and new.verdict == "pass":
        # a boolean (stable) has no headroom to compare: verdicts only, no threshold notes
        kind, note = (("unchanged", "") if ref.unit == "bool"
                      else _passing_class(h0, h1, threshold, edge_rtol))
    elif old.verdict == "fail" and new.verdict == "fail" and ref.unit != "bool":
        kind, note = _failing_class(h0, h1, threshold, edge_rtol)
    else:
        kind = "unchanged"
        note = "still not passing" + (f": {new.reason}" if new.verdict == "error" and new.reason else "")
    return Change(
        requirement=ref.requirement, kind=kind,
        old_verdict=g(old, "verdict"), new_verdict=g(new, "verdict"),
        old_value=g(old, "value"), new_value=g(new, "value"),
        value_delta=_sub(g(new, "value"), g(old, "value")),
        old_headroom=h0, new_headroom=h1, headroom_delta=hdelta, headroom_change=hchange,
        old_worst_variant=g(old, "worst_variant") or "", new_worst_variant=g(new, "worst_variant") or "",
        old_requirement_version=g(old, "requirement_version"),
        new_requirement_version=g(new, "requirement_version"),
        old_plant_version=g(old, "plant_version"), new_plant_version=g(new, "plant_version"),
        unit=ref.unit, limit_text=ref.limit_text, note=note,
    )


def _order(c: Change) -> tuple:
    return (CLASSES.index(c.kind), c.requirement)


def classify(old: Iterable[ResultInfo], new: Iterable[ResultInfo], threshold: float = 0.25, *,
             edge_rtol: float = 1e-9) -> tuple[Change, ...]:
    """Classify every requirement judged on either of two result lists.

    Parameters
    ----------
    old, new : iterable of ResultInfo
        Results of the older and the newer revision (one per requirement ID; a repeated ID is
        an error).
    threshold, edge_rtol : float
        See :func:`classify_pair`.

    Returns
    -------
    tuple of Change
        Regressions first (order of :data:`CLASSES`), then by requirement ID.
    """
    def index(results: Iterable[ResultInfo], side: str) -> dict[str, ResultInfo]:
        out: dict[str, ResultInfo] = {}
        for r in results:
            if r.requirement in out:
                raise SpecError(f"requirement {r.requirement!r} appears twice in the {side} results")
            out[r.requirement] = r
        return out

    a, b = index(old, "older"), index(new, "newer")
    changes = [classify_pair(a.get(k), b.get(k), threshold, edge_rtol=edge_rtol)
               for k in sorted(set(a) | set(b))]
    return tuple(sorted(changes, key=_order))


def _annotate(changes: Sequence[Change], reqs: Mapping[str, object], loop: str,
              old_label: str | None, new_label: str) -> tuple[Change, ...]:
    """Add each requirement's status and say why a side is missing."""
    out = []
    for c in changes:
        info = reqs.get(c.requirement)
        status = getattr(info, "status", "") or ""
        note = c.note
        applies = info is not None and getattr(info, "metric", None) and loop in getattr(info, "loops", ())
        if c.kind == "dropped":
            note = (f"applies but not verified on {new_label}; run 'loopledger verify --loop {loop}'"
                    if applies else "no longer applies to this loop")
        elif c.kind == "new" and old_label is not None:
            note = (f"applies but not verified on {old_label}; run 'loopledger verify --loop {loop}'"
                    if applies else note)
        out.append(replace(c, status=status, note=note))
    return tuple(out)


def diff(lg, loop: str, new_label: str | None = None, old_label: str | None = None,
         threshold: float = 0.25, *, edge_rtol: float = 1e-9) -> Diff:
    """Regressions of ``loop`` between two revisions.

    Parameters
    ----------
    lg : Ledger
    loop : str
    new_label : str, optional
        The newer revision (default: the loop's tip).
    old_label : str, optional
        The revision to compare against (default: the parent of ``new_label``; for a root
        revision nothing, so every judged requirement is ``new``).  Any two revisions of the
        loop may be compared, on one branch or across branches.
    threshold : float
        Fraction of the older headroom (default 0.25); see :func:`classify_pair`.
    edge_rtol : float
        See :func:`classify_pair`.

    Returns
    -------
    Diff
        Results are those the ledger holds (no computation here); stale ones are reported as
        ``incomparable``.

    Raises
    ------
    NotFoundError
        The loop or a revision does not exist, or the loop has no revisions.
    SpecError
        The threshold is not a finite number >= 0.
    """
    threshold = _check_threshold(threshold)
    new = lg.revision(loop, new_label)
    if old_label is None and new.parent is not None:
        old_label = new.parent
    old = lg.revision(loop, old_label) if old_label is not None else None
    new_results = lg.results(loop, new.label)
    old_results = lg.results(loop, old.label) if old is not None else []
    changes = classify(old_results, new_results, threshold, edge_rtol=edge_rtol)
    reqs = {r.key: r for r in lg.requirements()}
    changes = _annotate(changes, reqs, loop, old.label if old else None, new.label)
    return Diff(loop=loop, new=new, old=old, threshold=threshold, changes=changes)
