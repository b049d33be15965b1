"""The hash chain over the ledger's records: see :mod:`ledger.store.chain` (its home).

This module keeps the public names importable from ``ledger.chain``.
"""

from .store.chain import *  # noqa: F401,F403
from .store.chain import (  # noqa: F401 - helpers other modules and tools import from here
    __all__,
    baseline_entries,
    content_of,
    float_columns,
    lock,
    stamp,
)
