"""``loopledger results LOOP [LABEL] --why REQ``: what drives a requirement's worst value
(printing only; the computation is :func:`ledger.verification.drivers.worst_case_drivers`)."""

from __future__ import annotations

import typer

from .output import say, table

__all__ = ["print_drivers"]


def print_drivers(d) -> None:
    """The headline, the ranking table and the notes of one ``WorstCaseDrivers``."""
    from ..driversview import COLUMNS, corner_line, effect_rows, headline, method_line, summary

    say(f"what drives {headline(d)}")
    if not d.effects:
        say(f"  {d.note}", indent="    ")
        return
    line = corner_line(d)
    if line:
        say(f"  {line}", indent="    ")
    say(f"  {summary(d)}", indent="    ")
    table(COLUMNS, effect_rows(d), drop=("note", "low end -> high end", "est. error", "band"),
          quiet={"note": lambda v: not v})
    if d.note:
        say(f"  note: {d.note}", indent="    ")
    say(f"  {method_line(d)}", indent="    ")
    typer.echo("")
