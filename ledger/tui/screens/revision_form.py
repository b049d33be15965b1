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


def parent_note(loop: str, parent: str | None, tip: str | None) -> str:
    """One line saying where the new revision goes: after the tip, on a branch, or as a root."""
    if not parent:
        return (f"no parent: starts a new root of loop {loop}"
                + (f" (its tip is {tip})" if tip else ""))
    if parent == tip:
        return f"parent {loop}/{parent}: the tip of loop {loop}"
    return f"parent {loop}/{parent} is not the tip ({tip or 'none'}): this starts a branch"


def anti_windup_field(text: str) -> tuple[str, float | None]:
    """The form's anti-windup field: ``""``/``none``, ``clamping``, ``back-calculation 50``."""
    from ...errors import ModelError

    parts = (text or "").split()
    if not parts:
        return "none", None
    if len(parts) == 2 and parts[0] == "back-calculation":
        try:
            return parts[0], float(parts[1])
        except ValueError as e:
            raise ModelError(f"anti-windup gain {parts[1]!r} is not a number (1/s)") from e
    if len(parts) == 1:
        return parts[0], None
    raise ModelError(f"anti-windup {text!r}: write none, clamping or back-calculation GAIN")


class RevisionForm(ModalScreen[Recorded | None]):
    """Controller text, parent and rationale for a new revision of ``loop``.

    Parameters
    ----------
    loop : str
        Loop the revision is recorded under (shown in the title).
    parent : str or None
        Parent offered in the form (the selected revision, else the loop's tip).
    tip : str or None
        The loop's tip, so that the form says when the parent starts a branch.
    """

    BINDINGS = bindings.FORM

    def __init__(self, loop: str, parent: str | None, *, tip: str | None = None):
        super().__init__()
        self.loop = loop
        self.parent_label = parent
        self.tip = tip
        self.busy = False

    def compose(self):
        with Vertical(id="form"):
            yield Label(f"New revision of loop {self.loop}", id="form-title")
            yield Label(f"loop: {self.loop}   tip: {self.tip or 'none yet'}", id="form-loop")
            yield Label("controller (model text)")
            yield Input(placeholder="e.g. pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", id="form-controller")
            yield Label(f"parent revision of loop {self.loop} (empty: new root)")
            yield Input(self.parent_label or "", id="form-parent")
            yield Static(parent_note(self.loop, self.parent_label, self.tip), id="form-parent-note")
            yield Label("rationale: why this change")
            yield Input(placeholder="required", id="form-rationale")
            yield Label("prefilter / feedforward shaping F (model text; empty: the loop's)")
            yield Input(placeholder="e.g. 1/(0.02*s+1)^2", id="form-prefilter")
            yield Label("anti-windup: none, clamping, or back-calculation GAIN (1/s)")
            yield Input(placeholder="none", id="form-antiwindup")
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

    def on_input_changed(self, event: Input.Changed) -> None:
        if event.input.id == "form-parent":
            self.query_one("#form-parent-note", Static).update(
                parent_note(self.loop, event.value.strip() or None, self.tip))

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
                     self.query_one("#form-rationale", Input).value,
                     self.query_one("#form-prefilter", Input).value.strip(),
                     self.query_one("#form-antiwindup", Input).value)

    @work(thread=True, exclusive=True, group="record")
    def _record(self, controller: str, parent: str | None, rationale: str,
                prefilter: str = "", anti_windup: str = "") -> None:
        try:
            scheme, gain = anti_windup_field(anti_windup)
            info = self.app.lg.add_revision(self.loop, controller, rationale=rationale,
                                            parent=parent, prefilter=prefilter,
                                            anti_windup=scheme, anti_windup_gain=gain)
        except LedgerError as e:
            self.app.call_from_thread(self._failed, str(e))
            return
        self.app.call_from_thread(self.dismiss, Recorded(info.loop, info.label))

    def _failed(self, message: str) -> None:
        self.busy = False
        self.query_one("#form-progress").display = False
        self.query_one("#form-ok", Button).disabled = False
        self.query_one("#form-error", Static).update(f"✗ {message}")
