"""Every key binding of the terminal UI, in one place.

The help screen is generated from these tables, so it always lists every key.
"""

from __future__ import annotations

from textual.binding import Binding

__all__ = ["key_display", "APP", "MATRIX", "REQUIREMENT", "DIFF", "PLOTS", "FORM", "WAIVER_FORM",
           "HELP", "ALL"]

_DISPLAY = {"question_mark": "?", "slash": "/", "escape": "esc"}


def key_display(key: str) -> str:
    """How a key name is written for people (``question_mark`` -> ``?``)."""
    return _DISPLAY.get(key.strip(), key.strip())


#: keys that work on every view
APP = [
    Binding("ctrl+q", "quit", "Quit", priority=True),
    Binding("q", "quit", "Quit", show=False),
    Binding("1", "view('lineage')", "Lineage"),
    Binding("2", "view('matrix')", "Matrix"),
    Binding("3", "view('requirement')", "Requirement"),
    Binding("4", "view('diff')", "Diff"),
    Binding("5", "view('plots')", "Plots"),
    Binding("a", "add_revision", "Add revision"),
    Binding("r", "reload", "Reload", show=False),
    Binding("question_mark,f1", "help", "Help"),
]

MATRIX = [
    Binding("slash", "focus_filter", "Filter text"),
    Binding("s", "cycle_status", "Status filter"),
    Binding("l", "cycle_loop", "Loop filter"),
    Binding("t", "toggle_tips", "Tips only / all revisions"),
    Binding("w", "waive", "Waive the failure under the cursor", show=False),
    Binding("enter", "open_requirement", "Requirement detail", show=False),
    Binding("escape", "focus_table", "Back to table", show=False),
]

REQUIREMENT = [
    Binding("n", "step(1)", "Next requirement"),
    Binding("p", "step(-1)", "Previous requirement"),
    Binding("w", "waive", "Waive its failure on the selected revision"),
]

DIFF = [
    Binding("c", "compare", "Compare"),
]

PLOTS = [
    Binding("w", "toggle_variant", "Nominal/worst variant"),
    Binding("f", "toggle_frequency_unit", "Hz / rad/s"),
    Binding("n", "cycle_plots", "Plot rows"),
]

FORM = [
    Binding("escape", "cancel", "Cancel"),
    Binding("ctrl+s", "submit", "Record"),
    Binding("ctrl+t", "preview", "Preview regressions (records nothing)"),
]

WAIVER_FORM = [
    Binding("escape", "cancel", "Cancel"),
    Binding("ctrl+s", "submit", "Record the waiver"),
]

HELP = [
    Binding("escape,q,question_mark", "close", "Close help"),
]

#: (section title, bindings) for the help screen
ALL = [
    ("Everywhere", APP),
    ("Matrix", MATRIX),
    ("Requirement", REQUIREMENT),
    ("Diff", DIFF),
    ("Plots", PLOTS),
    ("Add-revision form", FORM),
    ("Waiver form", WAIVER_FORM),
    ("Help", HELP),
]

#: keys handled by widgets themselves, listed on the help screen too
WIDGET_KEYS = [
    ("up/down, page up/down, home/end", "move the selection in trees, tables and lists"),
    ("left/right", "move between matrix columns; fold/unfold in the lineage tree"),
    ("tab / shift+tab", "move between fields"),
    ("enter", "select (tree node, table row, list entry)"),
]
