"""Terminal output of the command line: tables that fit the terminal width (with detail lines
for the columns left out), wrapped lines, short forms of long cells.

The width is ``--wide`` (no limit), else ``$COLUMNS``, else the terminal's when the output is
one, else 160 columns (:func:`width`).
"""

from __future__ import annotations

import sys

import typer

from .. import config
from .common import state

__all__ = ["width", "say", "table", "short", "short_variant"]


def width() -> int | None:
    """Terminal width for tables and wrapped lines (``None``: no limit, ``--wide``)."""
    import shutil

    if state.wide:
        return None
    env = config.columns()
    if env > 0:
        return env
    return shutil.get_terminal_size((160, 24)).columns if sys.stdout.isatty() else 160


def _console():
    from rich.console import Console

    w = width()
    return Console(soft_wrap=False, highlight=False, width=w or 100_000)


def say(text: str, indent: str = "") -> None:
    """Echo ``text`` wrapped to the terminal width (continuation lines indented)."""
    import textwrap

    w = width()
    for line in str(text).splitlines() or [""]:
        if w is None or len(line) <= w:
            typer.echo(line)
            continue
        lead = line[:len(line) - len(line.lstrip())]
        typer.echo("\n".join(textwrap.wrap(line, width=w, initial_indent="",
                                            subsequent_indent=lead + (indent or "  "),
                                            break_long_words=True, break_on_hyphens=False)))


def short_variant(text: str) -> str:
    """Plant variant names shortened for narrow tables: ``corner:mp+`` -> ``mp+``,
    ``sample:0007`` -> ``#0007``, ``fidelity:full-order`` -> ``full-order``."""
    import re

    text = re.sub(r"\bsample:", "#", text or "")
    return re.sub(r"\b(corner|fidelity):", "", text)


def short(text: str, n: int = 60) -> str:
    """The first line of ``text``, cut to ``n`` characters with an ellipsis."""
    line = (text or "").strip().splitlines()[0] if (text or "").strip() else ""
    return line if len(line) <= n else line[: n - 1] + "…"


def table(columns: list[str], rows: list[list[str]], title: str | None = None, *,
          drop: tuple[str, ...] = (), shorten: dict | None = None,
          quiet: dict | None = None) -> None:
    """Print a table that fits the terminal width.

    When the table is wider than the terminal (and ``--wide`` is not given), first the
    columns in ``shorten`` get their short form (``{column: function}``), then the columns
    named in ``drop`` are taken out in that order until it fits; what they held is printed
    below the table, one detail line per row (keyed by the first column), so nothing is lost,
    except values ``quiet[column](value)`` calls unremarkable (e.g. a 100 % pass fraction); a
    value every row (of three or more) shares is said once, on an ``every row:`` line.
    Cells still too wide are wrapped inside their column.
    """
    from rich import box
    from rich.measure import Measurement
    from rich.table import Table

    from ..text import printable

    console = _console()
    w = width()
    # stored text may hold ESC sequences: shown as \uXXXX, never sent raw
    rows = [[printable(str(x)) for x in r] for r in rows]

    def build(keep):
        t = Table(title=title, show_lines=False, header_style="bold",
                  box=box.HEAVY_HEAD if w is None else box.SIMPLE_HEAD,
                  pad_edge=w is None, show_edge=w is None,
                  collapse_padding=w is not None)
        for j, c in enumerate(columns):
            if j in keep:
                t.add_column(c, overflow="fold")
        for r in rows:
            t.add_row(*[r[j] for j in keep])
        return t

    keep = list(range(len(columns)))
    if w is not None:  # a column empty in every row says nothing
        keep = [j for j in keep if j == 0 or any(r[j] not in ("",) for r in rows)] or keep
    t = build(keep)
    hidden: list[int] = []
    if w is not None:
        wide_open = console.options.update_width(1_000_000)
        full = [list(r) for r in rows]
        if shorten and Measurement.get(console, wide_open, t).maximum > w:
            for name, fn in shorten.items():
                if name in columns:
                    j = columns.index(name)
                    for r in rows:
                        r[j] = fn(r[j])
            t = build(keep)
        for name in drop:
            if Measurement.get(console, wide_open, t).maximum <= w:
                break
            if name in columns and columns.index(name) in keep:
                j = columns.index(name)
                keep.remove(j)
                hidden.append(j)
                t = build(keep)
    console.print(t)
    if hidden:
        quiet = quiet or {}

        def notable(j, x):
            return x not in ("", "-") and not (columns[j] in quiet and quiet[columns[j]](x))

        # a hidden column with one notable value in every row (of three or more) is said once
        same = [j for j in sorted(hidden) if len(full) >= 3
                and len({r[j] for r in full}) == 1 and notable(j, full[0][j])]
        for r in full:
            parts = [f"{columns[j]} {r[j]}" for j in sorted(hidden) if j not in same
                     and notable(j, r[j])]
            if parts:
                say(f"  {r[0]}: " + "; ".join(parts), indent="      ")
        if same:
            say("  every row: " + "; ".join(f"{columns[j]} {full[0][j]}" for j in same),
                indent="      ")
        say(f"  (not in the table: {', '.join(columns[j] for j in sorted(hidden))}; "
            "their notable values are above; --wide shows every column)")
