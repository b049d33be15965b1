"""The Python API of the ledger: ``open_ledger`` and the :class:`Ledger` object.

Every public method that writes is one database transaction: it either records everything it
was asked to or nothing.  Records with history are append-only.
"""

from __future__ import annotations

import getpass
import json
import math
import os
import re
from collections import deque
from datetime import datetime, timezone
from typing import Any, Callable, Iterable, Mapping, Sequence

from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from .errors import (
    SchemaError,
    DuplicateError,
    IntegrityViolation,
    LedgerError,
    ModelError,
    NotFoundError,
    SpecError,
)
from .chain import append_link
from .hashing import sha256_of
from .records import LineageNode, LoopInfo, PlantInfo, RequirementInfo, ResultInfo, RevisionInfo
from .store.db import display_url, is_sqlite, make_engine, resolve_url, scrub_secret, session_scope
from .store.migrate import ensure_schema
from .store.models import (
    Loop,
    Plant,
    PlantVersion,
    Requirement,
    RequirementLoop,
    RequirementParent,
    RequirementVersion,
    Result,
    Revision,
)

__all__ = ["open_ledger", "Ledger", "METHODS", "STATUSES", "LOOP_KINDS"]

METHODS = ("analysis", "test", "inspection", "demonstration")
STATUSES = ("draft", "approved", "retired")
LOOP_KINDS = ("position", "speed", "temperature", "process", "other")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")
_KEY_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,39}$")


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _utc(dt: datetime) -> datetime:
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


def default_author() -> str:
    env = os.environ.get("LOOPLEDGER_AUTHOR")
    if env:
        return env
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def _check_name(kind: str, name: str, pattern=_NAME_RE) -> str:
    if not isinstance(name, str) or not pattern.match(name):
        raise IntegrityViolation(
            f"{kind} name {name!r} is not allowed; use letters, digits, '.', '_' or '-'"
        )
    return name


def _finite(name: str, value, *, allow_none=False, minimum=None, strict=False) -> float | None:
    if value is None:
        if allow_none:
            return None
        raise ModelError(f"{name} is required")
    try:
        v = float(value)
    except (TypeError, ValueError) as e:
        raise ModelError(f"{name} must be a number, got {value!r}") from e
    if not math.isfinite(v):
        raise ModelError(f"{name} must be finite, got {value!r}")
    if minimum is not None and (v < minimum or (strict and v == minimum)):
        op = ">" if strict else ">="
        raise ModelError(f"{name} must be {op} {minimum}, got {v}")
    return v


def _model_canonical(text: str, *, what: str, sample_time: float | None = None) -> str:
    """Parse model text (no eval) and return its canonical form; raise a one-line error."""
    from .systems import compile_model

    if not isinstance(text, str) or not text.strip():
        raise ModelError(f"{what}: model text is empty")
    try:
        model = compile_model(text)
    except LedgerError as e:
        raise type(e)(f"{what}: {e}") from e
    if model.variable == "z" and sample_time is None:
        raise ModelError(f"{what}: a model in z needs a sample time")
    return model.canonical


def _param_specs(params: Mapping[str, Any] | None, *, what: str) -> dict:
    """Validate parameter specs; store them as JSON-able dicts."""
    from .systems import ParamSpec

    out = {}
    for name, raw in (params or {}).items():
        try:
            spec = ParamSpec.from_value(raw)
        except LedgerError as e:
            raise type(e)(f"{what}: parameter {name!r}: {e}") from e
        out[str(name)] = raw if not hasattr(raw, "items") else dict(raw)
        _ = spec
    return out


#: fields of a plant version that its content hash covers
PLANT_HASH_FIELDS = ("canonical", "parameters_json", "fidelity_json", "samples", "seed",
                     "sample_time", "input_unit", "output_unit")


def plant_content_hash(fields: Mapping[str, Any]) -> str:
    """Content hash of a plant version from its stored fields (a row or a dict).

    ``parameters_json`` keeps the parameters in the order they were given (for display and
    corner names); the hash reads it in canonical form (keys sorted), so the order does not
    change the hash, and every version stored before the order was kept (stored sorted) has the
    same hash as before.  The family's numbers do not depend on the order either (samples are
    drawn in sorted name order), so the hash remains a valid cache key.
    """
    get = fields.get if hasattr(fields, "get") else (lambda k: getattr(fields, k))
    f = {k: get(k) for k in PLANT_HASH_FIELDS}
    f["parameters_json"] = json.dumps(json.loads(f["parameters_json"] or "{}"), sort_keys=True)
    return sha256_of(f)


