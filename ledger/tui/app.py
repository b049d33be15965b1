"""The Textual application: wiring only (screens, bindings, shared selection).

Views are modes switched with the number keys; the selected loop, revision and requirement
are shared through the app so that every view follows the same selection.
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
        loop = self.current_loop or next((l.name for l in self.lg.loops()), None)
        if loop is None:
            self.notify("add a loop first (loopledger loop add ...)", severity="error")
            return
        tip = self.current_label if self.current_loop == loop else None
        if tip is None:
            tip = self.lg.loop(loop).tip
        self.push_screen(RevisionForm(loop, tip), self._recorded)

    def _recorded(self, rec: Recorded | None) -> None:
        if rec is None:
            return
        self.current_loop, self.current_label = rec.loop, rec.label
        self.notify(f"recorded {rec.loop}/{rec.label} and verified it")
        self.action_view("matrix")

    def on_unmount(self) -> None:
        if self._owns:
            self.lg.close()
