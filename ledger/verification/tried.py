"""Metric values computed by dry runs (``Ledger.try_revision``), kept outside the ledger.

A dry run records nothing in the ledger (no row in any table, no link in the hash chain), so
its computed values cannot go to the ledger's metric-value cache.  They are kept here instead,
by the same content-hash key (engine version, plant version hash, canonical controller, loop
form, metric, settings; :meth:`~ledger.verification.plan.RevisionPlan.metric_key`): in this
process's memory and, best effort, as one small JSON file per key in
:func:`ledger.config.cache_dir` ``/tried``.  Recording the candidate afterwards
(``add_revision``) reads them back and computes nothing; a key is the hash of every input of
the values, so a value is never reused for a different plant, controller, loop, setting or
engine version.  Losing the folder only costs recomputation.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Iterable, Mapping

from ..config import TRIED_CACHE_FILES, cache_dir
from ..hashing import sha256_of

__all__ = ["remember", "recall", "forget_memory", "tried_dir"]

_MEMORY: dict[str, dict] = {}


def tried_dir() -> Path:
    return Path(cache_dir()) / "tried"


def _file(key: str) -> Path:
    return tried_dir() / f"{key}.json"


def remember(payloads: Mapping[str, dict]) -> None:
    """Keep ``payloads`` (metric key -> payload) for a later recording."""
    _MEMORY.update(payloads)
    if len(_MEMORY) > 4 * TRIED_CACHE_FILES:
        for k in list(_MEMORY)[:len(_MEMORY) - TRIED_CACHE_FILES]:
            del _MEMORY[k]
    try:
        folder = tried_dir()
        folder.mkdir(parents=True, exist_ok=True)
        for key, payload in payloads.items():
            body = json.dumps({"key": key, "digest": sha256_of(payload), "payload": payload})
            fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                f.write(body)
            os.replace(tmp, _file(key))
        files = sorted(folder.glob("*.json"), key=lambda p: p.stat().st_mtime)
        for old in files[:max(0, len(files) - TRIED_CACHE_FILES)]:
            old.unlink(missing_ok=True)
    except OSError:
        pass  # best effort: the memory copy still serves this process


def recall(keys: Iterable[str]) -> dict[str, dict]:
    """The kept payloads of ``keys`` (those found; a damaged file is ignored)."""
    out: dict[str, dict] = {}
    for key in keys:
        if key in _MEMORY:
            out[key] = _MEMORY[key]
            continue
        try:
            doc = json.loads(_file(key).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        payload = doc.get("payload") if isinstance(doc, dict) else None
        if (isinstance(payload, dict) and doc.get("key") == key
                and doc.get("digest") == sha256_of(payload) and "metric" in payload):
            out[key] = payload
    return out


def forget_memory() -> None:
    """Forget the payloads kept in this process's memory (the files stay)."""
    _MEMORY.clear()
