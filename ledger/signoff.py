"""Baselines and sign-offs.

A **baseline** freezes a named selection of revisions (by default the tip of every loop) with
what the ledger holds for them now: for each revision column, the plant version it is judged
against; for each matrix cell, the requirement version, its limit, and the verdict, value,
headroom and engine version of the result.  The canonical matrix of a baseline is the canonical
JSON (``ledger.hashing.canonical_json``) of ``{"columns": [...], "cells": [...]}`` with columns
sorted by (loop, revision) and cells by (loop, revision, requirement); its SHA-256 is the
baseline's ``matrix_hash``.

A **sign-off** is a named approval (name, role, statement, time) bound to that hash and to the
hash-chain head at the moment of signing.  Signing recomputes the content hash of everything
the baseline freezes (``ledger.audit.Checker.frozen``) and the matrix from the ledger as it is
now, and refuses unless both agree with what was frozen; it refuses stale or unverified cells.  A
signed baseline never changes; a newer baseline may supersede it (recorded, at most once).
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Sequence

from sqlalchemy import delete, func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .chain import lock, append_link, chain_head
from .errors import DuplicateError, IntegrityViolation, NotFoundError
from .hashing import canonical_json, sha256_of
from .store.models import (
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

__all__ = [
    "BaselineColumn",
    "FrozenCell",
    "SignoffInfo",
    "BaselineInfo",
    "matrix_hash",
    "live_matrix",
    "create_baseline",
    "baselines",
    "baseline",
    "sign_baseline",
    "frozen_matrix_hash",
]

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")
#: Verdicts a baseline may hold but a sign-off refuses.
UNSIGNABLE = ("stale", "unverified")


@dataclass(frozen=True)
class BaselineColumn:
    """A frozen revision and the plant version its results are judged against."""

    loop: str
    revision: str
    revision_hash: str
    plant: str
    plant_version: int
    plant_hash: str


@dataclass(frozen=True)
class FrozenCell:
    """A frozen matrix cell.  ``value`` and ``headroom`` are in the metric's unit (may be
    ``math.inf``; ``None`` when there is no value)."""

    requirement: str
    requirement_version: int
    requirement_hash: str
    limit: str
    loop: str
    revision: str
    revision_hash: str
    plant: str
    plant_version: int
    plant_hash: str
    verdict: str
    value: float | None
    headroom: float | None
    engine_version: str


@dataclass(frozen=True)
class SignoffInfo:
    baseline: str
    name: str
    role: str
    statement: str
    author: str
    matrix_hash: str
    chain_head: str
    signed_at: datetime


@dataclass(frozen=True)
class BaselineInfo:
    name: str
    note: str
    author: str
    created_at: datetime
    matrix_hash: str
    supersedes: str | None
    superseded_by: str | None
    columns: tuple[BaselineColumn, ...]
    cells: tuple[FrozenCell, ...]
    signoffs: tuple[SignoffInfo, ...]

    @property
    def signed(self) -> bool:
        return bool(self.signoffs)

    def counts(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for c in self.cells:
            out[c.verdict] = out.get(c.verdict, 0) + 1
        return out


# -- canonical matrix ----------------------------------------------------------------------
def _sorted(columns: Sequence[dict], cells: Sequence[dict]) -> dict:
    return {
        "columns": sorted(columns, key=lambda c: (c["loop"], c["revision"])),
        "cells": sorted(cells, key=lambda c: (c["loop"], c["revision"], c["requirement"])),
    }


def matrix_hash(columns: Sequence[dict], cells: Sequence[dict]) -> str:
    """SHA-256 (hex) of the canonical matrix made of ``columns`` and ``cells`` dicts."""
    return sha256_of(_sorted(columns, cells))


def live_matrix(lg, selection: str | Sequence[tuple[str, str]] = "tips") -> tuple[list, list]:
    """The matrix of ``selection`` as the ledger holds it now, as (columns, cells) dicts.

    Parameters
    ----------
    lg : Ledger
    selection : ``"tips"`` or sequence of ``(loop, label)``
    """
    from .history.matrix import build_matrix

    m = build_matrix(lg, selection)
    plants: dict[tuple[str, int | None], object] = {}

    def plant(name: str, version: int | None):
        if (name, version) not in plants:
            plants[(name, version)] = lg.plant(name, version)
        return plants[(name, version)]

    loop_plant = {}
    columns = []
    for col in m.columns:
        if col.loop not in loop_plant:
            loop_plant[col.loop] = lg.loop(col.loop).plant
        p = plant(loop_plant[col.loop], None)
        columns.append({"loop": col.loop, "revision": col.label, "revision_hash": col.content_hash,
                        "plant": p.name, "plant_version": p.version, "plant_hash": p.content_hash})
    cells = []
    for e in m.entries:
        r = e.result
        p = plant(loop_plant[e.loop], r.plant_version if r is not None else None)
        cells.append({
            "requirement": e.requirement.key, "requirement_version": e.requirement.version,
            "requirement_hash": e.requirement.content_hash, "limit": e.requirement.limit_text,
            "loop": e.loop, "revision": e.revision.label, "revision_hash": e.revision.content_hash,
            "plant": p.name, "plant_version": p.version, "plant_hash": p.content_hash,
            "verdict": e.verdict, "value": r.value if r is not None else None,
            "headroom": r.headroom if r is not None else None,
            "engine_version": r.engine_version if r is not None else "",
        })
    return columns, cells


def _load(data_json: str) -> dict:
    return json.loads(data_json)


def _frozen(s: Session, b: Baseline) -> tuple[list[dict], list[dict]]:
    rows = s.scalars(select(BaselineEntry).where(BaselineEntry.baseline_id == b.id)
                     .order_by(BaselineEntry.id)).all()
    cols = [_load(r.data_json) for r in rows if r.kind == "column"]
    cells = [_load(r.data_json) for r in rows if r.kind == "cell"]
    return cols, cells


def frozen_matrix_hash(s: Session, baseline_id: int) -> str:
    """SHA-256 of the canonical matrix recomputed from a baseline's stored entries."""
    b = s.get(Baseline, baseline_id)
    if b is None:
        raise NotFoundError(f"no baseline with id {baseline_id}")
    return matrix_hash(*_frozen(s, b))


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


