"""Spectra of loops (noise and disturbance PSDs for the rms budgets): the SQL of one record
kind.  One spectrum per loop and source, fixed once recorded (like the loop's settings):
recording the same one again changes nothing, a different one is refused."""

from __future__ import annotations

import json

from sqlalchemy import select
from sqlalchemy.orm import Session

from ..errors import DuplicateError
from .chain import append_link
from .loops import loop_row, spectrum_forms as forms_of_row
from .models import LoopSpectrum, RequirementVersion, Result, Revision
from .plants import latest_version
from .queries import now

__all__ = ["add", "forms", "forms_of_row"]


def forms(s: Session, loop: str) -> list[dict]:
    return forms_of_row(s, loop_row(s, loop))


def add(s: Session, loop: str, source: str, *, author: str, **kw) -> tuple[dict, bool]:
    """Record a spectrum on ``loop`` (``kw`` as :func:`ledger.spectra_io.spectrum_form`
    without the plant units and sample time, which come from the loop); ``(form, created)``."""
    from ..spectra_io import spectrum_form, spectrum_hash

    lp = loop_row(s, loop)
    pv = latest_version(s, lp.plant_id)
    form = spectrum_form(source, input_unit=pv.input_unit if pv else "",
                         output_unit=pv.output_unit if pv else "",
                         sample_time=lp.sample_time, **kw)
    h = spectrum_hash(form)
    row = s.scalar(select(LoopSpectrum).where(LoopSpectrum.loop_id == lp.id,
                                              LoopSpectrum.source == source))
    if row is not None:
        if row.content_hash == h:
            return dict(form, content_hash=h), False
        raise DuplicateError(f"loop {loop!r} has a {source} spectrum already; spectra are fixed "
                             "once results may depend on them: create a loop with a new name")
    judged = s.scalar(select(Result.id).join(
        RequirementVersion, Result.requirement_version_id == RequirementVersion.id)
        .join(Revision, Result.revision_id == Revision.id)
        .where(Revision.loop_id == lp.id,
               RequirementVersion.metric.in_(("rms_error", "rms_effort"))).limit(1))
    if judged is not None:
        raise DuplicateError(f"loop {loop!r} has rms results judged without this {source} "
                             "spectrum; record a loop's spectra before its rms requirements "
                             "are verified, or create a loop with a new name")
    row = LoopSpectrum(loop_id=lp.id, source=source, kind=form["kind"],
                       shaping_text=form["shaping"], intensity=form["intensity"],
                       table_json=json.dumps(form["table"]), unit_text=form["unit"],
                       frequency_unit=form["frequency_unit"], label=form["label"],
                       content_hash=h, author=author, created_at=now())
    s.add(row)
    s.flush()
    append_link(s, "loop_spectrum", row)
    return dict(form, content_hash=h), True
