"""How a verdict looks: a symbol and a word, so that colour is never the only cue."""

from __future__ import annotations

import math

from rich.text import Text

__all__ = ["SYMBOL", "STYLE", "fmt_value", "verdict_text", "cell_text", "detail_text",
           "counts_text", "waiver_text"]

SYMBOL = {"pass": "✓", "fail": "✗", "error": "!", "stale": "~", "unverified": "?", "n/a": "·",
          "waived": "W"}
STYLE = {"pass": "green", "fail": "bold red", "error": "bold magenta", "stale": "yellow dim",
         "unverified": "dim", "n/a": "dim", "waived": "bold cyan"}


def fmt_value(value, unit: str = "", limit_text: str = "") -> str:
    """A value in the limit's unit (``ledger.display``); ``inf`` spelled out; ``-`` for none."""
    from ...display import value_text

    return value_text(value, unit, limit_text)


def verdict_text(verdict: str) -> Text:
    return Text(f"{SYMBOL.get(verdict, '?')} {verdict}", style=STYLE.get(verdict, ""))


def _headroom_bar(fraction) -> str:
    """Headroom as a word-free gauge: ``+++`` plenty (>= 50 %), ``++`` (>= 20 %), ``+`` (>= 0),
    ``-`` short by < 20 %, ``--`` by more."""
    if fraction is None or (isinstance(fraction, float) and math.isnan(fraction)):
        return ""
    if fraction >= 0.5:
        return "+++"
    if fraction >= 0.2:
        return "++"
    if fraction >= 0:
        return "+"
    return "-" if fraction > -0.2 else "--"


def waiver_text(w) -> str:
    """A waiver in one line: number, approver, role, reason, until when."""
    return f"waiver {w.id} by {w.approver} ({w.role}), {w.until()}: {w.reason}"


def cell_text(result, *, broke: bool = False, applies: bool = True, waiver=None) -> Text:
    """One matrix cell, narrow: symbol and the value's number in the limit's unit (the row
    shows the limit, hence the unit; ``BROKE`` after it when the requirement broke here).
    Verdict word, unit, headroom and worst variant are in the detail line under the table
    (:func:`detail_text`) for the cell under the cursor."""
    from ...display import value_number

    if not applies:
        return Text("·", style=STYLE["n/a"])
    if result is None:
        return Text("?", style=STYLE["unverified"])
    v = result.verdict
    shown = "waived" if waiver is not None else v  # a waived failure: its own symbol
    t = Text(SYMBOL.get(shown, "?"), style=STYLE.get(shown, ""))
    if v in ("pass", "fail", "stale") and result.value is not None:
        t.append(f" {value_number(result.value, result.unit, result.limit_text)}")
    elif v == "error":
        t.append(" error")
    if broke:
        t.append(" BROKE", style="bold reverse red")
    return t


def detail_text(key: str, where: str, result, *, broke: bool = False,
                applies: bool = True, waiver=None) -> Text:
    """The detail line of the cell under the cursor: verdict, value, limit, headroom (in the
    limit's unit, with the gauge), worst variant, pass fraction, reason."""
    from ...display import headroom_text

    t = Text(f"{key} on {where}: ", style="bold")
    if not applies:
        return t.append("does not apply (n/a)", style=STYLE["n/a"])
    if result is None:
        return t.append("unverified: run verify", style=STYLE["unverified"])
    if waiver is not None:
        t.append_text(verdict_text("waived"))
        t.append(f" ({result.verdict}, {waiver_text(waiver)})", style=STYLE["waived"])
    else:
        t.append_text(verdict_text(result.verdict))
    if broke:
        t.append(" BROKE (the parent revision passed)", style="bold red")
    if result.value is not None:
        t.append(f"  value {fmt_value(result.value, result.unit, result.limit_text)}"
                 f"  limit {result.limit_text}")
        head = headroom_text(result.value, result.headroom, result.headroom_fraction,
                             result.unit, result.limit_text)
        hf = result.headroom_fraction
        # gauge: +++ >= 50 %, ++ >= 20 %, + >= 0, - short < 20 %, -- short more
        gauge = f" [{_headroom_bar(hf)}]" if hf is not None and math.isfinite(hf) else ""
        t.append(f"  headroom {head}{gauge}")
    if result.worst_variant:
        t.append(f"  worst {result.worst_variant}")
    if result.pass_fraction is not None and result.variants:
        t.append(f"  {result.pass_fraction:.0%} of {result.variants} variants pass")
        from ...yieldbound import bound_text

        bound = bound_text(result)
        if bound not in ("-", "no samples"):
            t.append(f"  yield bound {bound}")
        if result.yield_target is not None:
            from ...yieldbound import yield_text

            t.append(f"  target {yield_text(result.yield_target, result.confidence)}"
                     f" (needs {result.samples_needed} passing)")
    if result.reason:
        t.append(f"  {result.reason}", style="dim")
    return t


def counts_text(counts: dict) -> Text:
    t = Text()
    for v in ("pass", "fail", "error", "stale"):
        n = counts.get(v, 0)
        t.append(f"{SYMBOL[v]}{n} ", style=STYLE[v] if n else "dim")
    return t