def _row(s: Session, name: str) -> Baseline:
    row = s.scalar(select(Baseline).where(Baseline.name == name))
    if row is None:
        raise NotFoundError(f"no baseline named {name!r}; see 'loopledger baseline list'")
    return row


def _is_signed(s: Session, b: Baseline) -> bool:
    return bool(s.scalar(select(func.count()).select_from(Signoff).where(Signoff.baseline_id == b.id)))


def create_baseline(lg, name: str, *, revisions: Sequence[tuple[str, str]] | None = None,
                    note: str = "", supersedes: str | None = None, replace: bool = False,
                    author: str | None = None) -> BaselineInfo:
    """Freeze a named baseline.

    Parameters
    ----------
    lg : Ledger
    name : str
        Baseline name (letters, digits, ``.``, ``_``, ``-``); unique.
    revisions : sequence of (loop, label), optional
        The revision columns; default: the tip of every loop.
    note : str
        Free text.
    supersedes : str, optional
        Name of the baseline this one replaces (each baseline is superseded at most once).
    replace : bool
        Refreeze an existing *unsigned* baseline of that name from the ledger as it is now.
        A signed baseline is never changed.  An earlier supersession is kept unless
        ``supersedes`` names another baseline.

    Raises
    ------
    DuplicateError
        The name exists and ``replace`` is false.
    IntegrityViolation
        The baseline is signed (with ``replace``), nothing is selected, or ``supersedes`` is
        already superseded.
    """
    if not isinstance(name, str) or not _NAME_RE.match(name):
        raise IntegrityViolation(f"baseline name {name!r} is not allowed; use letters, digits, "
                                 "'.', '_' or '-'")
    try:
        with lg.transaction() as s:
            existing = s.scalar(select(Baseline).where(Baseline.name == name))  # takes the write lock
            if existing is not None and not replace:
                raise DuplicateError(f"baseline {name!r} exists; choose another name (or replace "
                                     "an unsigned one)")
            if existing is not None and _is_signed(s, existing):
                raise IntegrityViolation(
                    f"baseline {name!r} is signed and can never change; freeze a new baseline "
                    f"that supersedes it")
            sup = None
            if supersedes is not None:
                sup = _row(s, supersedes)
                if existing is not None and sup.id == existing.id:
                    raise IntegrityViolation(f"baseline {name!r} cannot supersede itself")
                other = s.scalar(select(Baseline.name).where(Baseline.supersedes_id == sup.id))
                if other is not None and other != name:
                    raise IntegrityViolation(f"baseline {supersedes!r} is already superseded by "
                                             f"{other!r}; supersede {other!r} instead")
            selection = "tips" if revisions is None else [tuple(r) for r in revisions]
            columns, cells = live_matrix(lg, selection)
            if not columns:
                raise IntegrityViolation("nothing to freeze: no revisions selected; record a "
                                         "revision first or name revisions as LOOP:LABEL")
            mh = matrix_hash(columns, cells)
            now = datetime.now(timezone.utc)
            if existing is None:
                row = Baseline(name=name, note=note or "", author=author or lg.author,
                               supersedes_id=sup.id if sup else None, matrix_hash=mh,
                               created_at=now)
                s.add(row)
            else:
                row = existing
                s.execute(delete(BaselineEntry).where(BaselineEntry.baseline_id == row.id))
                row.note, row.author, row.matrix_hash, row.created_at = (
                    note or "", author or lg.author, mh, now)
                if sup is not None:
                    row.supersedes_id = sup.id
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
    except IntegrityError as e:
        raise IntegrityViolation(f"database refused the baseline: {e.orig}") from e
    return baseline(lg, name)


