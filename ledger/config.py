"""Configuration: every environment variable loopledger reads and its tunables, in one place.

Environment variables (read when asked, never at import, so a test or a caller may set them):

``LOOPLEDGER_DB``
    The ledger opened when no path or URL is given (default ``./loopledger.db``).
``LOOPLEDGER_AUTHOR``
    The name recorded on new records (default: the login name).
``LOOPLEDGER_DEBUG``
    Set to show the traceback of an unexpected error in the command line.
``LOOPLEDGER_DIGITS``
    Significant digits of values shown beside their limits (1-17; default 4).
``LOOPLEDGER_CONFIG_DIR``
    Folder of the per-user display preferences file ``prefs.json`` (default
    ``$XDG_CONFIG_HOME/loopledger``, else ``~/.config/loopledger``).
``LOOPLEDGER_CACHE_DIR``
    Folder of the values computed by dry runs (``loopledger try``), kept outside the ledger so
    a dry run records nothing in it; keyed by content hash, so any ledger may reuse them
    (default ``$LOOPLEDGER_CONFIG_DIR/cache`` when that is set, else ``$XDG_CACHE_HOME/loopledger``,
    else ``~/.cache/loopledger``).
``LOOPLEDGER_CLUSTER``
    Where ``loopledger verify`` computes when ``--cluster`` is not given: the address of a
    running Dask scheduler (``tcp://host:8786``, ``tls://host:8786``) or ``local:N`` (a cluster
    of N worker processes on this machine); unset or empty: this machine without a cluster
    (docs/operations.md, "Verification on a Dask cluster").
``COLUMNS``
    The terminal width the command line fits its tables and lines to (the shell's own
    variable; unset, empty or not a positive whole number: the terminal's width).

Tunables are module constants; change them here, not where they are used.
"""

from __future__ import annotations

import getpass
import os

__all__ = ["DEFAULT_PATH", "BUSY_TIMEOUT_MS", "WRITE_RETRIES", "IN_CHUNK", "FAMILY_CACHE_SIZE",
           "db_target", "author", "debug", "digits_setting", "prefs_dir", "columns",
           "cache_dir", "TRIED_CACHE_FILES", "CLUSTER_TASK_WORK", "CLUSTER_CONNECT_TIMEOUT",
           "CLUSTER_MALLOC_TRIM", "cluster_address", "SENSITIVITY_STEP",
           "SENSITIVITY_KINK_RTOL", "SENSITIVITY_VALUE_RTOL"]

#: the ledger file used when none is named and ``$LOOPLEDGER_DB`` is unset
DEFAULT_PATH = "loopledger.db"
#: how long an SQLite connection waits for a lock before the database counts as busy (ms)
BUSY_TIMEOUT_MS = 10_000
#: how many times one write transaction is retried while the database is busy
WRITE_RETRIES = 5
#: values per ``IN (...)`` list in one query (under SQLite's and PostgreSQL's parameter limits)
IN_CHUNK = 500
#: plant families kept built in one process (keyed by content hash and parameter order)
FAMILY_CACHE_SIZE = 32
#: files of dry-run values kept on disk; the oldest are removed beyond this
TRIED_CACHE_FILES = 2000
#: least variant x metric-request evaluations one cluster task carries (when the run has that
#: much): at 30-100 us per evaluation a task then computes for 150 ms or more, against a
#: per-task cost of 10-15 ms measured on a local Dask cluster (benchmarks/cluster.py), so the
#: per-task cost stays under 10 % of a task
CLUSTER_TASK_WORK = 5000
#: ``MALLOC_TRIM_THRESHOLD_`` (bytes) of the worker processes of a ``local:N`` cluster.  Dask's
#: nanny sets 64 KiB so that workers hand memory back at once; the engine makes and drops
#: large numpy temporaries, and at 64 KiB a task took 1.5-2x the CPU time it takes
#: in-process (measured, docs/performance.md); 128 MiB keeps the in-process speed.
CLUSTER_MALLOC_TRIM = 128 * 2 ** 20
#: seconds to wait for a Dask scheduler to answer and for its first worker to join
CLUSTER_CONNECT_TIMEOUT = 60.0
#: what drives the worst case (docs/history.md): the finite-difference step as a fraction of a
#: parameter's tolerance width; a slope is called smooth when its one-sided slopes agree to
#: this fraction; and the relative accuracy assumed of each value the engine measures
SENSITIVITY_STEP = 0.01
SENSITIVITY_KINK_RTOL = 0.01
SENSITIVITY_VALUE_RTOL = 1e-10


def db_target() -> str:
    """``$LOOPLEDGER_DB`` or :data:`DEFAULT_PATH`."""
    return os.environ.get("LOOPLEDGER_DB") or DEFAULT_PATH


def author() -> str:
    """``$LOOPLEDGER_AUTHOR``, else the login name, else ``"unknown"``."""
    env = os.environ.get("LOOPLEDGER_AUTHOR")
    if env:
        return env
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def cluster_address() -> str:
    """``$LOOPLEDGER_CLUSTER`` stripped (``""`` when unset: no cluster)."""
    return os.environ.get("LOOPLEDGER_CLUSTER", "").strip()


def digits_setting() -> str:
    """``$LOOPLEDGER_DIGITS`` as written (``""`` when unset); ledger/display.py reads it."""
    return os.environ.get("LOOPLEDGER_DIGITS", "")


def prefs_dir() -> str:
    """Folder of the display preferences file (``$LOOPLEDGER_CONFIG_DIR``, else the XDG one)."""
    base = os.environ.get("LOOPLEDGER_CONFIG_DIR")
    if base:
        return base
    xdg = os.environ.get("XDG_CONFIG_HOME") or os.path.join(os.path.expanduser("~"), ".config")
    return os.path.join(xdg, "loopledger")


def cache_dir() -> str:
    """Folder of the dry-run value cache (see ``LOOPLEDGER_CACHE_DIR`` above)."""
    base = os.environ.get("LOOPLEDGER_CACHE_DIR")
    if base:
        return base
    conf = os.environ.get("LOOPLEDGER_CONFIG_DIR")
    if conf:
        return os.path.join(conf, "cache")
    xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(xdg, "loopledger")


def debug() -> bool:
    """True when ``$LOOPLEDGER_DEBUG`` is set to anything but empty."""
    return bool(os.environ.get("LOOPLEDGER_DEBUG"))


def columns() -> int:
    """``$COLUMNS`` as a positive whole number, else 0 (then the terminal's width is used)."""
    try:
        n = int(os.environ.get("COLUMNS", "") or 0)
    except ValueError:
        return 0
    return max(n, 0)
