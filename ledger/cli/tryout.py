"""``loopledger try``: a dry run of one or more candidate controllers against a recorded
revision, recording nothing (``Ledger.try_revision``)."""

from __future__ import annotations

from typing import List, Optional

import typer

from .common import CAUTION, JSON_OPTION, WIDE_OPTION, emit_json, errors_to_exit, open_ledger, set_wide
from .history import print_changes
from .output import say, table

__all__ = ["commands", "try_cmd", "side_by_side_rows"]

#: top-level commands (``try``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()

_MARK = {"pass": "pass", "fail": "FAIL", "error": "ERROR", "stale": "stale", "n/a": "n/a"}


def _cell(r) -> str:
    from ..display import headroom_text, value_text

    if r is None:
        return "-"
    head = headroom_text(r.value, r.headroom, r.headroom_fraction, r.unit, r.limit_text,
                         relative=False)
    text = f"{_MARK.get(r.verdict, r.verdict)} {value_text(r.value, r.unit, r.limit_text)}"
    return text + (f" ({head})" if head != "-" else "")


def side_by_side_rows(rep) -> tuple[list[str], list[list[str]]]:
    """Columns and rows of the requirement x candidate table: verdict, worst value and
    headroom in each cell; the reference revision first."""
    ref_label = rep.against.label if rep.against is not None else None
    keys = sorted({r.requirement for c in rep.candidates for r in c.results})
    by_cand = [{r.requirement: r for r in c.results} for c in rep.candidates]
    ref = {}
    if rep.against is not None:
        # the reference's own results, as the changes carry them (old side)
        for c in rep.candidates[0].changes:
            ref[c.requirement] = c
    cols = ["ID", "limit"] + ([ref_label] if ref_label else []) + [c.name for c in rep.candidates]
    rows = []
    for k in keys:
        limit = next((m[k].limit_text for m in by_cand if k in m), "-")
        row = [k, limit]
        if ref_label:
            ch = ref.get(k)
            row.append(_old_cell(ch))
        row += [_cell(m.get(k)) for m in by_cand]
        rows.append(row)
    return cols, rows


def _old_cell(ch) -> str:
    from ..display import value_text

    if ch is None or ch.old_verdict is None:
        return "-"
    return f"{_MARK.get(ch.old_verdict, ch.old_verdict)} {value_text(ch.old_value, ch.unit, ch.limit_text)}"


def _json(rep) -> dict:
    return {
        "loop": rep.loop, "against": rep.against.label if rep.against else None,
        "threshold": rep.threshold, "breaks_nothing": list(rep.safe),
        "candidates": [{"name": c.name, "controller": c.controller,
                        "breaks_nothing": c.breaks_nothing, "computed": c.computed,
                        "broken": [x.requirement for x in c.broken],
                        "regressions": [x.requirement for x in c.regressions],
                        "counts": c.counts(), "results": list(c.results),
                        "changes": list(c.changes)} for c in rep.candidates],
        "recorded": False,
    }


@commands.command("try")
@errors_to_exit
def try_cmd(loop: str = typer.Argument(..., help="Loop name."),
            controllers: List[str] = typer.Argument(..., metavar="CONTROLLER...",
                                                    help="Candidate controller text(s)."),
            against: Optional[str] = typer.Option(None, "--against", metavar="LABEL",
                                                  help="Compare with this revision (default: the loop's tip)."),
            threshold: float = typer.Option(0.25, "--threshold", help="Fraction of the reference headroom beyond which a change counts as eroded or improved."),
            as_json: bool = JSON_OPTION, wide: bool = WIDE_OPTION):
    """Dry run: verify candidate controllers over the whole plant family and show what each
    changes against the tip (or --against), recording nothing.  Several candidates give a
    requirement x candidate table and name those that break nothing.  Recording a tried
    candidate afterwards with 'revision add' reuses the values computed here."""
    from .revisions import print_results

    set_wide(wide)
    with open_ledger() as lg:
        rep = lg.try_revision(loop, controllers, against=against, threshold=threshold)
    if as_json:
        return emit_json(_json(rep))
    ref = rep.against
    ref_name = f"{'revision' if against else 'tip'} {ref.label}" if ref else None
    for c in rep.candidates:
        typer.echo(f"candidate {c.name}: {c.controller}")
    if len(rep.candidates) == 1:
        c = rep.candidates[0]
        if ref is None:
            typer.echo(f"{loop} has no revision yet: nothing to compare against")
        else:
            print_changes(c, f"candidate {c.name}", ref_name)
        print_results(list(c.results), f"verdicts for candidate {c.name} on {loop} (not recorded)")
    else:
        cols, rows = side_by_side_rows(rep)
        title = f"candidates on {loop}" + (f" against {ref_name}" if ref else "")
        table(cols, rows, title=title, drop=("limit",))
        for c in rep.candidates:
            if ref is None:
                counts = {}
                for r in c.results:
                    counts[r.verdict] = counts.get(r.verdict, 0) + 1
                typer.echo(f"  {c.name}: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())))
            elif c.breaks_nothing:
                er = [x.requirement for x in c.regressions]
                typer.echo(f"  {c.name}: breaks nothing" + (f" (eroded: {', '.join(er)})" if er else ""))
            else:
                typer.echo(f"  {c.name}: breaks {', '.join(x.requirement for x in c.broken)}")
        if ref is not None:
            typer.echo("breaks nothing: " + (", ".join(rep.safe) or "none of them"))
    typer.echo("nothing recorded; 'loopledger revision add' records a candidate without "
               "computing again")
    say(CAUTION)
