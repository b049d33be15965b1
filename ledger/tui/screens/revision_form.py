"""Modal form that records a controller revision; verification runs in a worker.

The preview key (ctrl+t) runs a dry run (``Ledger.try_revision``) of the controller typed
against the parent typed (the loop's tip when empty) and shows the regression table in the
form before anything is saved; recording it afterwards reuses the values computed.
"""

from __future__ import annotations

from dataclasses import dataclass

from textual import work
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Label, ProgressBar, Static

from ...errors import LedgerError
from .. import bindings

__all__ = ["RevisionForm", "Recorded", "preview_text"]


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


def preview_text(rep) -> str:
    """The regression table of a one-candidate dry run as lines of text (what the form's
    preview shows): every requirement whose class is not ``unchanged``, then the verdict."""
    from ...display import value_text

    c = rep.candidates[0]
    ref = rep.against.label if rep.against is not None else None
    lines = [f"preview against {ref}: nothing recorded" if ref else
             "preview (no revision to compare against): nothing recorded"]
    moved = [ch for ch in c.changes if ch.kind != "unchanged"]
    for ch in moved:
        kind = ch.kind.upper() if ch.is_regression else ch.kind
        lines.append(f"  {ch.requirement:<10} {kind:<12} {ch.old_verdict or '-'} -> "
                     f"{ch.new_verdict or '-'}  {value_text(ch.old_value, ch.unit, ch.limit_text)}"
                     f" -> {value_text(ch.new_value, ch.unit, ch.limit_text)}"
                     f"  (limit {ch.limit_text or '-'})")
    if not moved:
        lines.append(f"  no change beyond {c.threshold:.0%} of headroom")
    verdicts: dict[str, int] = {}
    for r in c.results:
        verdicts[r.verdict] = verdicts.get(r.verdict, 0) + 1
    tail = ", ".join(f"{v} {k}" for k, v in sorted(verdicts.items())) or "nothing to judge"
    if ref:
        tail += ("; breaks nothing" if c.breaks_nothing
                 else "; breaks " + ", ".join(x.requirement for x in c.broken))
    lines.append("  " + tail)
    return "\n".join(lines)


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
    sample_time : float or None
        The loop's sample time; a digital loop also offers the discretisation method and the
        number format of the coefficients (docs/digital.md).
    """

    BINDINGS = bindings.FORM

    def __init__(self, loop: str, parent: str | None, *, tip: str | None = None,
                 sample_time: float | None = None):
        super().__init__()
        self.sample_time = sample_time
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
            with Vertical(id="form-digital"):
                yield Label(f"digital loop, Ts = {self.sample_time} s: discretisation of a "
                            "controller in s (zoh, tustin, tustin@FREQ, matched)")
                yield Input(placeholder="e.g. tustin@30Hz (empty: the controller is in z)",
                            id="form-discretize")
                yield Label("number format of the stored coefficients (fixed:W/F or single)")
                yield Input(placeholder="empty: double precision", id="form-format")
            yield Static("", id="form-error")
            yield Static("", id="form-preview")
            yield ProgressBar(total=None, show_eta=False, id="form-progress")
            with Horizontal(id="form-buttons"):
                yield Button("Record and verify (ctrl+s)", variant="primary", id="form-ok")
                yield Button("Preview (ctrl+t)", id="form-try")
                yield Button("Cancel (esc)", id="form-cancel")

    def on_mount(self) -> None:
        self.query_one("#form-progress").display = False
        self.query_one("#form-digital").display = self.sample_time is not None
        self.query_one("#form-controller", Input).focus()

    def on_button_pressed(self, event: Button.Pressed) -> None:
        if event.button.id == "form-ok":
            self.action_submit()
        elif event.button.id == "form-try":
            self.action_preview()
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
                     self.query_one("#form-discretize", Input).value.strip(),
                     self.query_one("#form-format", Input).value.strip(),
                     self.query_one("#form-prefilter", Input).value.strip(),
                     self.query_one("#form-antiwindup", Input).value)

    def action_preview(self) -> None:
        if self.busy:
            return
        self.busy = True
        self.query_one("#form-error", Static).update("")
        self.query_one("#form-preview", Static).update("computing the preview...")
        self.query_one("#form-progress").display = True
        self._try(self.query_one("#form-controller", Input).value,
                  self.query_one("#form-parent", Input).value.strip() or None)

    @work(thread=True, exclusive=True, group="record")
    def _try(self, controller: str, parent: str | None) -> None:
        try:
            rep = self.app.lg.try_revision(self.loop, controller, against=parent)
        except LedgerError as e:
            self.app.call_from_thread(self._failed, str(e))
            return
        self.app.call_from_thread(self._previewed, preview_text(rep))

    def _previewed(self, text: str) -> None:
        self.busy = False
        self.query_one("#form-progress").display = False
        self.query_one("#form-preview", Static).update(text)

    @work(thread=True, exclusive=True, group="record")
    def _record(self, controller: str, parent: str | None, rationale: str,
                discretization: str = "", number_format: str = "", prefilter: str = "",
                anti_windup: str = "") -> None:
        try:
            scheme, gain = anti_windup_field(anti_windup)
            info = self.app.lg.add_revision(self.loop, controller, rationale=rationale,
                                            parent=parent, discretization=discretization,
                                            number_format=number_format,
                                            prefilter=prefilter,
                                            anti_windup=scheme, anti_windup_gain=gain)
        except LedgerError as e:
            self.app.call_from_thread(self._failed, str(e))
            return
        self.app.call_from_thread(self.dismiss, Recorded(info.loop, info.label))

    def _failed(self, message: str) -> None:
        self.busy = False
        self.query_one("#form-progress").display = False
        self.query_one("#form-ok", Button).disabled = False
        self.query_one("#form-preview", Static).update("")
        self.query_one("#form-error", Static).update(f"✗ {message}")