class Ledger:
    """An open ledger.  Use :func:`open_ledger` to get one; close it (or use ``with``)."""

    def __init__(self, url: str, *, author: str | None = None):
        self.url = url
        self.author = author or default_author()
        self._engine = make_engine(url)
        self._sessions = sessionmaker(self._engine, expire_on_commit=False)
        self._read_engine = make_engine(url, immediate=False) if is_sqlite(url) else self._engine
        self._read_sessions = sessionmaker(self._read_engine, expire_on_commit=False)
        self.schema_action = "current"
        self.auto_verify = True
        #: write transactions retried because the database was busy
        self.retries = 0
        #: number of (metric, settings) requests the engine evaluated through this object
        self.kernel_requests = 0

    @property
    def display_url(self) -> str:
        """:attr:`url` fit to print or store in an export: the password masked."""
        return display_url(self.url)

    # -- plumbing -------------------------------------------------------------------------
    def close(self) -> None:
        self._engine.dispose()
        self._read_engine.dispose()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def transaction(self):
        """A session context manager: one write transaction, committed on success."""
        return session_scope(self._sessions, self.url)

    def reading(self):
        """A session context manager for reads: one consistent snapshot, no write lock."""
        return session_scope(self._read_sessions, self.url)

    #: how many times a write may be retried when the database is busy (bounded)
    WRITE_RETRIES = 5

    def _write(self, fn, *args, **kwargs):
        """Run ``fn(session, ...)`` in one write transaction.

        A busy database (SQLite lock held past the busy timeout; PostgreSQL serialisation
        failure or deadlock) rolls the whole transaction back and retries it, at most
        :attr:`WRITE_RETRIES` times with growing pauses; each retry is counted in
        :attr:`retries`.  Past that the error says so and nothing is written.
        """
        import random
        import time

        attempt = 0
        while True:
            try:
                with self.transaction() as s:
                    try:
                        out = fn(s, *args, **kwargs)
                        s.flush()
                    except IntegrityError as e:
                        raise IntegrityViolation(f"database refused the change: {e.orig}") from e
                return out
            except SchemaError as e:
                if not _is_busy(e.__cause__) or attempt >= self.WRITE_RETRIES:
                    if _is_busy(e.__cause__):
                        raise SchemaError(f"database busy after {attempt} retries; nothing was "
                                          "written, try again") from e
                    raise
                attempt += 1
                self.retries += 1
                time.sleep(min(2.0, 0.05 * 2 ** attempt) * (0.5 + random.random()))

    @staticmethod
    def _lock(s: Session, model, row_id: int) -> None:
        """Row lock for read-then-write sequences on PostgreSQL (SQLite writers already hold
        the database write lock from BEGIN IMMEDIATE)."""
        if s.get_bind().dialect.name == "postgresql":
            s.execute(select(model.id).where(model.id == row_id).with_for_update())

    # -- lookups --------------------------------------------------------------------------
    @staticmethod
    def _one(s: Session, model, column, value, missing: str):
        row = s.scalar(select(model).where(column == value))
        if row is None:
            raise NotFoundError(missing)
        return row

    def _plant_row(self, s: Session, name: str) -> Plant:
        return self._one(s, Plant, Plant.name, name, f"no plant named {name!r}")

    def _loop_row(self, s: Session, name: str) -> Loop:
        return self._one(s, Loop, Loop.name, name, f"no loop named {name!r}")

    def _req_row(self, s: Session, key: str) -> Requirement:
        return self._one(s, Requirement, Requirement.key, key, f"no requirement with ID {key!r}")

    @staticmethod
    def _latest_plant_version(s: Session, plant_id: int) -> PlantVersion:
        return s.scalar(
            select(PlantVersion)
            .where(PlantVersion.plant_id == plant_id)
            .order_by(PlantVersion.number.desc())
            .limit(1)
        )

    @staticmethod
    def _latest_req_version(s: Session, req_id: int) -> RequirementVersion:
        return s.scalar(
            select(RequirementVersion)
            .where(RequirementVersion.requirement_id == req_id)
            .order_by(RequirementVersion.number.desc())
            .limit(1)
        )

    @staticmethod
    def _revision_row(s: Session, loop: Loop, label: str) -> Revision:
        row = s.scalar(select(Revision).where(Revision.loop_id == loop.id, Revision.label == label))
        if row is None:
            raise NotFoundError(f"loop {loop.name!r} has no revision {label!r}")
        return row

    @staticmethod
    def _tip_row(s: Session, loop: Loop) -> Revision | None:
        return s.scalar(
            select(Revision).where(Revision.loop_id == loop.id).order_by(Revision.seq.desc()).limit(1)
        )

    # -- plants ---------------------------------------------------------------------------
    def _plant_fields(self, name, model, params, fidelity, samples, seed, sample_time,
                      input_unit, output_unit) -> dict:
        what = f"plant {name!r}"
        sample_time = _finite("sample_time", sample_time, allow_none=True, minimum=0, strict=True)
        canonical = _model_canonical(model, what=what, sample_time=sample_time)
        fid = {}
        for fname, ftext in (fidelity or {}).items():
            _check_name("fidelity model", str(fname))
            _model_canonical(ftext, what=f"{what} fidelity model {fname!r}", sample_time=sample_time)
            fid[str(fname)] = ftext
        samples = int(samples or 0)
        if samples < 0 or samples > 100_000:
            raise ModelError(f"{what}: samples must be between 0 and 100000")
        fields = dict(
            model_text=model,
            canonical=canonical,
            # in the order given (docs/models.md: corners name parameters in that order);
            # the content hash reads it sorted (plant_content_hash)
            parameters_json=json.dumps(_param_specs(params, what=what)),
            fidelity_json=json.dumps(fid, sort_keys=True),
            samples=samples,
            seed=int(seed or 0),
            sample_time=sample_time,
            input_unit=input_unit or "",
            output_unit=output_unit or "",
        )
        # the family must build (parameters present, tolerances sane); fails fast with the reason
        from .systems import build_family

        try:
            build_family(model, json.loads(fields["parameters_json"]), corners=True,
                         samples=min(samples, 2), seed=fields["seed"], fidelity=fid,
                         sample_time=sample_time)
        except LedgerError as e:
            raise type(e)(f"{what}: {e}") from e
        fields["content_hash"] = plant_content_hash(fields)
        return fields

    def _add_plant(self, s: Session, name: str, model: str, *, params=None, fidelity=None,
                   samples=0, seed=0, sample_time=None, input_unit="", output_unit="",
                   description="", note="", author=None) -> tuple[PlantInfo, bool]:
        _check_name("plant", name)
        fields = self._plant_fields(name, model, params, fidelity, samples, seed, sample_time,
                                    input_unit, output_unit)
        row = s.scalar(select(Plant).where(Plant.name == name))
        created = False
        if row is None:
            row = Plant(name=name, description=description or "", created_at=_now())
            s.add(row)
            s.flush()
            append_link(s, "plant", row)
            number = 1
        else:
            latest = self._latest_plant_version(s, row.id)
            if latest.content_hash == fields["content_hash"] and latest.model_text == model:
                return self._plant_info(s, row, latest), False
            number = latest.number + 1
        pv = PlantVersion(plant_id=row.id, number=number, note=note or "",
                          author=author or self.author, created_at=_now(), **fields)
        s.add(pv)
        s.flush()
        append_link(s, "plant_version", pv)
        created = True
        return self._plant_info(s, row, pv), created

    def add_plant(self, name: str, model: str, *, params: Mapping | None = None,
                  fidelity: Mapping[str, str] | None = None, samples: int = 0, seed: int = 0,
                  sample_time: float | None = None, input_unit: str = "", output_unit: str = "",
                  description: str = "", note: str = "") -> PlantInfo:
        """Add a plant, or a new version of an existing one if anything changed.

        Parameters
        ----------
        name : str
            Plant name (letters, digits, ``.``, ``_``, ``-``).
        model : str
            Nominal design model as text, e.g. ``"K/(s*(tau_m*s+1))"``.
        params : mapping, optional
            Parameter name -> nominal value, or a dict ``{nominal, tol | low/high, dist}``.
        fidelity : mapping, optional
            Extra models (e.g. the full-order one) by name, using the same parameters.
        samples, seed : int
            Seeded Monte Carlo samples drawn from the tolerances.
        sample_time : float, optional
            Seconds, for a plant given in ``z``.
        """
        info, _ = self._write(self._add_plant, name, model, params=params, fidelity=fidelity,
                              samples=samples, seed=seed, sample_time=sample_time,
                              input_unit=input_unit, output_unit=output_unit,
                              description=description, note=note)
        return info

    def _plant_info(self, s: Session, plant: Plant, pv: PlantVersion) -> PlantInfo:
        nver = s.scalar(select(func.count()).select_from(PlantVersion)
                        .where(PlantVersion.plant_id == plant.id))
        return PlantInfo(
            name=plant.name, version=pv.number, model=pv.model_text, canonical=pv.canonical,
            params=json.loads(pv.parameters_json), fidelity=json.loads(pv.fidelity_json),
            samples=pv.samples, seed=pv.seed, sample_time=pv.sample_time,
            input_unit=pv.input_unit, output_unit=pv.output_unit, description=plant.description,
            note=pv.note, author=pv.author, content_hash=pv.content_hash,
            created_at=_utc(pv.created_at), versions=nver,
        )

    def plants(self) -> list[PlantInfo]:
        """Every plant at its latest version, by name."""
        with self.reading() as s:
            out = []
            for p in s.scalars(select(Plant).order_by(Plant.name)):
                out.append(self._plant_info(s, p, self._latest_plant_version(s, p.id)))
            return out

    def plant(self, name: str, version: int | None = None) -> PlantInfo:
        """One plant, at its latest version or at ``version``."""
        with self.reading() as s:
            p = self._plant_row(s, name)
            if version is None:
                pv = self._latest_plant_version(s, p.id)
            else:
                pv = s.scalar(select(PlantVersion).where(PlantVersion.plant_id == p.id,
                                                         PlantVersion.number == int(version)))
                if pv is None:
                    raise NotFoundError(f"plant {name!r} has no version {version}")
            return self._plant_info(s, p, pv)

    def plant_history(self, name: str) -> list[PlantInfo]:
        with self.reading() as s:
            p = self._plant_row(s, name)
            rows = s.scalars(select(PlantVersion).where(PlantVersion.plant_id == p.id)
                             .order_by(PlantVersion.number)).all()
            return [self._plant_info(s, p, pv) for pv in rows]

    # -- loops ----------------------------------------------------------------------------
    def _loop_fields(self, name, kind, sensor, prefilter, input_delay, output_delay, sample_time,
                     computation_delay, actuator_limit) -> dict:
        what = f"loop {name!r}"
        if kind not in LOOP_KINDS:
            raise IntegrityViolation(f"{what}: kind {kind!r} is not one of {', '.join(LOOP_KINDS)}")
        sample_time = _finite(f"{what}: sample_time", sample_time, allow_none=True, minimum=0,
                              strict=True)
        fields = dict(
            kind=kind,
            sensor_text=sensor or "",
            prefilter_text=prefilter or "",
            input_delay=_finite(f"{what}: input_delay", input_delay or 0.0, minimum=0),
            output_delay=_finite(f"{what}: output_delay", output_delay or 0.0, minimum=0),
            sample_time=sample_time,
            computation_delay=int(computation_delay or 0),
            actuator_limit=_finite(f"{what}: actuator_limit", actuator_limit, allow_none=True,
                                   minimum=0, strict=True),
        )
        if fields["computation_delay"] < 0:
            raise ModelError(f"{what}: computation_delay must be >= 0 samples")
        if fields["computation_delay"] and sample_time is None:
            raise ModelError(f"{what}: computation_delay needs a sample_time")
        for part in ("sensor_text", "prefilter_text"):
            if fields[part]:
                _model_canonical(fields[part], what=f"{what} {part[:-5]}", sample_time=sample_time)
        return fields

    def _add_loop(self, s: Session, name: str, plant: str, *, kind="position", sensor="",
                  prefilter="", input_delay=0.0, output_delay=0.0, sample_time=None,
                  computation_delay=0, actuator_limit=None, description="") -> tuple[LoopInfo, bool]:
        _check_name("loop", name)
        p = self._plant_row(s, plant)
        fields = self._loop_fields(name, kind, sensor, prefilter, input_delay, output_delay,
                                   sample_time, computation_delay, actuator_limit)
        row = s.scalar(select(Loop).where(Loop.name == name))
        if row is not None:
            same = row.plant_id == p.id and all(getattr(row, k) == v for k, v in fields.items())
            if same:
                return self._loop_info(s, row), False
            raise DuplicateError(
                f"loop {name!r} exists with other settings; loop settings are fixed once "
                "revisions may depend on them: create a loop with a new name"
            )
        row = Loop(name=name, plant_id=p.id, description=description or "", created_at=_now(),
                   **fields)
        s.add(row)
        s.flush()
        append_link(s, "loop", row)
        return self._loop_info(s, row), True

    def add_loop(self, name: str, plant: str, *, kind: str = "position", sensor: str = "",
                 prefilter: str = "", input_delay: float = 0.0, output_delay: float = 0.0,
                 sample_time: float | None = None, computation_delay: int = 0,
                 actuator_limit: float | None = None, description: str = "") -> LoopInfo:
        """Add a loop: how a controller and a plant are connected.

        Parameters
        ----------
        sensor, prefilter : str
            Model text; empty means unity feedback / no prefilter.
        input_delay, output_delay : float
            Seconds (actuation and measurement transport delays).
        sample_time : float, optional
            Seconds; set for a digital controller (given in ``z``).
        computation_delay : int
            Whole samples of computation delay (z^-d).
        actuator_limit : float, optional
            Largest |u| the actuator can deliver, in the plant's input unit.
        """
        info, _ = self._write(self._add_loop, name, plant, kind=kind, sensor=sensor,
                              prefilter=prefilter, input_delay=input_delay,
                              output_delay=output_delay, sample_time=sample_time,
                              computation_delay=computation_delay,
                              actuator_limit=actuator_limit, description=description)
        return info

    def _loop_info(self, s: Session, row: Loop) -> LoopInfo:
        n = s.scalar(select(func.count()).select_from(Revision).where(Revision.loop_id == row.id))
        tip = self._tip_row(s, row)
        return LoopInfo(
            name=row.name, plant=row.plant.name, kind=row.kind, description=row.description,
            sensor=row.sensor_text, prefilter=row.prefilter_text, input_delay=row.input_delay,
            output_delay=row.output_delay, sample_time=row.sample_time,
            computation_delay=row.computation_delay, actuator_limit=row.actuator_limit,
            created_at=_utc(row.created_at), revisions=n, tip=tip.label if tip else None,
        )

    def loops(self) -> list[LoopInfo]:
        with self.reading() as s:
            return [self._loop_info(s, r) for r in s.scalars(select(Loop).order_by(Loop.name))]

    def loop(self, name: str) -> LoopInfo:
        with self.reading() as s:
            return self._loop_info(s, self._loop_row(s, name))

    # -- requirements ---------------------------------------------------------------------
    def _req_fields(self, s: Session, key: str, *, title, statement, rationale, method, status,
                    metric, settings, limit, parents, loops) -> dict:
        what = f"requirement {key!r}"
        if not isinstance(title, str) or not title.strip():
            raise IntegrityViolation(f"{what}: a title is required")
        if not isinstance(statement, str) or not statement.strip():
            raise IntegrityViolation(f"{what}: a statement is required")
        if method not in METHODS:
            raise IntegrityViolation(f"{what}: method {method!r} is not one of {', '.join(METHODS)}")
        if status not in STATUSES:
            raise IntegrityViolation(f"{what}: status {status!r} is not one of {', '.join(STATUSES)}")
        settings = dict(settings or {})
        comparator = limit_value = None
        limit_text = ""
        if metric:
            from .catalogue import check_settings, metric_unit
            from .units import parse_limit

            unit = metric_unit(metric)  # raises for an unknown metric
            try:
                settings = check_settings(metric, settings)
            except LedgerError as e:
                raise type(e)(f"{what}: {e}") from e
            if limit is None:
                raise IntegrityViolation(f"{what}: metric {metric!r} needs a limit, e.g. '<= 25 ms'")
            try:
                lim = parse_limit(limit, unit)
            except LedgerError as e:
                raise type(e)(f"{what}: {e}") from e
            comparator, limit_value, limit_text = lim.comparator, lim.value, lim.text
            if not loops:
                pass  # allowed (coverage will report it)
        elif limit:
            raise IntegrityViolation(f"{what}: a limit needs a metric")
        elif settings:
            raise IntegrityViolation(f"{what}: settings need a metric")
        parent_keys = sorted(set(parents or ()))
        if key in parent_keys:
            raise IntegrityViolation(f"{what}: a requirement cannot derive from itself")
        for pk in parent_keys:
            self._req_row(s, pk)
        loop_names = sorted(set(loops or ()))
        for ln in loop_names:
            self._loop_row(s, ln)
        return dict(
            title=title.strip(), statement=statement.strip(), rationale=(rationale or "").strip(),
            method=method, status=status, metric=metric or None,
            settings_json=json.dumps(settings, sort_keys=True), comparator=comparator,
            limit_value=limit_value, limit_text=limit_text, parents=parent_keys, loops=loop_names,
        )

    @staticmethod
    def _hash_req(fields: dict) -> str:
        return sha256_of({k: fields[k] for k in (
            "title", "statement", "rationale", "method", "status", "metric", "settings_json",
            "comparator", "limit_value", "limit_text", "parents", "loops")})

    def _parent_graph(self, s: Session) -> dict[str, set[str]]:
        """Latest trace edges: requirement key -> keys it derives from."""
        graph: dict[str, set[str]] = {}
        for req in s.scalars(select(Requirement)):
            v = self._latest_req_version(s, req.id)
            graph[req.key] = {s.get(Requirement, p.parent_id).key for p in v.parents}
        return graph

    def _check_no_cycle(self, s: Session, key: str, parents: Iterable[str]) -> None:
        graph = self._parent_graph(s)
        graph[key] = set(parents)
        # is key reachable from any of its parents by following parent edges?
        seen, todo = set(), deque(parents)
        while todo:
            k = todo.popleft()
            if k == key:
                raise IntegrityViolation(
                    f"requirement {key!r}: trace would form a cycle through {sorted(parents)}"
                )
            if k in seen:
                continue
            seen.add(k)
            todo.extend(graph.get(k, ()))

    def _write_req_version(self, s: Session, req: Requirement, number: int, fields: dict,
                           author: str, note: str) -> RequirementVersion:
        content_hash = self._hash_req(fields)
        v = RequirementVersion(
            requirement_id=req.id, number=number, author=author, note=note or "",
            content_hash=content_hash, created_at=_now(),
            **{k: fields[k] for k in fields if k not in ("parents", "loops")},
        )
        for pk in fields["parents"]:
            v.parents.append(RequirementParent(parent_id=self._req_row(s, pk).id))
        for ln in fields["loops"]:
            v.loops.append(RequirementLoop(loop_id=self._loop_row(s, ln).id))
        s.add(v)
        s.flush()
        append_link(s, "requirement_version", v)
        return v

    def _upsert_requirement(self, s: Session, key: str, *, title, statement, rationale="",
                            method="analysis", status="draft", metric=None, settings=None,
                            limit=None, parents=(), loops=(), author=None, note="",
                            must_exist: bool | None = None) -> tuple[RequirementInfo, bool]:
        _check_name("requirement ID", key, _KEY_RE)
        fields = self._req_fields(s, key, title=title, statement=statement, rationale=rationale,
                                  method=method, status=status, metric=metric, settings=settings,
                                  limit=limit, parents=parents, loops=loops)
        req = s.scalar(select(Requirement).where(Requirement.key == key))
        if req is None:
            if must_exist:
                raise NotFoundError(f"no requirement with ID {key!r}")
            self._check_no_cycle(s, key, fields["parents"])
            req = Requirement(key=key, created_at=_now())
            s.add(req)
            s.flush()
            append_link(s, "requirement", req)
            v = self._write_req_version(s, req, 1, fields, author or self.author, note)
            return self._req_info(s, req, v), True
        if must_exist is False:
            raise DuplicateError(f"requirement {key!r} exists; edit it to make a new version")
        self._lock(s, Requirement, req.id)  # serialise version numbering (PostgreSQL)
        latest = self._latest_req_version(s, req.id)
        if latest.content_hash == self._hash_req(fields):
            return self._req_info(s, req, latest), False
        self._check_no_cycle(s, key, fields["parents"])
        v = self._write_req_version(s, req, latest.number + 1, fields, author or self.author, note)
        return self._req_info(s, req, v), True

    def add_requirement(self, key: str, *, title: str, statement: str, rationale: str = "",
                        metric: str | None = None, limit: str | None = None,
                        settings: Mapping | None = None, parents: Sequence[str] = (),
                        loops: Sequence[str] = (), method: str = "analysis",
                        status: str = "draft") -> RequirementInfo:
        """Add a requirement (version 1).

        Parameters
        ----------
        key : str
            The user's ID, e.g. ``"PZ-07"``; unique.
        metric : str, optional
            Metric name from the catalogue (``docs/metrics.md``); ``None`` for a system need
            verified through the requirements derived from it.
        limit : str
            Comparator, number and unit, e.g. ``"<= 25 ms"``, ``">= 45 deg"``.
        parents : sequence of str
            IDs this requirement derives from (trace); cycles are refused.
        loops : sequence of str
            Loops it applies to.
        """
        info, _ = self._write(self._upsert_requirement, key, title=title, statement=statement,
                              rationale=rationale, method=method, status=status, metric=metric,
                              settings=settings, limit=limit, parents=parents, loops=loops,
                              must_exist=False)
        self._after_requirement_change(info)
        return info

    def edit_requirement(self, key: str, *, note: str = "", **changes) -> RequirementInfo:
        """Make a new version of a requirement with ``changes`` applied.

        Accepted changes: ``title, statement, rationale, method, status, metric, settings,
        limit, parents, loops``.  The old version stays readable.  Nothing changes (and no
        version is made) when the changes equal the latest version.
        """
        allowed = {"title", "statement", "rationale", "method", "status", "metric", "settings",
                   "limit", "parents", "loops"}
        unknown = set(changes) - allowed
        if unknown:
            raise IntegrityViolation(f"cannot change {sorted(unknown)}; allowed: {sorted(allowed)}")

        def op(s: Session):
            cur = self._req_info(s, self._req_row(s, key),
                                 self._latest_req_version(s, self._req_row(s, key).id))
            base = dict(title=cur.title, statement=cur.statement, rationale=cur.rationale,
                        method=cur.method, status=cur.status, metric=cur.metric,
                        settings=cur.settings, limit=cur.limit_text or None,
                        parents=cur.parents, loops=cur.loops)
            if "metric" in changes and changes["metric"] != cur.metric and "limit" not in changes:
                raise IntegrityViolation(f"requirement {key!r}: a new metric needs a new limit")
            base.update(changes)
            return self._upsert_requirement(s, key, note=note, must_exist=True, **base)

        info, _ = self._write(op)
        self._after_requirement_change(info)
        return info

    def retire_requirement(self, key: str, *, note: str = "") -> RequirementInfo:
        """Retire a requirement (a new version with status ``retired``)."""
        return self.edit_requirement(key, status="retired", note=note)

    def _req_info(self, s: Session, req: Requirement, v: RequirementVersion) -> RequirementInfo:
        return self._req_infos(s, [(req, v)])[0]

    @staticmethod
    def _latest_req_versions(s: Session) -> list[tuple[Requirement, RequirementVersion]]:
        """(requirement, latest version) for every requirement, by ID, in one query."""
        latest = (select(RequirementVersion.requirement_id,
                         func.max(RequirementVersion.number).label("n"))
                  .group_by(RequirementVersion.requirement_id).subquery())
        rows = s.execute(
            select(Requirement, RequirementVersion)
            .join(RequirementVersion, RequirementVersion.requirement_id == Requirement.id)
            .join(latest, (latest.c.requirement_id == RequirementVersion.requirement_id)
                  & (latest.c.n == RequirementVersion.number))
            .order_by(Requirement.key)
        ).all()
        return [(r, v) for r, v in rows]

    def _req_infos(self, s: Session, pairs: list[tuple[Requirement, RequirementVersion]]
                   ) -> list[RequirementInfo]:
        """Views of many requirement versions with a fixed number of queries."""
        from .catalogue import metric_unit

        if not pairs:
            return []
        vids = [v.id for _, v in pairs]
        rids = list({r.id for r, _ in pairs})
        parents: dict[int, list[str]] = {}
        loops: dict[int, list[str]] = {}
        latest: dict[int, int] = {}
        for i in range(0, len(vids), 500):
            chunk = vids[i:i + 500]
            for vid, key in s.execute(select(RequirementParent.version_id, Requirement.key)
                                      .join(Requirement, Requirement.id == RequirementParent.parent_id)
                                      .where(RequirementParent.version_id.in_(chunk))):
                parents.setdefault(vid, []).append(key)
            for vid, name in s.execute(select(RequirementLoop.version_id, Loop.name)
                                       .join(Loop, Loop.id == RequirementLoop.loop_id)
                                       .where(RequirementLoop.version_id.in_(chunk))):
                loops.setdefault(vid, []).append(name)
        for i in range(0, len(rids), 500):
            for rid, n in s.execute(select(RequirementVersion.requirement_id,
                                           func.max(RequirementVersion.number))
                                    .where(RequirementVersion.requirement_id.in_(rids[i:i + 500]))
                                    .group_by(RequirementVersion.requirement_id)):
                latest[rid] = n
        units: dict[str, str] = {}
        out = []
        for req, v in pairs:
            unit = ""
            if v.metric:
                if v.metric not in units:
                    try:
                        units[v.metric] = metric_unit(v.metric)
                    except LedgerError:
                        units[v.metric] = "?"
                unit = units[v.metric]
            out.append(RequirementInfo(
                key=req.key, version=v.number, title=v.title, statement=v.statement,
                rationale=v.rationale, method=v.method, status=v.status, metric=v.metric,
                settings=json.loads(v.settings_json), comparator=v.comparator,
                limit_value=v.limit_value, limit_text=v.limit_text, unit=unit,
                parents=tuple(sorted(parents.get(v.id, ()))),
                loops=tuple(sorted(loops.get(v.id, ()))),
                author=v.author, note=v.note, content_hash=v.content_hash,
                created_at=_utc(v.created_at), latest_version=latest[req.id],
            ))
        return out

    def requirements(self, *, status: str | None = None, loop: str | None = None,
                     include_retired: bool = True) -> list[RequirementInfo]:
        """Latest version of every requirement, by ID; optionally filtered."""
        with self.reading() as s:
            out = []
            for info in self._req_infos(s, self._latest_req_versions(s)):
                if status and info.status != status:
                    continue
                if not include_retired and info.status == "retired":
                    continue
                if loop and loop not in info.loops:
                    continue
                out.append(info)
            return out

    def requirement(self, key: str, version: int | None = None) -> RequirementInfo:
        with self.reading() as s:
            req = self._req_row(s, key)
            if version is None:
                v = self._latest_req_version(s, req.id)
            else:
                v = s.scalar(select(RequirementVersion).where(
                    RequirementVersion.requirement_id == req.id,
                    RequirementVersion.number == int(version)))
                if v is None:
                    raise NotFoundError(f"requirement {key!r} has no version {version}")
            return self._req_info(s, req, v)

    def requirement_history(self, key: str) -> list[RequirementInfo]:
        with self.reading() as s:
            req = self._req_row(s, key)
            rows = s.scalars(select(RequirementVersion)
                             .where(RequirementVersion.requirement_id == req.id)
                             .order_by(RequirementVersion.number)).all()
            return self._req_infos(s, [(req, v) for v in rows])

    # -- revisions ------------------------------------------------------------------------
    def _add_revision(self, s: Session, loop: str, controller: str, *, rationale: str,
                      parent: str | None = "tip", author: str | None = None,
                      label: str | None = None) -> tuple[RevisionInfo, bool]:
        lp = self._loop_row(s, loop)
        self._lock(s, Loop, lp.id)  # serialise label/seq allocation per loop (PostgreSQL)
        what = f"revision of loop {loop!r}"
        if not isinstance(rationale, str) or not rationale.strip():
            raise IntegrityViolation(f"{what}: a rationale is required (why this change?)")
        canonical = _model_canonical(controller, what=f"{what}: controller",
                                     sample_time=lp.sample_time)
        if parent == "tip":
            prow = self._tip_row(s, lp)
        elif parent in (None, ""):
            prow = None
        else:
            prow = self._revision_row(s, lp, parent)
        if label is not None:
            _check_name("revision label", label, _KEY_RE)
            existing = s.scalar(select(Revision).where(Revision.loop_id == lp.id,
                                                       Revision.label == label))
            if existing is not None:
                same = (existing.controller_canonical == canonical
                        and existing.rationale == rationale.strip()
                        and existing.parent_id == (prow.id if prow else None))
                if same:
                    return self._rev_info(s, existing), False
                raise DuplicateError(
                    f"loop {loop!r} already has revision {label!r} with other content; revisions "
                    "are immutable: add a new one with another label"
                )
        seq = (s.scalar(select(func.max(Revision.seq)).where(Revision.loop_id == lp.id)) or 0) + 1
        label = label or f"r{seq}"
        created = _now()
        author = author or self.author
        content_hash = sha256_of({
            "loop": lp.name, "label": label, "controller": canonical,
            "parent": prow.content_hash if prow else None, "rationale": rationale.strip(),
            "author": author, "created_at": created.isoformat(),
        })
        row = Revision(loop_id=lp.id, label=label, seq=seq, parent_id=prow.id if prow else None,
                       author=author, rationale=rationale.strip(), controller_text=controller,
                       controller_canonical=canonical, content_hash=content_hash,
                       created_at=created)
        s.add(row)
        s.flush()
        append_link(s, "revision", row)
        return self._rev_info(s, row), True

    def add_revision(self, loop: str, controller: str, *, rationale: str,
                     parent: str | None = "tip", author: str | None = None,
                     label: str | None = None, verify: bool = True) -> RevisionInfo:
        """Record a new controller revision of ``loop`` and verify it.

        Parameters
        ----------
        controller : str
            Controller model text, e.g. ``"pid(kp=2.1, ki=40, kd=0.004, tf=0.0005)"``.
        rationale : str
            Why this change (required, non-empty).
        parent : str or None
            Label of the parent revision; ``"tip"`` (default) = the loop's latest revision;
            ``None`` = a new root.  Branching is allowed.
        label : str, optional
            Defaults to ``r<N>``.
        verify : bool
            Judge every applicable requirement on the new revision over the whole plant
            family (default).  The metric values are computed before the write, and the
            revision and all its results are recorded in one transaction.

        Raises
        ------
        ModelError
            The controller cannot close this loop (e.g. an ideal derivative without a filter,
            a continuous controller in a digital loop); nothing is recorded.
        """
        from . import verify as V

        payloads, fresh, plan = {}, set(), None
        if verify:
            with self.reading() as s:
                lp = self._loop_row(s, loop)
                canonical = _model_canonical(controller, what=f"revision of loop {loop!r}: controller",
                                             sample_time=lp.sample_time)
                plan = V.plan_revision(s, lp, controller_text=controller,
                                       controller_canonical=canonical)
                keys = [plan.metric_key(c.metric, c.settings) for c in plan.checks]
                cached = V.load_cached(s, keys)
            try:
                V.validate_controller(plan)
            except LedgerError as e:
                raise type(e)(f"revision of loop {loop!r}: {e}") from e
            payloads, n = V.compute_plan(plan, cached)
            fresh = set(payloads) - set(cached)
            self.kernel_requests += n

        def op(s: Session):
            info, created = self._add_revision(s, loop, controller, rationale=rationale,
                                               parent=parent, author=author, label=label)
            if created and plan is not None and plan.checks:
                row = self._revision_row(s, self._loop_row(s, loop), info.label)
                V.write_results(s, plan, row.id, payloads, fresh)
            return info, created

        info, _ = self._write(op)
        return info

    # -- verification ---------------------------------------------------------------------
    def verify(self, loop: str | None = None, *, label: str | None = None,
               tips_only: bool = False, keys: Iterable[str] | None = None,
               progress: Callable[[int, int, str], None] | None = None,
               workers: int = 1) -> list[dict]:
        """Bring results up to date: judge the latest version of every applicable requirement
        on revisions (all of them, the tips only, or one) against the latest plant version.

        Only missing results are computed; metric values already in the cache are reused.
        Each revision's results are written in one transaction, as soon as they are computed.

        Parameters
        ----------
        workers : int
            Processes computing in parallel (``0`` = one per core): revisions are split
            between them, or, with one revision to compute, the variants of its family
            (``measure_family(..., workers=)``).  Writing stays in this process, one
            transaction per revision.

        Returns
        -------
        list of dict
            One entry per revision touched: ``loop``, ``revision``, ``results`` (written),
            ``computed`` (metric requests evaluated by the engine).
        """
        from . import verify as V

        with self.reading() as s:
            loops = [self._loop_row(s, loop)] if loop else list(s.scalars(select(Loop).order_by(Loop.name)))
            plans = []
            for lp in loops:
                if label is not None:
                    revs = [self._revision_row(s, lp, label)]
                elif tips_only:
                    tip = self._tip_row(s, lp)
                    revs = [tip] if tip is not None else []
                else:
                    revs = list(s.scalars(select(Revision).where(Revision.loop_id == lp.id)
                                          .order_by(Revision.seq)))
                for rev in revs:
                    plan = V.plan_revision(s, lp, revision=rev, keys=keys)
                    if plan.checks:
                        cached = V.load_cached(s, [plan.metric_key(c.metric, c.settings)
                                                   for c in plan.checks])
                        plans.append((plan, cached))
        report: list[dict] = []
        total = len(plans)

        def record(i: int, plan, cached, payloads, n):
            self.kernel_requests += n
            fresh = set(payloads) - set(cached)
            self._write(lambda s: V.write_results(s, plan, plan.revision_id, payloads, fresh))
            report.append({"loop": plan.loop, "revision": plan.label,
                           "results": len(plan.checks), "computed": n})
            if progress:
                progress(i + 1, total, f"{plan.loop}/{plan.label}")

        if progress:
            progress(0, total, "planning done")
        workers = (os.cpu_count() or 1) if workers == 0 else max(1, int(workers))
        if workers == 1 or total < 2:
            for i, (plan, cached) in enumerate(plans):
                payloads, n = V.compute_plan(plan, cached, workers=workers if total == 1 else 1)
                record(i, plan, cached, payloads, n)
        else:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor, as_completed

            from .engine import measure as _engine_loaded  # noqa: F401 - forked workers inherit it

            for plan, _ in plans[:1]:
                V.family_for(plan)  # and the family cache, for the common one-plant case
            ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
            n_workers = min(workers, total)
            # a few plans per task: fewer round trips than one task per revision, while every
            # worker still gets several tasks to balance uneven revisions
            chunk = max(1, total // (4 * n_workers))
            batches = [plans[k:k + chunk] for k in range(0, total, chunk)]
            with ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx) as pool:
                futures = {pool.submit(V.compute_plans, batch): batch for batch in batches}
                done = 0
                for fut in as_completed(futures):
                    for (plan, cached), (payloads, n) in zip(futures[fut], fut.result()):
                        record(done, plan, cached, payloads, n)
                        done += 1
            order = {(p.loop, p.label): k for k, (p, _) in enumerate(plans)}
            report.sort(key=lambda r: order[(r["loop"], r["revision"])])
        return report

    def numeric_setup(self, loop: str, label: str | None = None):
        """The numeric objects a revision is verified with: ``(family, controller, loop_spec)``
        (a ``PlantFamily`` of the plant's latest version, the controller and the ``LoopSpec``)
        for plots, evidence and notebook work with ``ledger.engine``."""
        from . import verify as V

        with self.reading() as s:
            lp = self._loop_row(s, loop)
            rev = self._tip_row(s, lp) if label is None else self._revision_row(s, lp, label)
            if rev is None:
                raise NotFoundError(f"loop {loop!r} has no revisions yet")
            plan = V.plan_revision(s, lp, revision=rev, missing_only=False)
        return V.family_for(plan), V.controller_for(plan), V.loop_spec_for(plan)

    def _after_requirement_change(self, info: RequirementInfo) -> None:
        """Judge a new requirement version: on the tip of each loop it applies to (computing
        what is missing), then on every other revision whose metric values are cached (a limit
        edit costs no kernel evaluation there), so older revisions do not turn stale."""
        from . import verify as V

        if self.auto_verify and info.metric and info.status != "retired" and info.loops:
            for lname in info.loops:
                self.verify(lname, tips_only=True, keys=[info.key])
                self._write(lambda s, n=lname: V.rejudge_cached(s, self._loop_row(s, n),
                                                                [info.key]))

    def results(self, loop: str, label: str | None = None, *,
                include_stale: bool = True) -> list[ResultInfo]:
        """Verdicts on one revision (default: the loop's tip), one per requirement.

        For each requirement the result judged against the latest requirement and plant
        versions is given; when there is none, the newest older one is given marked stale.
        """
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            rev = self._tip_row(s, lp) if label is None else self._revision_row(s, lp, label)
            if rev is None:
                raise NotFoundError(f"loop {loop!r} has no revisions yet")
            return self._results_for(s, lp, [rev], include_stale)[rev.label]

    def results_many(self, loop: str, labels: Sequence[str], *, include_stale: bool = True,
                     keys: Sequence[str] | None = None) -> dict[str, list[ResultInfo]]:
        """:meth:`results` for several revisions of one loop at once (a fixed number of
        queries, whatever the number of revisions)."""
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            wanted = list(dict.fromkeys(labels))
            revs = []
            for i in range(0, len(wanted), 500):
                revs.extend(s.scalars(select(Revision).where(Revision.loop_id == lp.id,
                                                             Revision.label.in_(wanted[i:i + 500]))))
            found = {r.label for r in revs}
            missing = [l for l in wanted if l not in found]
            if missing:
                raise NotFoundError(f"loop {loop!r} has no revision {missing[0]!r}")
            return self._results_for(s, lp, revs, include_stale, keys)

    def _results_for(self, s: Session, lp: Loop, revs: list[Revision], include_stale: bool,
                     keys: Sequence[str] | None = None) -> dict[str, list[ResultInfo]]:
        from .catalogue import metric_unit
        from .verify import uncap

        pv = self._latest_plant_version(s, lp.plant_id)
        by_id = {r.id: r for r in revs}
        rows = []
        ids = list(by_id)
        for i in range(0, len(ids), 500):
            rows.extend(s.execute(
                select(Result, RequirementVersion, Requirement.key, Requirement.id,
                       PlantVersion.id, PlantVersion.number)
                .join(RequirementVersion, Result.requirement_version_id == RequirementVersion.id)
                .join(Requirement, RequirementVersion.requirement_id == Requirement.id)
                .join(PlantVersion, Result.plant_version_id == PlantVersion.id)
                .where(Result.revision_id.in_(ids[i:i + 500]),
                       *([Requirement.key.in_(list(keys))] if keys is not None else []))
            ).all())
        req_ids = list({row[3] for row in rows})
        latest: dict[int, tuple[int, str]] = {}  # requirement id -> (latest version id, status)
        if req_ids:
            sub = (select(RequirementVersion.requirement_id,
                          func.max(RequirementVersion.number).label("n"))
                   .where(RequirementVersion.requirement_id.in_(req_ids))
                   .group_by(RequirementVersion.requirement_id).subquery())
            for rid, vid, status in s.execute(
                    select(RequirementVersion.requirement_id, RequirementVersion.id,
                           RequirementVersion.status)
                    .join(sub, (sub.c.requirement_id == RequirementVersion.requirement_id)
                          & (sub.c.n == RequirementVersion.number))):
                latest[rid] = (vid, status)
        best: dict[tuple[int, str], tuple] = {}
        for res, rv, key, rid, rpv_id, rpv_number in rows:
            lv_id, lv_status = latest[rid]
            if lv_status == "retired":
                continue
            stale = rv.id != lv_id or rpv_id != pv.id
            rank = (not stale, rv.number, rpv_number, res.id)
            k = (res.revision_id, key)
            if k not in best or rank > best[k][0]:
                best[k] = (rank, res, rv, rpv_number, stale)
        out: dict[str, list[ResultInfo]] = {r.label: [] for r in revs}
        for (rev_id, key) in sorted(best, key=lambda k: (k[0], k[1])):
            _, res, rv, rpv_number, stale = best[(rev_id, key)]
            if stale and not include_stale:
                continue
            out[by_id[rev_id].label].append(ResultInfo(
                loop=lp.name, revision=by_id[rev_id].label, requirement=key,
                requirement_version=rv.number, plant_version=rpv_number,
                verdict="stale" if stale else res.verdict, value=uncap(res.value),
                unit=metric_unit(rv.metric) if rv.metric else "", limit_text=rv.limit_text,
                headroom=uncap(res.headroom), headroom_fraction=uncap(res.headroom_fraction),
                worst_variant=res.worst_variant, pass_fraction=res.pass_fraction,
                variants=res.variants, reason=res.reason, engine_version=res.engine_version,
                created_at=_utc(res.created_at), stale=stale,
            ))
        return out

    def verdict_counts(self, loop: str, labels: Sequence[str] | None = None
                       ) -> dict[str, dict[str, int]]:
        """Per revision label of ``loop`` (all, or ``labels``): how many current requirements
        pass, fail, are in error or are stale — counted in the database."""
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            pv = self._latest_plant_version(s, lp.plant_id)
            latest = (select(RequirementVersion.requirement_id,
                             func.max(RequirementVersion.number).label("n"))
                      .group_by(RequirementVersion.requirement_id).subquery())
            current = (select(RequirementVersion.id, RequirementVersion.requirement_id)
                       .join(latest, (latest.c.requirement_id == RequirementVersion.requirement_id)
                             & (latest.c.n == RequirementVersion.number))
                       .where(RequirementVersion.status != "retired").subquery())
            q = select(Revision.id, Revision.label).where(Revision.loop_id == lp.id)
            if labels is not None:
                q = q.where(Revision.label.in_(list(labels)))
            wanted = labels
            labels = dict(s.execute(q).all())
            only = [Revision.id.in_(list(labels))] if wanted is not None else []
            out = {lbl: {"pass": 0, "fail": 0, "error": 0, "stale": 0} for lbl in labels.values()}
            fresh_total: dict[int, int] = {}
            for rid, verdict, n in s.execute(
                    select(Result.revision_id, Result.verdict, func.count())
                    .join(current, current.c.id == Result.requirement_version_id)
                    .join(Revision, Revision.id == Result.revision_id)
                    .where(Revision.loop_id == lp.id, Result.plant_version_id == pv.id, *only)
                    .group_by(Result.revision_id, Result.verdict)):
                out[labels[rid]][verdict] = out[labels[rid]].get(verdict, 0) + n
                fresh_total[rid] = fresh_total.get(rid, 0) + n
            judged = RequirementVersion.__table__.alias("judged")
            for rid, n in s.execute(
                    select(Result.revision_id, func.count(func.distinct(judged.c.requirement_id)))
                    .join(judged, judged.c.id == Result.requirement_version_id)
                    .join(current, current.c.requirement_id == judged.c.requirement_id)
                    .join(Revision, Revision.id == Result.revision_id)
                    .where(Revision.loop_id == lp.id, *only)
                    .group_by(Result.revision_id)):
                out[labels[rid]]["stale"] = n - fresh_total.get(rid, 0)
            return out

    def _rev_info(self, s: Session, row: Revision) -> RevisionInfo:
        parent = s.get(Revision, row.parent_id).label if row.parent_id else None
        kids = s.scalars(select(Revision.label).where(Revision.parent_id == row.id)
                         .order_by(Revision.seq)).all()
        return self._make_rev_info(row, row.loop.name, parent, tuple(kids))

    @staticmethod
    def _make_rev_info(row: Revision, loop: str, parent: str | None,
                       children: tuple[str, ...]) -> RevisionInfo:
        return RevisionInfo(
            loop=loop, label=row.label, seq=row.seq, parent=parent, author=row.author,
            rationale=row.rationale, controller=row.controller_text,
            content_hash=row.content_hash, created_at=_utc(row.created_at), children=children,
        )

    def revisions(self, loop: str) -> list[RevisionInfo]:
        """Every revision of ``loop`` in the order recorded (two queries, any length)."""
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            rows = s.scalars(select(Revision).where(Revision.loop_id == lp.id)
                             .order_by(Revision.seq)).all()
            label = {r.id: r.label for r in rows}
            kids: dict[int, list[str]] = {}
            for r in rows:
                if r.parent_id is not None:
                    kids.setdefault(r.parent_id, []).append(r.label)
            return [self._make_rev_info(r, lp.name, label.get(r.parent_id) if r.parent_id else None,
                                        tuple(kids.get(r.id, ()))) for r in rows]

    def revision(self, loop: str, label: str | None = None) -> RevisionInfo:
        """One revision; ``label=None`` gives the loop's tip (latest recorded)."""
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            if label is None:
                row = self._tip_row(s, lp)
                if row is None:
                    raise NotFoundError(f"loop {loop!r} has no revisions yet")
            else:
                row = self._revision_row(s, lp, label)
            return self._rev_info(s, row)

    def lineage(self, loop: str) -> list[LineageNode]:
        """The revision tree of ``loop``: a list of roots, children in recorded order."""
        revs = self.revisions(loop)
        # children are always recorded after their parent: build bottom-up without recursion
        # (a loop may carry thousands of revisions in one chain)
        built: dict[str, LineageNode] = {}
        for r in reversed(revs):
            built[r.label] = LineageNode(r, tuple(built[c] for c in r.children))
        return [built[r.label] for r in revs if r.parent is None]

    def ancestry(self, loop: str, label: str) -> list[RevisionInfo]:
        """``label`` and its ancestors, newest first."""
        labels = self.ancestry_labels(loop, label)
        revs = {r.label: r for r in self.revisions(loop)}
        return [revs[l] for l in labels]

    def ancestry_labels(self, loop: str, label: str) -> list[str]:
        """Labels of ``label`` and its ancestors, newest first (one light query)."""
        with self.reading() as s:
            lp = self._loop_row(s, loop)
            rows = s.execute(select(Revision.id, Revision.label, Revision.parent_id)
                             .where(Revision.loop_id == lp.id)).all()
        by_label = {lbl: (rid, pid) for rid, lbl, pid in rows}
        by_id = {rid: lbl for rid, lbl, _ in rows}
        if label not in by_label:
            raise NotFoundError(f"loop {loop!r} has no revision {label!r}")
        out, cur = [], label
        while cur is not None:
            out.append(cur)
            pid = by_label[cur][1]
            cur = by_id[pid] if pid is not None else None
        return out

    # -- starter sets ---------------------------------------------------------------------
    def add_starter_requirements(self, loop: str, kind: str | None = None) -> list[RequirementInfo]:
        """Record the starter requirement set for ``loop``'s kind as draft requirements with
        IDs ``<LOOP>-S01``...  (common-practice limits; edit them to the system's needs).
        Requirements that already exist with those IDs are left as they are.  One transaction;
        then each is verified on the loop's tip."""
        from .starters import starter_set

        def op(s: Session):
            lp = self._loop_row(s, loop)
            out = []
            for st in starter_set(kind or lp.kind):
                key = f"{lp.name.upper()}-{st.suffix}"[:40]
                if s.scalar(select(Requirement).where(Requirement.key == key)) is not None:
                    continue
                info, _ = self._upsert_requirement(
                    s, key, title=st.title, statement=st.statement,
                    rationale=st.rationale + " (Starter limit, common practice: edit it to "
                    "fit this system's needs.)", method="analysis", status="draft",
                    metric=st.metric, settings=dict(st.settings), limit=st.limit,
                    loops=[lp.name], must_exist=False)
                out.append(info)
            return out

        infos = self._write(op)
        if infos and self.auto_verify:
            self.verify(loop, tips_only=True, keys=[i.key for i in infos])
        return infos

    # -- counts (used by tests and the CLI summary) ----------------------------------------
    def counts(self) -> dict[str, int]:
        from .store import models as m

        with self.reading() as s:
            return {
                t.__tablename__: s.scalar(select(func.count()).select_from(t))
                for t in (m.Plant, m.PlantVersion, m.Loop, m.Revision, m.Requirement,
                          m.RequirementVersion, m.RequirementParent, m.RequirementLoop,
                          m.Result, m.MetricValue)
            }


