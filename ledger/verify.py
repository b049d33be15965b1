"""Verification in the ledger: see the package :mod:`ledger.verification` (its home).

This module keeps the names importable from ``ledger.verify``.
"""

from .store.loops import loop_form  # noqa: F401
from .store.plants import latest_version as latest_plant_version  # noqa: F401
from .store.results import load_cached  # noqa: F401
from .verification import *  # noqa: F401,F403
from .verification import __all__  # noqa: F401
