"""The Textual application: wiring only (screens, bindings, shared selection).

Views are modes switched with the number keys; the selected loop, revision and requirement
are shared through the app so that every view follows the same selection.

The selection follows the cursor: a loop's header row in the lineage selects that loop and
its tip, a revision row (or a matrix column) selects that revision.  The add-revision form,
the plots and the diff read only this selection (:meth:`LedgerApp.select`).
"""

from __future__ import annotations

from textual.app import App

from . import bindings
from .screens.diff import DiffScreen
from .screens.help import HelpScreen
from .screens.lineage import LineageScreen
from .screens.matrix import MatrixScreen
from .screens.plots import PlotsScreen
from .screens.requirement import RequirementScreen
from .screens.revision_form import Recorded, RevisionForm

__all__ = ["LedgerApp"]


class LedgerApp(App):
    """loopledger terminal UI.

    Parameters
    ----------
    target : str or path or None
        Ledger file or database URL (``None``: ``$LOOPLEDGER_DB`` or ``./loopledger.db``).
    author : str, optional
        Name recorded on revisions added from the UI.
    ledger : Ledger, optional
        An already open ledger (tests); ``target`` is then ignored.
    """

    TITLE = "loopledger"
    CSS_PATH = "ledger.tcss"
    BINDINGS = bindings.APP
    MODES = {"lineage": LineageScreen, "matrix": MatrixScreen,
             "requirement": RequirementScreen, "diff": DiffScreen, "plots": PlotsScreen}
    DEFAULT_MODE = "lineage"

    def __init__(self, target=None, *, author: str | None = None, ledger=None):
        super().__init__()
        if ledger is None:
            from ..api import open_ledger

            ledger = open_ledger(target, author=author)
            self._owns = True
        else:
            self._owns = False
        self.lg = ledger
        self.sub_title = str(ledger.display_url).rsplit("/", 1)[-1]
        self.current_loop: str | None = None
        self.current_label: str | None = None
        self.current_req: str | None = None

    def select(self, loop: str | None, label: str | None) -> None:
        """Make ``loop``/``label`` the selection every view follows.

        ``label=None`` selects the loop's tip (none when the loop has no revision yet).
        """
        if loop is not None and label is None:
            try:
                label = self.lg.loop(loop).tip
            except LookupError:
                loop, label = None, None
        self.current_loop, self.current_label = loop, label

    @property
    def selection(self) -> tuple[str | None, str | None]:
        """The selected (loop, revision label)."""
        return self.current_loop, self.current_label

    def action_view(self, name: str) -> None:
        if self.current_mode == name:
            self.screen.reload()
        else:
            self.switch_mode(name)

    def action_reload(self) -> None:
        reload = getattr(self.screen, "reload", None)
        if reload is not None:
            reload()

    def action_help(self) -> None:
        if not isinstance(self.screen, HelpScreen):
            self.push_screen(HelpScreen())

    def action_add_revision(self) -> None:
        loop, label = self.selection
        if loop is None:
            loop = next((l.name for l in self.lg.loops()), None)
            label = None
        if loop is None:
            self.notify("add a loop first (loopledger loop add ...)", severity="error")
            return
        info = self.lg.loop(loop)
        tip = info.tip
        # the parent offered is the selected revision of the selected loop, else that loop's tip
        self.push_screen(RevisionForm(loop, label or tip, tip=tip,
                                      sample_time=info.sample_time), self._recorded)

    def _recorded(self, rec: Recorded | None) -> None:
        if rec is None:
            return
        self.select(rec.loop, rec.label)
        self.notify(f"recorded {rec.loop}/{rec.label} and verified it")
        self.action_view("matrix")

    def on_unmount(self) -> None:
        if self._owns:
            self.lg.close()
