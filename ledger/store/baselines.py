"""Baselines (frozen matrices) and sign-offs: the SQL of one record kind.

The canonical matrix and its hash are defined here too (the audit recomputes them from the
stored entries); the rules of freezing and signing are in :mod:`ledger.signoff`.
"""

from __future__ import annotations

import json
import math
from typing import Sequence

from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session

from ..errors import NotFoundError
from ..hashing import canonical_json, sha256_of
from ..records import BaselineColumn, BaselineInfo, FrozenCell, SignoffInfo
from .chain import append_link, chain_head
from .models import (
    Baseline,
    BaselineEntry,
    Loop,
    Plant,
    PlantVersion,
    Requirement,
    RequirementVersion,
    Revision,
    Signoff,
)
from .queries import now, utc

__all__ = ["sorted_matrix", "matrix_hash", "baseline_row", "find", "is_signed",
           "successor", "frozen", "frozen_matrix_hash", "write_baseline", "add_signoff",
           "signoff_info", "info", "all_baselines"]


# -- canonical matrix ----------------------------------------------------------------------
def sorted_matrix(columns: Sequence[dict], cells: Sequence[dict]) -> dict:
    """``{"columns": ..., "cells": ...}`` in canonical order: columns by (loop, revision),
    cells by (loop, revision, requirement)."""
    return {
        "columns": sorted(columns, key=lambda c: (c["loop"], c["revision"])),
        "cells": sorted(cells, key=lambda c: (c["loop"], c["revision"], c["requirement"])),
    }


def matrix_hash(columns: Sequence[dict], cells: Sequence[dict]) -> str:
    """SHA-256 (hex) of the canonical matrix made of ``columns`` and ``cells`` dicts."""
    return sha256_of(sorted_matrix(columns, cells))


# -- rows ----------------------------------------------------------------------------------
def find(s: Session, name: str) -> Baseline | None:
    return s.scalar(select(Baseline).where(Baseline.name == name))


def baseline_row(s: Session, name: str) -> Baseline:
    row = find(s, name)
    if row is None:
        raise NotFoundError(f"no baseline named {name!r}; see 'loopledger baseline list'")
    return row


def is_signed(s: Session, b: Baseline) -> bool:
    return bool(s.scalar(select(func.count()).select_from(Signoff)
                         .where(Signoff.baseline_id == b.id)))


def successor(s: Session, b: Baseline) -> str | None:
    """Name of the baseline that supersedes ``b``, if any."""
    return s.scalar(select(Baseline.name).where(Baseline.supersedes_id == b.id))


def frozen(s: Session, b: Baseline) -> tuple[list[dict], list[dict]]:
    """The frozen (columns, cells) of baseline ``b`` as stored."""
    rows = s.scalars(select(BaselineEntry).where(BaselineEntry.baseline_id == b.id)
                     .order_by(BaselineEntry.id)).all()
    cols = [json.loads(r.data_json) for r in rows if r.kind == "column"]
    cells = [json.loads(r.data_json) for r in rows if r.kind == "cell"]
    return cols, cells


def frozen_matrix_hash(s: Session, baseline_id: int) -> str:
    """SHA-256 of the canonical matrix recomputed from a baseline's stored entries."""
    b = s.get(Baseline, baseline_id)
    if b is None:
        raise NotFoundError(f"no baseline with id {baseline_id}")
    return matrix_hash(*frozen(s, b))


# -- writing -------------------------------------------------------------------------------
def _ids(s: Session):
    cache: dict = {}

    def revision_id(loop: str, label: str) -> int:
        k = ("rev", loop, label)
        if k not in cache:
            cache[k] = s.scalar(select(Revision.id).join(Loop, Revision.loop_id == Loop.id)
                                .where(Loop.name == loop, Revision.label == label))
        return cache[k]

    def req_version_id(key: str, number: int) -> int:
        k = ("req", key, number)
        if k not in cache:
            cache[k] = s.scalar(select(RequirementVersion.id)
                                .join(Requirement, RequirementVersion.requirement_id == Requirement.id)
                                .where(Requirement.key == key, RequirementVersion.number == number))
        return cache[k]

    def plant_version_id(name: str, number: int) -> int:
        k = ("plant", name, number)
        if k not in cache:
            cache[k] = s.scalar(select(PlantVersion.id).join(Plant, PlantVersion.plant_id == Plant.id)
                                .where(Plant.name == name, PlantVersion.number == number))
        return cache[k]

    return revision_id, req_version_id, plant_version_id


