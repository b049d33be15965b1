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
now, and refuses unless both agree with what was frozen.  It refuses a baseline holding
``fail``, ``error``, ``stale`` or ``unverified`` cells unless each one is covered: a ``fail``
or ``error`` by a live waiver (``ledger.waivers``: not withdrawn, not expired on the day of
signing), any of them by naming it explicitly (``accept``, ``REQ@LOOP:LABEL``).  The sign-off
record lists what it accepted and the waivers it relied on (``accepted_json``, part of its
record hash).  A signed baseline never changes; a newer baseline may supersede it (recorded,
at most once).
"""

from __future__ import annotations

import json
import re
from typing import Sequence

from .errors import DuplicateError, IntegrityViolation, WaiverError
from .hashing import canonical_json, sha256_of
from .records import BaselineColumn, BaselineInfo, FrozenCell, SignoffInfo
from .store import baselines as baselines_db
from .store import waivers as waivers_db
from .store.audit import Checker
from .store.baselines import frozen_matrix_hash, matrix_hash, sorted_matrix
from .store.chain import lock
from .store.view import SessionView

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
#: Verdicts a baseline may hold but a sign-off refuses unless each cell is waived (``fail``,
#: ``error``) or accepted explicitly.
UNSIGNABLE = ("fail", "error", "stale", "unverified")


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

    def work(s) -> None:
        existing = baselines_db.find(s, name)  # takes the write lock
        if existing is not None and not replace:
            raise DuplicateError(f"baseline {name!r} exists; choose another name (or replace "
                                 "an unsigned one)")
        if existing is not None and baselines_db.is_signed(s, existing):
            raise IntegrityViolation(
                f"baseline {name!r} is signed and can never change; freeze a new baseline "
                f"that supersedes it")
        sup = None
        if supersedes is not None:
            sup = baselines_db.baseline_row(s, supersedes)
            if existing is not None and sup.id == existing.id:
                raise IntegrityViolation(f"baseline {name!r} cannot supersede itself")
            other = baselines_db.successor(s, sup)
            if other is not None and other != name:
                raise IntegrityViolation(f"baseline {supersedes!r} is already superseded by "
                                         f"{other!r}; supersede {other!r} instead")
        selection = "tips" if revisions is None else [tuple(r) for r in revisions]
        columns, cells = live_matrix(SessionView(s), selection)
        if not columns:
            raise IntegrityViolation("nothing to freeze: no revisions selected; record a "
                                     "revision first or name revisions as LOOP:LABEL")
        baselines_db.write_baseline(s, name, existing=existing, supersedes=sup,
                                    columns=columns, cells=cells, note=note,
                                    author=author or lg.author)

    lg.store.write(work)
    return baseline(lg, name)


def first_difference(frozen: dict, live: dict) -> str:
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


def _accept_set(accept) -> list[tuple[str, str, str]]:
    """``accept`` items (``"REQ@LOOP:LABEL"`` or ``(req, loop, label)``) as triples."""
    from .waivers import parse_cell

    out = []
    for item in accept or ():
        t = parse_cell(item) if isinstance(item, str) else tuple(item)
        if len(t) != 3:
            raise WaiverError(f"accept {item!r}: give REQ@LOOP:LABEL")
        out.append(t)
    return list(dict.fromkeys(out))


def covered_cells(name: str, cells: Sequence[dict], waivers, accept, as_of) -> dict:
    """Which of a baseline's ``cells`` need covering and what covers each.

    Returns ``{"accepted": [...], "waivers": [...]}`` (the sign-off record's lists); raises
    :class:`~ledger.errors.WaiverError` when an ``accept`` names no cell that needs it, and
    :class:`~ledger.errors.IntegrityViolation` naming the first cell left uncovered.
    """
    from .waivers import WaiverIndex, cell_text

    index = WaiverIndex(waivers, as_of)
    wanted = _accept_set(accept)
    need = {(c["requirement"], c["loop"], c["revision"]): c for c in cells
            if c["verdict"] in UNSIGNABLE}
    for t in wanted:
        if t not in need:
            there = any((c["requirement"], c["loop"], c["revision"]) == t for c in cells)
            raise WaiverError(
                f"accept {cell_text(*t)}: baseline {name!r} has "
                + ("that cell, but it passes" if there else "no such cell")
                + "; accept only failing, error, stale or unverified cells")
    accepted, used, bad = [], [], []
    for key in sorted(need, key=lambda k: (k[1], k[2], k[0])):
        c = need[key]
        cell = {"requirement": key[0], "loop": key[1], "revision": key[2],
                "verdict": c["verdict"]}
        if key in wanted:
            accepted.append(cell)
            continue
        w = index.cover(key[0], key[1], key[2], c["verdict"])
        if w is None:
            bad.append(c)
            continue
        used.append({**cell, "waiver": w.id, "reason": w.reason, "approver": w.approver,
                     "role": w.role, "expires_on": w.expires_on, "condition": w.condition,
                     "record_hash": w.record_hash})
    if bad:
        c = bad[0]
        raise IntegrityViolation(
            f"baseline {name!r} holds {len(bad)} failing, error, stale or unverified cell(s) "
            f"neither waived nor accepted (first: {c['requirement']} on "
            f"{c['loop']}/{c['revision']} is {c['verdict']}); verify and freeze a new "
            f"baseline, waive it, or accept it explicitly "
            f"({cell_text(c['requirement'], c['loop'], c['revision'])})")
    return {"accepted": accepted, "waivers": used}


def sign_baseline(lg, name: str, *, signer: str, role: str, statement: str,
                  author: str | None = None, accept: Sequence = (),
                  as_of=None) -> SignoffInfo:
    """Sign a baseline: record an approval bound to its matrix hash.

    Parameters
    ----------
    lg : Ledger
    name : str
        The baseline.
    signer, role, statement : str
        Who approves, in what role, and what they state (all required).
    accept : sequence of ``"REQ@LOOP:LABEL"`` (or ``(req, loop, label)``)
        Failing, error, stale or unverified cells accepted explicitly by this sign-off.
    as_of : date or ``YYYY-MM-DD``, optional
        The day waivers are judged on (default today, UTC; never earlier than today).

    Raises
    ------
    IntegrityViolation
        A field is empty; the baseline is superseded; its stored entries do not match its
        hash; a record it freezes (revision, requirement version, plant version, their loops,
        requirements and plants, the results of its revisions with their metric values), the
        baseline itself or the hash chain no longer give their recomputed hashes (run the
        audit); it holds failing, error, stale or unverified cells that no live waiver
        covers and ``accept`` does not name; or the matrix recomputed from the ledger now
        differs from the frozen one.  Nothing is recorded.
    WaiverError
        ``accept`` names a cell the baseline does not hold or that passes, or ``as_of`` is
        before today.
    """
    from .waivers import as_date, today

    for what, value in (("name", signer), ("role", role), ("statement", statement)):
        if not isinstance(value, str) or not value.strip():
            raise IntegrityViolation(f"sign-off of {name!r}: a {what} is required")
    day = as_date(as_of)
    if day < today():
        raise WaiverError(f"sign-off of {name!r}: waivers are judged on today or later, not "
                          f"{day.isoformat()}")
    _accept_set(accept)  # a malformed cell is named before anything is read

    def work(s) -> SignoffInfo:
        lock(s)  # PostgreSQL: no result write can commit while we compare and sign
        b = baselines_db.baseline_row(s, name)  # takes the write lock: nothing changes now
        successor = baselines_db.successor(s, b)
        if successor is not None:
            raise IntegrityViolation(f"baseline {name!r} is superseded by {successor!r}; "
                                     f"sign {successor!r} instead")
        cols, cells = baselines_db.frozen(s, b)
        if matrix_hash(cols, cells) != b.matrix_hash:
            raise IntegrityViolation(f"baseline {name!r}: stored entries do not match its "
                                     "matrix hash; run 'loopledger audit'")
        chk = Checker(s)  # recompute what the baseline freezes, not the stored hashes
        chk.frozen(b.id)
        chk.records("waiver")             # the waivers it may rely on, and their withdrawals
        chk.records("waiver_withdrawal")  # (a deleted withdrawal would revive a waiver)
        if chk.findings:
            more = f" and {len(chk.findings) - 1} more" if len(chk.findings) > 1 else ""
            raise IntegrityViolation(
                f"baseline {name!r}: {chk.findings[0]}{more}; nothing signed, run "
                "'loopledger audit'")
        covered = covered_cells(name, cells, waivers_db.all_waivers(s), accept, day)
        live_cols, live_cells = live_matrix(SessionView(s),
                                            [(c["loop"], c["revision"]) for c in cols])
        if matrix_hash(live_cols, live_cells) != b.matrix_hash:
            diff = first_difference(
                sorted_matrix(cols, cells),
                json.loads(canonical_json(sorted_matrix(live_cols, live_cells))))
            raise IntegrityViolation(
                f"results changed since baseline {name!r} was frozen ({diff}); freeze a new "
                "baseline that supersedes it and sign that")
        record = ""
        if covered["accepted"] or covered["waivers"]:
            record = canonical_json({**covered, "as_of": day.isoformat()})
        return baselines_db.add_signoff(s, b, signer=signer, role=role, statement=statement,
                                        author=author or lg.author, accepted_json=record)

    return lg.store.write(work)


# -- reading -------------------------------------------------------------------------------
def baselines(lg) -> list[BaselineInfo]:
    """Every baseline, oldest first."""
    with lg.reading() as s:
        return baselines_db.all_baselines(s)


def baseline(lg, name: str) -> BaselineInfo:
    """One baseline with its frozen columns, cells and sign-offs."""
    with lg.reading() as s:
        return baselines_db.info(s, baselines_db.baseline_row(s, name))