def _first_difference(frozen: dict, live: dict) -> str:
    fk = {(c["loop"], c["revision"], c["requirement"]): c for c in frozen["cells"]}
    lk = {(c["loop"], c["revision"], c["requirement"]): c for c in live["cells"]}
    for k in sorted(set(fk) | set(lk)):
        a, b = fk.get(k), lk.get(k)
        where = f"{k[2]} on {k[0]}/{k[1]}"
        if a is None:
            return f"{where} is new"
        if b is None:
            return f"{where} is gone"
        if sha256_of(a) != sha256_of(b):
            keys = [f for f in sorted(a) if canonical_json(a[f]) != canonical_json(b.get(f))]
            if a["verdict"] != b["verdict"]:
                return f"{where}: {a['verdict']} -> {b['verdict']}"
            return f"{where}: {', '.join(keys)} changed"
    fc = {(c["loop"], c["revision"]): c for c in frozen["columns"]}
    lc = {(c["loop"], c["revision"]): c for c in live["columns"]}
    for k in sorted(set(fc) | set(lc)):
        if canonical_json(fc.get(k)) != canonical_json(lc.get(k)):
            return f"revision {k[0]}/{k[1]} or its plant version changed"
    return "matrix differs"


def sign_baseline(lg, name: str, *, signer: str, role: str, statement: str,
                  author: str | None = None) -> SignoffInfo:
    """Sign a baseline: record an approval bound to its matrix hash.

    Parameters
    ----------
    lg : Ledger
    name : str
        The baseline.
    signer, role, statement : str
        Who approves, in what role, and what they state (all required).

    Raises
    ------
    IntegrityViolation
        A field is empty; the baseline is superseded; its stored entries do not match its
        hash; a record it freezes (revision, requirement version, plant version, their loops,
        requirements and plants, the results of its revisions with their metric values), the
        baseline itself or the hash chain no longer give their recomputed hashes (run the
        audit); it holds stale or unverified cells; or the matrix recomputed from
        the ledger now differs from the frozen one.  Nothing is recorded.
    """
    for what, value in (("name", signer), ("role", role), ("statement", statement)):
        if not isinstance(value, str) or not value.strip():
            raise IntegrityViolation(f"sign-off of {name!r}: a {what} is required")
    try:
        with lg.transaction() as s:
            lock(s)  # PostgreSQL: no result write can commit while we compare and sign
            b = _row(s, name)  # takes the write lock: nothing changes while we compare
            successor = s.scalar(select(Baseline.name).where(Baseline.supersedes_id == b.id))
            if successor is not None:
                raise IntegrityViolation(f"baseline {name!r} is superseded by {successor!r}; "
                                         f"sign {successor!r} instead")
            cols, cells = _frozen(s, b)
            if matrix_hash(cols, cells) != b.matrix_hash:
                raise IntegrityViolation(f"baseline {name!r}: stored entries do not match its "
                                         "matrix hash; run 'loopledger audit'")
            from .audit import Checker

            chk = Checker(s)  # recompute what the baseline freezes, not the stored hashes
            chk.frozen(b.id)
            if chk.findings:
                more = f" and {len(chk.findings) - 1} more" if len(chk.findings) > 1 else ""
                raise IntegrityViolation(
                    f"baseline {name!r}: {chk.findings[0]}{more}; nothing signed, run "
                    "'loopledger audit'")
            bad = [c for c in cells if c["verdict"] in UNSIGNABLE]
            if bad:
                c = bad[0]
                raise IntegrityViolation(
                    f"baseline {name!r} holds {len(bad)} stale or unverified cell(s) (first: "
                    f"{c['requirement']} on {c['loop']}/{c['revision']} is {c['verdict']}); "
                    "verify, then freeze a new baseline")
            live_cols, live_cells = live_matrix(lg, [(c["loop"], c["revision"]) for c in cols])
            if matrix_hash(live_cols, live_cells) != b.matrix_hash:
                diff = _first_difference(_sorted(cols, cells),
                                         json.loads(canonical_json(_sorted(live_cols, live_cells))))
                raise IntegrityViolation(
                    f"results changed since baseline {name!r} was frozen ({diff}); freeze a new "
                    "baseline that supersedes it and sign that")
            row = Signoff(baseline_id=b.id, name=signer.strip(), role=role.strip(),
                          statement=statement.strip(), author=author or lg.author,
                          matrix_hash=b.matrix_hash, chain_head=chain_head(s),
                          signed_at=datetime.now(timezone.utc))
            s.add(row)
            s.flush()
            append_link(s, "signoff", row)
            info = _signoff_info(row, b.name)
    except IntegrityError as e:
        raise IntegrityViolation(f"database refused the sign-off: {e.orig}") from e
    return info


