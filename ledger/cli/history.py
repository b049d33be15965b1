"""``loopledger diff`` (regressions between two revisions), ``since`` (first failing
revision) and ``trace`` (requirement tree with roll-up, coverage gaps, orphans); plus
:func:`print_regressions`, which ``revision add`` calls to show what a new revision changed
against its parent.
"""

from __future__ import annotations

from enum import Enum
from typing import Optional

import typer

from .common import (CAUTION, JSON_OPTION, WIDE_OPTION, emit_json, errors_to_exit, open_ledger,
                     set_wide)
from .output import say, short, short_variant, table

__all__ = ["commands", "diff_cmd", "since_cmd", "trace_cmd", "print_regressions",
           "EXIT_REGRESSION", "ExitOn", "exit_status", "diff_rows", "trace_lines", "print_changes"]

#: top-level commands (``diff``, ``since``, ``trace``), added to the root by
#: ``ledger/cli/__init__.py``
commands = typer.Typer()

#: exit status of ``loopledger diff --exit-on ...`` when the condition holds
EXIT_REGRESSION = 3


class ExitOn(str, Enum):
    """What ``--exit-on`` exits with status 3 on."""

    broke = "broke"
    approved_broke = "approved-broke"
    any = "any"


def _fmt(value, unit: str, limit_text: str = "") -> str:
    from ..display import value_text

    return value_text(value, unit, limit_text)


def _delta(c) -> str:
    from ..display import headroom_delta_text

    if c.headroom_delta is None:
        return "-"
    both_pass = c.old_verdict == "pass" and c.new_verdict == "pass"
    change = c.headroom_change if (both_pass or c.kind == "moved") else None
    return headroom_delta_text(c.old_value, c.new_value, c.old_headroom, c.new_headroom,
                               c.unit, c.limit_text, change)


def _versions(c) -> str:
    a = c.old_requirement_version
    b = c.new_requirement_version
    if a is None or b is None or a == b:
        return f"v{a if b is None else b}"
    return f"v{a}->v{b}"


def diff_rows(changes) -> list[list[str]]:
    """Table rows for a sequence of :class:`~ledger.history.diff.Change`."""
    rows = []
    for c in changes:
        worst = c.old_worst_variant or "-"
        if c.new_worst_variant and c.new_worst_variant != c.old_worst_variant:
            worst = f"{c.old_worst_variant or '-'} -> {c.new_worst_variant}"
        rows.append([
            c.requirement, c.kind.upper() if c.kind in ("broke", "eroded") else c.kind,
            f"{c.old_verdict or '-'} -> {c.new_verdict or '-'}",
            _fmt(c.old_value, c.unit, c.limit_text), _fmt(c.new_value, c.unit, c.limit_text),
            c.limit_text or "-",
            _delta(c), worst, _versions(c), c.note,
        ])
    return rows


_DIFF_COLS = ["ID", "change", "verdict", "old value", "new value", "limit", "headroom change",
              "worst variant", "req", "note"]


# taken out first when the terminal is narrow (shown in detail lines under the table)
_DIFF_DROP = ("note", "req", "worst variant", "verdict")


def _same_sides(v: str) -> bool:
    a, _, b = v.partition(" -> ")
    return not b or a == b


def _diff_table(rows, title=None) -> None:
    table(_DIFF_COLS, rows, title=title, drop=_DIFF_DROP,
          shorten={"worst variant": short_variant},
          quiet={"verdict": _same_sides, "req": _same_sides})


def _diff_json(d) -> dict:
    return {
        "loop": d.loop, "new": d.new.label, "old": d.old.label if d.old else None,
        "threshold": d.threshold, "counts": d.counts(), "changes": list(d.changes),
        "design": [{"part": p, "old": a, "new": b} for p, a, b in d.design_changes],
    }


def _design_lines(d) -> None:
    """What the design changed, the old and the new text on lines of their own (shortened to
    the terminal width)."""
    from .output import short, width

    n = max(20, (width() or 10_000) - 16)
    for part, a, b in d.design_changes:
        typer.echo(f"  {part} was  {short(a, n)}")
        typer.echo(f"  {' ' * len(part)} now  {short(b, n)}")


def _counts_line(d) -> str:
    from ..history.diff import CLASSES

    counts = d.counts()
    return ", ".join(f"{counts[k]} {k}" for k in CLASSES if k in counts) or "nothing judged"


