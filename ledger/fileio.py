"""Atomic file writes shared by exports and spec files."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable

from .errors import OutputError, UsageError

__all__ = ["write_atomic"]


def write_atomic(path, writer: Callable[[Path], None]) -> Path:
    """Write a file atomically: ``writer(tmp_path)`` fills a temporary file in the target's
    folder, which then replaces ``path`` in one rename.  On failure ``path`` is untouched.
    The file gets the usual permissions for a new file (0666 less the umask).

    Returns
    -------
    Path
        The absolute path written.
    """
    path = Path(path).expanduser().resolve()
    if not path.parent.is_dir():
        raise UsageError(f"folder {path.parent} does not exist; create it first")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        writer(tmp_path)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp_path, 0o666 & ~umask)
        os.replace(tmp_path, path)
    except OSError as e:
        tmp_path.unlink(missing_ok=True)
        raise OutputError(f"cannot write {path}: {e.strerror or e}; check the path and "
                          "permissions") from e
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise
    return path
