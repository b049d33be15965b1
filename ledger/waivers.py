"""Waivers: the rules of recording them and of which cells they cover (no SQL).

A **waiver** accepts a known deviation: a ``fail`` or ``error`` verdict of one requirement on
one revision (or on every revision a baseline freezes), with a reason, the approver and their
role, and until when it holds: an expiry date (the last day it counts) and/or a free-text
condition ("until the next hardware build") that a person judges.  Waivers are append-only and
chained; a withdrawal is a record of its own.  A waiver *counts* ("live") while it is not
withdrawn and its expiry date is not before the day the question is asked (today, UTC, or the
date a command is given); an expired or withdrawn waiver covers nothing.

A covered cell shows its own state ``waived`` in the matrix and every export (never
``pass``); the gate holds on it; sign-off accepts it and lists the waiver in the sign-off
record.  ``stale`` and ``unverified`` cells are never covered by a waiver (their verdict is not
known: verify first), only named explicitly at sign-off.

Common practice, no source: a deviation from a stated requirement is accepted only with a
recorded reason, a named approver and a limit in time or condition.
"""

from __future__ import annotations

import re
from datetime import date, datetime, timezone
from typing import Iterable

from .errors import WaiverError
from .records import WaiverInfo

__all__ = ["WAIVABLE", "today", "as_date", "check_waiver", "check_withdrawal", "WaiverIndex",
           "parse_cell", "cell_text"]

#: verdicts a waiver covers
WAIVABLE = ("fail", "error")
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
_CELL = re.compile(r"^(?P<key>[^@\s]+)@(?P<loop>[^:\s]+):(?P<label>\S+)$")


def today() -> date:
    """Today's date in UTC."""
    return datetime.now(timezone.utc).date()


def as_date(value, what: str = "date") -> date:
    """``value`` (a ``date``, or text ``YYYY-MM-DD``) as a date; ``None`` gives today (UTC).

    Raises
    ------
    WaiverError
        Text that is not a calendar date in that form.
    """
    if value is None:
        return today()
    if isinstance(value, datetime):
        return value.date()
    if isinstance(value, date):
        return value
    text = str(value).strip()
    try:
        if not _DATE.match(text):
            raise ValueError(text)
        return date.fromisoformat(text)
    except ValueError:
        raise WaiverError(f"{what} {value!r} is not a date; write YYYY-MM-DD, e.g. "
                          "2027-03-31") from None


def _need(what: str, value) -> str:
    if not isinstance(value, str) or not value.strip():
        raise WaiverError(f"a waiver needs {what}")
    return value.strip()


def check_waiver(*, reason, approver, role, expires=None, condition: str = "",
                 as_of=None) -> dict:
    """The stored fields of a new waiver, checked: reason, approver and role required; the
    expiry, if given, a date not before ``as_of`` (today by default).

    Returns
    -------
    dict
        ``reason``, ``approver``, ``role``, ``expires_on`` (ISO text or ``None``),
        ``condition``.
    """
    out = {"reason": _need("a reason", reason), "approver": _need("an approver", approver),
           "role": _need("the approver's role", role)}
    day = as_date(as_of)
    exp = None
    if expires is not None and str(expires).strip():
        exp = as_date(expires, "expiry")
        if exp < day:
            raise WaiverError(f"expiry {exp.isoformat()} is in the past (before "
                              f"{day.isoformat()}); give a later date or none")
    if not isinstance(condition, str):
        raise WaiverError("a waiver's condition must be text")
    out["expires_on"] = exp.isoformat() if exp else None
    out["condition"] = condition.strip()
    return out


def check_withdrawal(*, reason, approver, role) -> dict:
    """The fields of a withdrawal, checked (all required)."""
    out = {}
    for key, what, value in (("reason", "a reason", reason), ("approver", "an approver", approver),
                             ("role", "the approver's role", role)):
        if not isinstance(value, str) or not value.strip():
            raise WaiverError(f"withdrawing a waiver needs {what}")
        out[key] = value.strip()
    return out


class WaiverIndex:
    """The live waivers on a day, looked up by cell.

    Parameters
    ----------
    waivers : iterable of WaiverInfo
    as_of : date or str, optional
        The day the waivers are judged on (default today, UTC).
    """

    def __init__(self, waivers: Iterable[WaiverInfo], as_of=None):
        self.as_of = as_date(as_of)
        self._by: dict[tuple[str, str], WaiverInfo] = {}
        for w in waivers:
            if not w.live(self.as_of):
                continue
            for rev in w.covers:
                self._by.setdefault((w.requirement, rev), w)  # the oldest live one

    def cover(self, requirement: str, loop: str, label: str, verdict: str) -> WaiverInfo | None:
        """The live waiver covering this cell, if its verdict is one a waiver covers."""
        if verdict not in WAIVABLE:
            return None
        return self._by.get((requirement, f"{loop}/{label}"))


def parse_cell(text: str) -> tuple[str, str, str]:
    """``"REQ@LOOP:LABEL"`` as ``(requirement, loop, label)``."""
    m = _CELL.match(text.strip()) if isinstance(text, str) else None
    if m is None:
        raise WaiverError(f"cell {text!r} must look like REQ@LOOP:LABEL, e.g. PZ-3@pz:r4")
    return m["key"], m["loop"], m["label"]


def cell_text(requirement: str, loop: str, label: str) -> str:
    """The form :func:`parse_cell` reads."""
    return f"{requirement}@{loop}:{label}"
