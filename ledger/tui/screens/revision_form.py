"""Modal form that records a controller revision; verification runs in a worker."""

from __future__ import annotations

from dataclasses import dataclass

from textual import work
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Label, ProgressBar, Static

from ...errors import LedgerError
from .. import bindings

__all__ = ["RevisionForm", "Recorded"]


@dataclass(frozen=True)
class Recorded:
    """What the form hands back when a revision was recorded."""

    loop: str
    label: str


class RevisionForm(ModalScreen[Recorded | None]):
    """Controller text, parent and rationale for a new revision of ``loop``."""

    BINDINGS = bindings.FORM

    def __init__(self, loop: str, parent: str | None):
        super().__init__()
        self.loop = loop
        self.parent_label = parent
        self.busy = False

    def compose(self):
        with Vertical(id="form"):
            yield Label(f"New revision of loop {self.loop}", id="form-title")
            yield Label("controller (model text)")
            yield Input(placeholder="e.g. pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", id="form-controller")
            yield Label("parent revision (empty: new root)")
            yield Input(self.parent_label or "", id="form-parent")
            yield Label("rationale: why this change")
            yield Input(placeholder="required", id="form-rationale")
            yield Static("", id="form-error")
            yield ProgressBar(total=None, show_eta=False, id="form-progress")
            with Horizontal(id="form-buttons"):
                yield Button("Record and verify (ctrl+s)", variant="primary", id="form-ok")
                yield Button("Cancel (esc)", id="form-cancel")

    def on_mount(self) -> None:
        self.query_one("#form-progress").display = False
        self.query_one("#form-controller", Input).focus()

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "form-ok":
            self.action_submit()
        else:
            self.action_cancel()

    def on_input_submitted(self, event: Input.Submitted) -> None:
        self.focus_next()

    def action_cancel(self) -> None:
        if not self.busy:
            self.dismiss(None)

    def action_submit(self) -> None:
        if self.busy:
            return
        self.busy = True
        self.query_one("#form-error", Static).update("")
        self.query_one("#form-progress").display = True
        self.query_one("#form-ok", Button).disabled = True
        self._record(self.query_one("#form-controller", Input).value,
                     self.query_one("#form-parent", Input).value.strip() or None,
                     self.query_one("#form-rationale", Input).value)

    @work(thread=True, exclusive=True, group="record")
    def _record(self, controller: str, parent: str | None, rationale: str) -> None:
        try:
            info = self.app.lg.add_revision(self.loop, controller, rationale=rationale,
                                            parent=parent)
        except LedgerError as e:
            self.app.call_from_thread(self._failed, str(e))
            return
        self.app.call_from_thread(self.dismiss, Recorded(info.loop, info.label))

    def _failed(self, message: str) -> None:
        self.busy = False
        self.query_one("#form-progress").display = False
        self.query_one("#form-ok", Button).disabled = False
        self.query_one("#form-error", Static).update(f"✗ {message}")
