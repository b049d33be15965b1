"""Terminal UI of the ledger (Textual).  Nothing outside this package imports Textual.

Start it with ``loopledger ui [LEDGER]`` or :func:`run_ui`.
"""

from __future__ import annotations

__all__ = ["run_ui"]


def run_ui(target=None, *, author: str | None = None, ledger=None) -> None:
    """Open the ledger at ``target`` (path or URL; ``None`` = the default ledger), or an
    already open ``ledger``, in the terminal UI; returns when the user quits."""
    from .app import LedgerApp

    LedgerApp(target, author=author, ledger=ledger).run()
