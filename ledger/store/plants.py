"""Plants and their versions: the SQL of one record kind, functions over a session."""

from __future__ import annotations

import json

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from ..errors import NotFoundError
from ..records import PlantInfo
from ..validate import check_name, plant_fields
from .chain import append_link
from .models import Plant, PlantVersion
from .queries import now, one, utc

__all__ = ["plant_row", "latest_version", "version_row", "info", "add", "all_plants", "get",
           "history"]


def plant_row(s: Session, name: str) -> Plant:
    return one(s, Plant, Plant.name, name, f"no plant named {name!r}")


def latest_version(s: Session, plant_id: int) -> PlantVersion | None:
    return s.scalar(select(PlantVersion).where(PlantVersion.plant_id == plant_id)
                    .order_by(PlantVersion.number.desc()).limit(1))


def version_row(s: Session, plant: Plant, version: int) -> PlantVersion:
    pv = s.scalar(select(PlantVersion).where(PlantVersion.plant_id == plant.id,
                                             PlantVersion.number == int(version)))
    if pv is None:
        raise NotFoundError(f"plant {plant.name!r} has no version {version}")
    return pv


def info(s: Session, plant: Plant, pv: PlantVersion) -> PlantInfo:
    nver = s.scalar(select(func.count()).select_from(PlantVersion)
                    .where(PlantVersion.plant_id == plant.id))
    return PlantInfo(
        name=plant.name, version=pv.number, model=pv.model_text, canonical=pv.canonical,
        params=json.loads(pv.parameters_json), fidelity=json.loads(pv.fidelity_json),
        samples=pv.samples, seed=pv.seed, sample_time=pv.sample_time,
        input_unit=pv.input_unit, output_unit=pv.output_unit, description=plant.description,
        note=pv.note, author=pv.author, content_hash=pv.content_hash,
        created_at=utc(pv.created_at), versions=nver,
        measured=json.loads(pv.measured_json or "{}"),
    )


def add(s: Session, name: str, model: str, *, author: str, params=None, fidelity=None,
        samples=0, seed=0, sample_time=None, input_unit="", output_unit="", description="",
        note="", measured=None) -> tuple[PlantInfo, bool]:
    """Add a plant, or a new version when anything changed; ``(info, created)``."""
    check_name("plant", name)
    fields = plant_fields(name, model, params, fidelity, samples, seed, sample_time,
                          input_unit, output_unit, measured)
    row = s.scalar(select(Plant).where(Plant.name == name))
    if row is None:
        row = Plant(name=name, description=description or "", created_at=now())
        s.add(row)
        s.flush()
        append_link(s, "plant", row)
        number = 1
    else:
        latest = latest_version(s, row.id)
        if latest.content_hash == fields["content_hash"] and latest.model_text == model \
                and (latest.measured_json or "{}") == fields["measured_json"]:
            return info(s, row, latest), False
        number = latest.number + 1
    pv = PlantVersion(plant_id=row.id, number=number, note=note or "", author=author,
                      created_at=now(), **fields)
    s.add(pv)
    s.flush()
    append_link(s, "plant_version", pv)
    return info(s, row, pv), True


def all_plants(s: Session) -> list[PlantInfo]:
    """Every plant at its latest version, by name."""
    return [info(s, p, latest_version(s, p.id))
            for p in s.scalars(select(Plant).order_by(Plant.name)).all()]


def get(s: Session, name: str, version: int | None = None) -> PlantInfo:
    p = plant_row(s, name)
    pv = latest_version(s, p.id) if version is None else version_row(s, p, version)
    return info(s, p, pv)


def history(s: Session, name: str) -> list[PlantInfo]:
    p = plant_row(s, name)
    rows = s.scalars(select(PlantVersion).where(PlantVersion.plant_id == p.id)
                     .order_by(PlantVersion.number)).all()
    return [info(s, p, pv) for pv in rows]
