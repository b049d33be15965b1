"""What drives the worst case, as text: the lines and table rows the command line, the terminal
UI and the HTML evidence show for a :class:`~ledger.verification.drivers.WorstCaseDrivers`
(values through :mod:`ledger.display`, in the limit's unit)."""

from __future__ import annotations

from .display import change_text, number, value_text

__all__ = ["COLUMNS", "headline", "method_line", "summary", "effect_rows", "corner_line"]

#: the table's columns, in order
COLUMNS = ["rank", "parameter", "band", "at worst", "change per width", "est. error",
           "worse when", "low end -> high end", "note"]


def _value(d, x) -> str:
    return value_text(x, d.unit, d.limit_text)


def _change(d, x, *, base=None) -> str:
    return change_text(d.value if base is None else base, x, d.unit, d.limit_text)


def headline(d) -> str:
    """``PZ-06 v1 (disturbance_recovery <= 0.7 s) on pipette-z/r6: worst 737.8 ms (fail) on
    corner:m-``."""
    head = f"{d.requirement} v{d.version} ({d.metric} {d.limit_text}) on {d.loop}/{d.revision}"
    if d.value is None:
        return head
    return f"{head}: worst {_value(d, d.value)} ({d.verdict}) on {d.worst_variant}"


def method_line(d) -> str:
    """How the slopes were taken (one line)."""
    return (f"slopes: central differences at the worst variant with a step of "
            f"{number(100 * d.step, 3)} % of each tolerance width, scaled to the width "
            "(value change per tolerance width); est. error = truncation (Richardson) + "
            "rounding estimate; docs/history.md")


def _no_effect(e) -> bool:
    return e.status in ("smooth", "not used") and e.per_width is not None and \
        abs(e.per_width) <= (e.rounding or 0.0)


def corner_line(d) -> str:
    """Which corner directions make it worst (a corner worst variant), or where the worst
    variant lies in the band; "" when there are no parameters."""
    dirs = d.corner_directions()
    if dirs:
        parts = []
        by_name = {e.parameter: e for e in d.effects}
        for e in (by_name[n] for n in dirs):
            word = f"{e.parameter} {dirs[e.parameter]}"
            if e.worse_when and (e.worse_when == "higher") != (e.place == "high"):
                word += " (but worse inside the band)"
            parts.append(word)
        return f"worst corner: {', '.join(parts)}"
    inside = [f"{e.parameter} {e.place}" for e in d.effects if e.status != "not used"]
    if not inside:
        return ""
    kind = {"sample": "a sample", "nominal": "the nominal plant",
            "fidelity": "a fidelity model"}.get(d.variant_kind, d.variant_kind)
    return f"the worst variant is {kind}, not a corner: {', '.join(inside)}"


def summary(d) -> str:
    """One sentence: the parameter that drives it most, or why nothing is traced."""
    if d.note and not d.effects:
        return d.note
    top = next((e for e in d.effects if e.magnitude > 0 and not _no_effect(e)), None)
    if top is None:
        stepped = [e for e in d.effects if e.status == "steps"]
        if stepped:
            e = max(stepped, key=lambda x: abs(x.across or 0.0))
            return (f"flat at the worst variant (the value moves in steps); across its band "
                    f"{e.parameter} moves it most: {_value(d, e.value_low)} at its low end, "
                    f"{_value(d, e.value_high)} at its high end")
        return "no toleranced parameter moves the worst value measurably at the worst variant"
    if top.status == "smooth":
        how = f"{_change(d, top.per_width)} per tolerance width"
    else:
        how = f"{top.status} here ({_sides(d, top)})"
    worse = f", worse when {top.parameter} is {top.worse_when}" if top.worse_when else ""
    return f"{top.parameter} drives it most: {how}{worse}"


def _sides(d, e) -> str:
    parts = []
    if e.forward is not None:
        parts.append(f"above {_change(d, e.forward)}")
    if e.backward is not None:
        parts.append(f"below {_change(d, e.backward)}")
    return ", ".join(parts) + " per width" if parts else "no slope"


def _error(d, e) -> str:
    if e.truncation is None:
        return "-"
    t = _change(d, e.truncation + (e.rounding or 0.0))
    return "±" + t.lstrip("+-")


def effect_rows(d) -> list[list[str]]:
    """One row per parameter in ranking order (see :data:`COLUMNS`)."""
    rows = []
    rank = 0
    for e in d.effects:
        if e.status == "not used":
            shown, r = "not used", "-"
        else:
            rank += 1
            r = str(rank)
            if _no_effect(e):
                shown = "0 (no measurable effect)"
            elif e.status == "smooth":
                shown = _change(d, e.per_width)
            elif e.status == "steps":
                shown = "0 here (moves in steps)"
            elif e.status in ("not smooth", "one-sided"):
                shown = f"{e.status}: {_sides(d, e)}"
            else:
                shown = e.status
        across = "-"
        if e.value_low is not None and e.value_high is not None:
            across = f"{_value(d, e.value_low)} -> {_value(d, e.value_high)}"
            if e.other_corner_variant:
                across += f" ({e.other_corner_variant} cached)"
        at = e.place if e.place in ("low", "high", "nominal") else f"inside ({number(e.at)})"
        rows.append([r, e.parameter, f"{number(e.low)} .. {number(e.high)}", at, shown,
                     _error(d, e), e.worse_when or "-", across, e.note])
    return rows