def _is_busy(exc) -> bool:
    """True for a database error that a retry may cure (lock contention)."""
    from sqlalchemy.exc import OperationalError as SAOperationalError

    orig = getattr(exc, "orig", None)
    text = str(orig or exc or "").lower()
    if isinstance(exc, SAOperationalError) and ("locked" in text or "busy" in text):
        return True
    code = getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None)
    return code in ("40001", "40P01")


def open_ledger(target: str | os.PathLike | None = None, *, create: bool = False,
                author: str | None = None) -> Ledger:
    """Open (and, if asked, create) a ledger.

    Parameters
    ----------
    target : str or path, optional
        An SQLite file path or a database URL (``postgresql+psycopg://...``).  ``None`` means
        ``$LOOPLEDGER_DB`` or ``./loopledger.db``.
    create : bool
        Create the ledger if it does not exist.  Without it, a missing file is an error.
    author : str, optional
        Name recorded on new records; defaults to ``$LOOPLEDGER_AUTHOR`` or the login name.

    An older ledger is upgraded on open (an SQLite file is backed up beside it first); a
    ledger from a newer loopledger, or a file that is not a ledger, is refused.
    """
    url = resolve_url(target)
    try:
        action = ensure_schema(url, create=create)
        ledger = Ledger(url, author=author)
    except LedgerError as e:
        masked = scrub_secret(str(e), url)
        if masked == str(e):
            raise
        raise SchemaError(masked) from None  # the cause would carry the password
    ledger.schema_action = action
    return ledger
