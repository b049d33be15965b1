"""Shared behaviour of the view screens: load in a worker, show the result on the UI thread."""

from __future__ import annotations

from textual import work
from textual.screen import Screen
from textual.widgets import Footer, Header

from ...errors import LedgerError

__all__ = ["ViewScreen"]


class ViewScreen(Screen):
    """A view that reads the ledger in a worker thread.

    Subclasses implement ``fetch()`` (runs in the worker; API calls only) and
    ``present(data)`` (runs on the UI thread; widgets only).
    """

    def header_footer(self):
        return Header(show_clock=False), Footer()

    def on_screen_resume(self) -> None:
        self.reload()

    def reload(self) -> None:
        self._fetch_in_worker()

    @work(thread=True, exclusive=True, group="load")
    def _fetch_in_worker(self) -> None:
        try:
            data = self.fetch()
        except LedgerError as e:
            self.app.call_from_thread(self.app.notify, str(e), severity="error", timeout=8)
            return
        self.app.call_from_thread(self.present, data)

    def fetch(self):  # pragma: no cover - abstract
        raise NotImplementedError

    def present(self, data) -> None:  # pragma: no cover - abstract
        raise NotImplementedError
