"""Modal form that records a waiver of one requirement's failing (or error) verdict on one
revision: reason, approver, role, and an expiry date and/or a condition (``Ledger.add_waiver``;
the rules are in ``ledger.waivers``).  A refused waiver shows its one-line error in the form
and records nothing."""

from __future__ import annotations

from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Label, Static

from ...errors import LedgerError
from ...history.matrix import CAUTION
from .. import bindings

__all__ = ["WaiverForm"]


class WaiverForm(ModalScreen[int | None]):
    """Reason, approver, role, expiry and condition of a waiver of ``requirement`` on
    ``loop``/``label``; dismissed with the new waiver's number (``None`` when cancelled).

    Parameters
    ----------
    requirement, loop, label : str
        The cell waived.
    verdict : str
        Its verdict now (shown; a waiver covers ``fail`` and ``error`` only).
    """

    BINDINGS = bindings.WAIVER_FORM

    def __init__(self, requirement: str, loop: str, label: str, verdict: str = ""):
        super().__init__()
        self.requirement, self.loop, self.label, self.verdict = requirement, loop, label, verdict

    def compose(self):
        with Vertical(id="form"):
            yield Label(f"Waive {self.requirement} on {self.loop}/{self.label}"
                        + (f" ({self.verdict})" if self.verdict else ""), id="form-title")
            yield Static("A waiver covers a fail or error verdict; the cell then shows "
                         "'waived' (never pass) until it expires or is withdrawn.",
                         id="form-parent-note")
            yield Label("reason: why the deviation is acceptable")
            yield Input(placeholder="required", id="waiver-reason")
            yield Label("approver")
            yield Input(placeholder="required", id="waiver-approver")
            yield Label("approver's role")
            yield Input(placeholder="required, e.g. controls lead", id="waiver-role")
            yield Label("last day it counts (YYYY-MM-DD; empty: no date)")
            yield Input(placeholder="e.g. 2027-03-31", id="waiver-expires")
            yield Label("condition (free text; optional)")
            yield Input(placeholder="e.g. until the next hardware build", id="waiver-condition")
            yield Static("", id="form-error")
            yield Static(f"Caution: {CAUTION}", id="waiver-caution")
            with Horizontal(id="form-buttons"):
                yield Button("Record waiver (ctrl+s)", variant="primary", id="waiver-ok")
                yield Button("Cancel (esc)", id="waiver-cancel")

    def on_mount(self) -> None:
        self.query_one("#waiver-reason", Input).focus()

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "waiver-ok":
            self.action_submit()
        else:
            self.action_cancel()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        self.focus_next()

    def action_cancel(self) -> None:
        self.dismiss(None)

    def value(self, name: str) -> str:
        return self.query_one(f"#waiver-{name}", Input).value

    def action_submit(self) -> None:
        try:
            w = self.app.lg.add_waiver(
                self.requirement, loop=self.loop, revision=self.label,
                reason=self.value("reason"), approver=self.value("approver"),
                role=self.value("role"), expires=self.value("expires").strip() or None,
                condition=self.value("condition"))
        except LedgerError as e:
            self.query_one("#form-error", Static).update(f"✗ {e}")
            return
        self.dismiss(w.id)
