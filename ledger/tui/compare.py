"""Regression classes between two revisions, for the diff view.

Uses ``ledger.history.diff.diff`` when that module is present; until then the classes are
derived here from the two revisions' results (same definitions as the DESIGN.md glossary):

* broke: pass -> fail; fixed: fail -> pass;
* eroded: pass -> pass with the headroom shrunk by more than ``threshold`` of the old
  headroom; improved: pass -> pass with the headroom grown by more than ``threshold``;
* unchanged: the rest with the same verdict; other: any pair involving error, stale or a
  requirement judged on only one side.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["Change", "Comparison", "CLASSES", "compare"]

CLASSES = ("broke", "fixed", "eroded", "improved", "unchanged", "other")


@dataclass(frozen=True)
class Change:
    """One requirement's change.  ``delta`` = new value - old value (metric unit)."""

    requirement: str
    kind: str
    old_verdict: str
    new_verdict: str
    old_value: float | None
    new_value: float | None
    delta: float | None
    unit: str
    limit_text: str


@dataclass(frozen=True)
class Comparison:
    loop: str
    old_label: str
    new_label: str
    changes: tuple

    def by_kind(self, kind: str) -> tuple:
        return tuple(c for c in self.changes if c.kind == kind)


def _classify(old, new, threshold: float) -> str:
    if old is None or new is None:
        return "other"
    a, b = old.verdict, new.verdict
    if a == "pass" and b == "fail":
        return "broke"
    if a == "fail" and b == "pass":
        return "fixed"
    if a != b or a not in ("pass", "fail"):
        return "other"
    if a == "pass" and old.headroom is not None and new.headroom is not None:
        ho, hn = old.headroom, new.headroom
        if math.isfinite(ho) and ho > 0 and math.isfinite(hn):
            if hn < ho * (1.0 - threshold):
                return "eroded"
            if hn > ho * (1.0 + threshold):
                return "improved"
        elif math.isfinite(ho) and not math.isfinite(hn) and hn > 0:
            return "improved"
    return "unchanged"


def _delta(old, new):
    if old is None or new is None or old.value is None or new.value is None:
        return None
    if not (math.isfinite(old.value) and math.isfinite(new.value)):
        return None
    return new.value - old.value


def compare(lg, loop: str, new_label: str | None = None, old_label: str | None = None, *,
            threshold: float = 0.25) -> Comparison:
    """Compare two revisions of ``loop``.

    Parameters
    ----------
    new_label : str, optional
        Default: the loop's tip.
    old_label : str, optional
        Default: the parent of the new revision.
    threshold : float, default 0.25
        Relative change of headroom (dimensionless) that counts as eroded or improved.
    """
    from ..errors import NotFoundError

    new = lg.revision(loop, new_label)
    if old_label is None:
        if new.parent is None:
            raise NotFoundError(f"revision {loop}/{new.label} has no parent; pick the older "
                                "revision to compare with")
        old_label = new.parent
    old = lg.revision(loop, old_label)
    ro = {r.requirement: r for r in lg.results(loop, old.label)}
    rn = {r.requirement: r for r in lg.results(loop, new.label)}
    changes = []
    for key in sorted(set(ro) | set(rn)):
        o, n = ro.get(key), rn.get(key)
        ref = n or o
        changes.append(Change(key, _classify(o, n, threshold), o.verdict if o else "n/a",
                              n.verdict if n else "n/a", o.value if o else None,
                              n.value if n else None, _delta(o, n), ref.unit, ref.limit_text))
    return Comparison(loop, old.label, new.label, tuple(changes))