def write_baseline(s: Session, name: str, *, existing: Baseline | None,
                   supersedes: Baseline | None, columns: list[dict], cells: list[dict],
                   note: str, author: str) -> Baseline:
    """Insert baseline ``name`` (or refreeze ``existing``) with its entries, and chain it."""
    mh = matrix_hash(columns, cells)
    when = now()
    if existing is None:
        row = Baseline(name=name, note=note or "", author=author,
                       supersedes_id=supersedes.id if supersedes else None, matrix_hash=mh,
                       created_at=when)
        s.add(row)
    else:
        row = existing
        s.execute(delete(BaselineEntry).where(BaselineEntry.baseline_id == row.id))
        row.note, row.author, row.matrix_hash, row.created_at = note or "", author, mh, when
        if supersedes is not None:
            row.supersedes_id = supersedes.id
    s.flush()
    rev_id, rv_id, pv_id = _ids(s)
    for c in columns:
        s.add(BaselineEntry(baseline_id=row.id, kind="column",
                            revision_id=rev_id(c["loop"], c["revision"]),
                            requirement_version_id=None,
                            plant_version_id=pv_id(c["plant"], c["plant_version"]),
                            data_json=canonical_json(c)))
    for c in cells:
        s.add(BaselineEntry(baseline_id=row.id, kind="cell",
                            revision_id=rev_id(c["loop"], c["revision"]),
                            requirement_version_id=rv_id(c["requirement"],
                                                         c["requirement_version"]),
                            plant_version_id=pv_id(c["plant"], c["plant_version"]),
                            data_json=canonical_json(c)))
    s.flush()
    append_link(s, "baseline", row)
    return row


def add_signoff(s: Session, b: Baseline, *, signer: str, role: str, statement: str,
                author: str, accepted_json: str = "") -> SignoffInfo:
    """Insert a sign-off of ``b`` bound to its matrix hash and the chain head, and chain it.
    ``accepted_json`` (canonical JSON of the cells accepted explicitly and the waivers relied
    on, ``""`` for none) enters the sign-off's record hash."""
    row = Signoff(baseline_id=b.id, name=signer.strip(), role=role.strip(),
                  statement=statement.strip(), author=author, matrix_hash=b.matrix_hash,
                  chain_head=chain_head(s), signed_at=now(), accepted_json=accepted_json)
    s.add(row)
    s.flush()
    append_link(s, "signoff", row)
    return signoff_info(row, b.name)


# -- reading -------------------------------------------------------------------------------
def _num(x) -> float | None:
    if x == "inf":
        return math.inf
    if x == "-inf":
        return -math.inf
    return x


def signoff_info(r: Signoff, baseline_name: str) -> SignoffInfo:
    extra = json.loads(r.accepted_json) if r.accepted_json else {}
    return SignoffInfo(baseline=baseline_name, name=r.name, role=r.role, statement=r.statement,
                       author=r.author, matrix_hash=r.matrix_hash, chain_head=r.chain_head,
                       signed_at=utc(r.signed_at),
                       accepted=tuple(extra.get("accepted", ())),
                       waivers=tuple(extra.get("waivers", ())))


def info(s: Session, b: Baseline) -> BaselineInfo:
    cols, cells = frozen(s, b)
    srt = sorted_matrix(cols, cells)
    sup = s.get(Baseline, b.supersedes_id).name if b.supersedes_id else None
    signs = s.scalars(select(Signoff).where(Signoff.baseline_id == b.id)
                      .order_by(Signoff.id)).all()
    return BaselineInfo(
        name=b.name, note=b.note, author=b.author, created_at=utc(b.created_at),
        matrix_hash=b.matrix_hash, supersedes=sup, superseded_by=successor(s, b),
        columns=tuple(BaselineColumn(**c) for c in srt["columns"]),
        cells=tuple(FrozenCell(**{**c, "value": _num(c["value"]), "headroom": _num(c["headroom"])})
                    for c in srt["cells"]),
        signoffs=tuple(signoff_info(r, b.name) for r in signs),
    )


def all_baselines(s: Session) -> list[BaselineInfo]:
    return [info(s, b) for b in s.scalars(select(Baseline).order_by(Baseline.id)).all()]
