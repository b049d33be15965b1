"""A read view over one open session, with the read methods of :class:`~ledger.api.Ledger`.

Workflows that must read and write in one transaction (freezing and signing a baseline) build
the verification matrix through this view, so what they compare is what their own
transaction sees.
"""

from __future__ import annotations

from typing import Sequence

from sqlalchemy.orm import Session

from . import loops, plants, requirements, results, revisions, waivers

__all__ = ["SessionView"]


class SessionView:
    """The read methods of a ledger, answered from session ``s``."""

    def __init__(self, s: Session, author: str = ""):
        self.session = s
        self.author = author

    def plant(self, name: str, version: int | None = None):
        return plants.get(self.session, name, version)

    def loops(self):
        return loops.all_loops(self.session)

    def loop(self, name: str):
        return loops.get(self.session, name)

    def revision(self, loop: str, label: str | None = None):
        return revisions.get(self.session, loop, label)

    def revisions(self, loop: str):
        return revisions.all_revisions(self.session, loop)

    def requirements(self, **filters):
        return requirements.all_requirements(self.session, **filters)

    def results_many(self, loop: str, labels: Sequence[str], **kw):
        return results.of_revisions(self.session, loop, labels, **kw)

    def waivers(self, requirement: str | None = None):
        return waivers.all_waivers(self.session, requirement=requirement)