def print_regressions(lg, loop: str, label: str) -> object:
    """Print what revision ``label`` of ``loop`` changed against its parent.

    Only the requirements whose class is not ``unchanged`` are listed, regressions first.
    Called by ``loopledger revision add`` after a revision is recorded and verified.

    Returns
    -------
    Diff
    """
    from ..history.diff import diff

    d = diff(lg, loop, label)
    if d.old is None:
        typer.echo(f"{loop}/{d.new.label} is a root revision: no parent to compare against")
        return d
    print_changes(d, f"{loop}/{d.new.label}", f"parent {d.old.label}")
    return d


def print_changes(d, new_name: str, old_name: str) -> None:
    """The regression table of ``d`` (anything with ``changes``, ``threshold`` and
    ``counts()``: a Diff, or a dry-run candidate): only what is not ``unchanged``."""
    moved = [c for c in d.changes if c.kind != "unchanged"]
    if not moved:
        typer.echo(f"against {old_name}: no change beyond {d.threshold:.0%} of headroom "
                   f"({_counts_line(d)})")
        return
    _diff_table(diff_rows(moved), title=f"changes of {new_name} against {old_name}")
    typer.echo("  " + _counts_line(d))


def exit_status(d, exit_on: Optional[ExitOn]) -> int:
    """:data:`EXIT_REGRESSION` when diff ``d`` holds what ``exit_on`` asks for, else 0."""
    if exit_on is None:
        return 0
    if exit_on is ExitOn.broke:
        hit = d.of("broke")
    elif exit_on is ExitOn.approved_broke:
        hit = tuple(c for c in d.of("broke") if c.status == "approved")
    else:
        hit = d.regressions
    return EXIT_REGRESSION if hit else 0


def trace_lines(t) -> list[str]:
    """The rolled-up tree as indented text lines."""
    lines = []
    for root in t.roots:
        for depth, n in root.walk():
            r = n.requirement
            head = f"{'   ' * depth}{'- ' if depth else ''}{r.key}  [{n.state}]  {r.title}"
            if r.status != "approved":
                head += f"  ({r.status})"
            lines.append(head)
            for v in n.verdicts:
                res = v.result
                value = _fmt(res.value, res.unit, res.limit_text) if res is not None else "-"
                where = f"{v.loop}/{v.revision}" if v.revision else v.loop
                lines.append(f"{'   ' * depth}{'  ' if depth else ''}    {where}: {v.verdict}  "
                             f"{r.metric} {value} (limit {r.limit_text})")
            if r.metric and not n.verdicts:
                lines.append(f"{'   ' * depth}{'  ' if depth else ''}    no loop to judge it on")
    return lines


def _trace_json(t) -> dict:
    def node(n) -> dict:
        r = n.requirement
        return {
            "key": r.key, "version": r.version, "title": r.title, "status": r.status,
            "metric": r.metric, "limit": r.limit_text or None, "own_state": n.own_state,
            "state": n.state,
            "verdicts": [{"loop": v.loop, "revision": v.revision, "verdict": v.verdict,
                          "value": v.result.value if v.result else None,
                          "unit": v.result.unit if v.result else r.unit,
                          "headroom": v.result.headroom if v.result else None}
                         for v in n.verdicts],
            "children": [node(c) for c in n.children],
        }

    return {"tree": [node(r) for r in t.roots], "counts": t.counts(), "gaps": list(t.gaps),
            "orphans": list(t.orphans), "generated_at": t.generated_at, "caution": t.caution}


