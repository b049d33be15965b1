"""Loops (how a controller and a plant are connected): the SQL of one record kind."""

from __future__ import annotations

from sqlalchemy import func, select
from sqlalchemy.orm import Session, object_session

from ..errors import DuplicateError
from ..records import LoopInfo
from ..validate import check_name, loop_fields
from .chain import append_link
from .models import Loop, LoopSpectrum, Revision
from .plants import plant_row
from .queries import now, one, utc

__all__ = ["loop_row", "loop_rows", "info", "add", "all_loops", "get", "loop_form",
           "spectrum_forms"]


def loop_row(s: Session, name: str) -> Loop:
    return one(s, Loop, Loop.name, name, f"no loop named {name!r}")


def loop_rows(s: Session, name: str | None = None) -> list[Loop]:
    """The loop named ``name``, or every loop by name."""
    if name:
        return [loop_row(s, name)]
    return list(s.scalars(select(Loop).order_by(Loop.name)))


def _tip(s: Session, row: Loop) -> Revision | None:
    return s.scalar(select(Revision).where(Revision.loop_id == row.id)
                    .order_by(Revision.seq.desc()).limit(1))


def info(s: Session, row: Loop) -> LoopInfo:
    n = s.scalar(select(func.count()).select_from(Revision).where(Revision.loop_id == row.id))
    tip = _tip(s, row)
    return LoopInfo(
        name=row.name, plant=row.plant.name, kind=row.kind, description=row.description,
        sensor=row.sensor_text, prefilter=row.prefilter_text, input_delay=row.input_delay,
        output_delay=row.output_delay, sample_time=row.sample_time,
        computation_delay=row.computation_delay, actuator_limit=row.actuator_limit,
        created_at=utc(row.created_at), revisions=n, tip=tip.label if tip else None,
        rate_limit=row.rate_limit,
    )


def add(s: Session, name: str, plant: str, *, kind="position", sensor="", prefilter="",
        input_delay=0.0, output_delay=0.0, sample_time=None, computation_delay=0,
        actuator_limit=None, description="", rate_limit=None) -> tuple[LoopInfo, bool]:
    """Add a loop; an identical one is left as it is; ``(info, created)``."""
    check_name("loop", name)
    p = plant_row(s, plant)
    fields = loop_fields(name, kind, sensor, prefilter, input_delay, output_delay,
                         sample_time, computation_delay, actuator_limit, rate_limit)
    row = s.scalar(select(Loop).where(Loop.name == name))
    if row is not None:
        same = row.plant_id == p.id and all(getattr(row, k) == v for k, v in fields.items())
        if same:
            return info(s, row), False
        raise DuplicateError(
            f"loop {name!r} exists with other settings; loop settings are fixed once "
            "revisions may depend on them: create a loop with a new name"
        )
    row = Loop(name=name, plant_id=p.id, description=description or "", created_at=now(),
               **fields)
    s.add(row)
    s.flush()
    append_link(s, "loop", row)
    return info(s, row), True


def all_loops(s: Session) -> list[LoopInfo]:
    return [info(s, r) for r in loop_rows(s)]


def get(s: Session, name: str) -> LoopInfo:
    return info(s, loop_row(s, name))


def loop_form(row: Loop) -> dict:
    """The loop's settings that enter a metric value's cache key (its spectra and its rate
    limit only when set, so the keys of loops without them are what they were)."""
    form = {
        "sensor": row.sensor_text, "prefilter": row.prefilter_text,
        "input_delay": row.input_delay, "output_delay": row.output_delay,
        "sample_time": row.sample_time, "computation_delay": row.computation_delay,
        "actuator_limit": row.actuator_limit,
    }
    s = object_session(row)
    spectra = spectrum_forms(s, row) if s is not None else []
    if spectra:
        from ..spectra_io import canonical_forms

        form["spectra"] = canonical_forms(spectra)
    if row.rate_limit is not None:
        form["rate_limit"] = row.rate_limit
    return form


def spectrum_forms(s: Session, loop: Loop) -> list[dict]:
    """The stored forms (:mod:`ledger.spectra_io`) of a loop's spectra, in source order."""
    import json

    from ..spectra_io import SOURCES

    rows = s.scalars(select(LoopSpectrum).where(LoopSpectrum.loop_id == loop.id)).all()
    out = [{"source": r.source, "kind": r.kind, "shaping": r.shaping_text,
            "intensity": r.intensity, "table": json.loads(r.table_json or "[]"),
            "unit": r.unit_text, "frequency_unit": r.frequency_unit, "label": r.label,
            "content_hash": r.content_hash} for r in rows]
    return sorted(out, key=lambda f: SOURCES.index(f["source"]))