# -- reading -------------------------------------------------------------------------------
def _utc(dt: datetime) -> datetime:
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


def _num(x) -> float | None:
    if x == "inf":
        return math.inf
    if x == "-inf":
        return -math.inf
    return x


def _signoff_info(r: Signoff, baseline_name: str) -> SignoffInfo:
    return SignoffInfo(baseline=baseline_name, name=r.name, role=r.role, statement=r.statement,
                       author=r.author, matrix_hash=r.matrix_hash, chain_head=r.chain_head,
                       signed_at=_utc(r.signed_at))


def _info(s: Session, b: Baseline) -> BaselineInfo:
    cols, cells = _frozen(s, b)
    srt = _sorted(cols, cells)
    sup = s.get(Baseline, b.supersedes_id).name if b.supersedes_id else None
    succ = s.scalar(select(Baseline.name).where(Baseline.supersedes_id == b.id))
    signs = s.scalars(select(Signoff).where(Signoff.baseline_id == b.id).order_by(Signoff.id)).all()
    return BaselineInfo(
        name=b.name, note=b.note, author=b.author, created_at=_utc(b.created_at),
        matrix_hash=b.matrix_hash, supersedes=sup, superseded_by=succ,
        columns=tuple(BaselineColumn(**c) for c in srt["columns"]),
        cells=tuple(FrozenCell(**{**c, "value": _num(c["value"]), "headroom": _num(c["headroom"])})
                    for c in srt["cells"]),
        signoffs=tuple(_signoff_info(r, b.name) for r in signs),
    )


def baselines(lg) -> list[BaselineInfo]:
    """Every baseline, oldest first."""
    with lg.reading() as s:
        return [_info(s, b) for b in s.scalars(select(Baseline).order_by(Baseline.id))]


def baseline(lg, name: str) -> BaselineInfo:
    """One baseline with its frozen columns, cells and sign-offs."""
    with lg.reading() as s:
        return _info(s, _row(s, name))
