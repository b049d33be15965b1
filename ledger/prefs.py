"""Display preferences of one user, remembered per ledger: the frequency unit of plots.

They are a person's viewing choices, not records, so they live outside the ledger (a ledger is
append-only and shared): one JSON file, ``$LOOPLEDGER_CONFIG_DIR/prefs.json``, else
``$XDG_CONFIG_HOME/loopledger/prefs.json``, else ``~/.config/loopledger/prefs.json``, keyed by
the ledger's location (the password of a database URL is never written).  A missing or
unreadable file means the defaults; writing is atomic and a failure to write is not an error
(the choice then lasts for the session only).

Keys
----
``frequency_unit``
    ``"Hz"`` (default) or ``"rad/s"``: the frequency axis of Bode, S/T and trend plots in the
    terminal UI and the HTML report.
"""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["FREQUENCY_UNITS", "prefs_path", "get", "put", "frequency_unit",
           "set_frequency_unit"]

FREQUENCY_UNITS = ("Hz", "rad/s")
_DEFAULTS = {"frequency_unit": "Hz"}


def prefs_path() -> Path:
    from .config import prefs_dir

    return Path(prefs_dir()) / "prefs.json"


def _key(ledger_url: str) -> str:
    from .store.db import ledger_key

    return ledger_key(ledger_url)


def _load() -> dict:
    try:
        data = json.loads(prefs_path().read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def get(ledger_url: str, key: str):
    """A preference for the ledger at ``ledger_url`` (the default when none is stored)."""
    value = (_load().get(_key(ledger_url)) or {}).get(key)
    return value if value is not None else _DEFAULTS.get(key)


def put(ledger_url: str, key: str, value) -> bool:
    """Remember a preference; False when the file could not be written."""
    data = _load()
    data.setdefault(_key(ledger_url), {})[key] = value
    path = prefs_path()
    from .errors import LedgerError
    from .fileio import write_atomic

    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, lambda tmp: tmp.write_text(json.dumps(data, indent=2, sort_keys=True),
                                                      encoding="utf-8"))
    except (OSError, LedgerError):
        return False
    return True


def frequency_unit(ledger_url: str) -> str:
    """``"Hz"`` or ``"rad/s"`` for the ledger's plots."""
    u = get(ledger_url, "frequency_unit")
    return u if u in FREQUENCY_UNITS else _DEFAULTS["frequency_unit"]


def set_frequency_unit(ledger_url: str, unit: str) -> bool:
    if unit not in FREQUENCY_UNITS:
        raise ValueError(f"frequency unit must be one of {', '.join(FREQUENCY_UNITS)}")
    return put(ledger_url, "frequency_unit", unit)
