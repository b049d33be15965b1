"""Help screen: every key, generated from :mod:`ledger.tui.bindings`."""

from __future__ import annotations

from rich.text import Text

from ...history.matrix import CAUTION
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Static

from .. import bindings

__all__ = ["HelpScreen", "help_text"]


def help_text() -> Text:
    t = Text()
    t.append("loopledger terminal UI: keys\n\n", style="bold")
    for title, table in bindings.ALL:
        t.append(f"{title}\n", style="bold underline")
        for b in table:
            keys = ", ".join(bindings.key_display(k) for k in b.key.split(","))
            t.append(f"  {keys:<28} {b.description}\n")
        t.append("\n")
    t.append("Inside lists and tables\n", style="bold underline")
    for keys, what in bindings.WIDGET_KEYS:
        t.append(f"  {keys:<28} {what}\n")
    t.append("\nVerdicts: ✓ pass  ✗ fail  ! error  ~ stale  ? unverified  · n/a  "
             "W waived (a fail or error a live waiver covers)\n")
    t.append(f"\nCaution: {CAUTION}\n", style="italic")
    return t


class HelpScreen(ModalScreen[None]):
    """Lists every key binding."""

    BINDINGS = bindings.HELP

    def compose(self):
        with VerticalScroll(id="help"):
            yield Static(help_text(), id="help-text")

    def action_close(self) -> None:
        self.dismiss(None)