@commands.command("diff")
@errors_to_exit
def diff_cmd(
    loop: str = typer.Argument(..., help="Loop name."),
    new: Optional[str] = typer.Argument(None, help="Newer revision label (default: the tip)."),
    old: Optional[str] = typer.Argument(None, help="Older revision label (default: the parent of NEW)."),
    threshold: float = typer.Option(0.25, "--threshold", min=0.0,
                                    help="Fraction of the older headroom a passing requirement must lose (gain) by more than to count as eroded (improved); a failing one that moves by more than it is 'moved'."),
    as_json: bool = JSON_OPTION,
    show_all: bool = typer.Option(False, "--all", help="List unchanged requirements too."),
    exit_on: Optional[ExitOn] = typer.Option(None, "--exit-on", case_sensitive=False,
                                             help="Exit with status 3 when a requirement broke ('broke'), an approved one broke ('approved-broke'), or anything broke or eroded ('any')."),
    wide: bool = WIDE_OPTION,
):
    """Regressions between two revisions of a loop, requirement by requirement: broke,
    eroded, fixed, improved, moved (still failing, large move), new, dropped,
    incomparable, unchanged."""
    from ..history.diff import diff

    set_wide(wide)
    with open_ledger() as lg:
        d = diff(lg, loop, new, old, threshold)
    code = exit_status(d, exit_on)
    if as_json:
        emit_json(_diff_json(d))
    else:
        against = f"{d.old.label}" + (" (parent)" if d.old and d.old.label == d.new.parent else "") \
            if d.old else "nothing (root revision)"
        say(f"loop {loop}: {d.new.label} against {against}, threshold {d.threshold:.0%} of headroom")
        _design_lines(d)
        shown = d.changes if show_all else tuple(c for c in d.changes if c.kind != "unchanged")
        if shown:
            _diff_table(diff_rows(shown))
        typer.echo("  " + _counts_line(d))
        say(CAUTION)
    if code:
        raise typer.Exit(code)


@commands.command("since")
@errors_to_exit
def since_cmd(
    loop: str = typer.Argument(..., help="Loop name."),
    requirement: str = typer.Argument(..., help="Requirement ID."),
    label: Optional[str] = typer.Argument(None, help="Revision to start from (default: the tip)."),
    as_json: bool = JSON_OPTION,
):
    """Find the revision where a requirement's current failing run began (walking back
    through the parents), with that revision's rationale."""
    from ..history.since import first_failing

    with open_ledger() as lg:
        run = first_failing(lg, loop, requirement, label)
        revs = {r.label: r for r in lg.ancestry(loop, run.label)}
        results = {lbl: next((x for x in lg.results(loop, lbl) if x.requirement == requirement), None)
                   for lbl in run.run}
    if as_json:
        emit_json({"loop": run.loop, "requirement": run.requirement,
                   "label": run.label, "state": run.state,
                   "first": run.first.label if run.first else None,
                   "first_rationale": run.first.rationale if run.first else None,
                   "run": list(run.run), "since_root": run.since_root,
                   "boundary": run.boundary.label if run.boundary else None,
                   "boundary_verdict": run.boundary_verdict,
                   "certain": run.certain, "summary": run.summary()})
        return
    typer.echo(run.summary())
    if run.run:
        rows = []
        for lbl in run.run:
            res = results[lbl]
            rows.append([lbl, res.verdict if res else "-",
                         _fmt(res.value, res.unit, res.limit_text) if res else "-",
                         res.worst_variant if res and res.worst_variant else "-",
                         short(revs[lbl].rationale, 60)])
        table(["revision", "verdict", "worst value", "worst variant", "rationale"],
              rows, title=f"failing run of {requirement} on {loop}, oldest first")


@commands.command("trace")
@errors_to_exit
def trace_cmd(as_json: bool = JSON_OPTION, wide: bool = WIDE_OPTION):
    """The requirement tree (system needs down to loop requirements) with each loop tip's
    verdicts rolled up (satisfied, incomplete, violated), then coverage gaps and orphans."""
    from ..history.trace import build_trace

    set_wide(wide)
    with open_ledger() as lg:
        t = build_trace(lg)
    if as_json:
        emit_json(_trace_json(t))
        return
    if not t.roots:
        typer.echo("no live requirements")
    for line in trace_lines(t):
        say(line, indent="    ")
    counts = t.counts()
    typer.echo("  " + ", ".join(f"{counts[s]} {s}" for s in ("satisfied", "incomplete", "violated")
                                if s in counts))
    if t.gaps:
        table(["ID", "gap", "loop", "revision", "detail"],
              [[g.requirement, g.kind, g.loop or "-", g.revision or "-", g.detail]
               for g in t.gaps], title="coverage gaps")
    else:
        typer.echo("no coverage gaps")
    if t.orphans:
        table(["ID", "retired parents"],
              [[o.requirement, ", ".join(o.retired_parents)] for o in t.orphans],
              title="orphans (derived from a retired requirement)")
    say(CAUTION)
