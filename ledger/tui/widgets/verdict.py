"""How a verdict looks: a symbol and a word, so that colour is never the only cue."""

from __future__ import annotations

import math

from rich.text import Text

__all__ = ["SYMBOL", "STYLE", "fmt_value", "verdict_text", "cell_text", "counts_text"]

SYMBOL = {"pass": "✓", "fail": "✗", "error": "!", "stale": "~", "unverified": "?", "n/a": "·"}
STYLE = {"pass": "green", "fail": "bold red", "error": "bold magenta", "stale": "yellow dim",
         "unverified": "dim", "n/a": "dim"}


def fmt_value(value, unit: str = "") -> str:
    """A value with its unit, 4 significant digits; ``inf`` spelled out; ``-`` for none."""
    if value is None:
        return "-"
    if isinstance(value, float) and math.isinf(value):
        return "inf" if value > 0 else "-inf"
    u = f" {unit}" if unit and unit not in ("bool", "ratio") else ""
    return f"{value:.4g}{u}"


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


def cell_text(result, *, broke: bool = False, applies: bool = True) -> Text:
    """One matrix cell: symbol, verdict word, value, headroom gauge and percentage."""
    if not applies:
        return Text("· n/a", style=STYLE["n/a"])
    if result is None:
        return Text("? unverified", style=STYLE["unverified"])
    v = result.verdict
    t = Text(f"{SYMBOL.get(v, '?')} {v:<5}", style=STYLE.get(v, ""))
    if v in ("pass", "fail", "stale") and result.value is not None:
        t.append(f" {fmt_value(result.value, result.unit)}")
        hf = result.headroom_fraction
        if hf is not None and math.isfinite(hf):
            t.append(f" [{_headroom_bar(hf)}] {hf:+.0%}")
    elif v == "error":
        t.append(" cannot compute")
    if broke:
        t.append(" BROKE", style="bold reverse red")
    return t


def counts_text(counts: dict) -> Text:
    t = Text()
    for v in ("pass", "fail", "error", "stale"):
        n = counts.get(v, 0)
        t.append(f"{SYMBOL[v]}{n} ", style=STYLE[v] if n else "dim")
    return t
