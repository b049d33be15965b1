"""SQLAlchemy 2 typed models of the ledger.

The schema is made ONLY by the Alembic migrations in ``migrations/``; these models describe it
for the ORM and a test checks that both agree.  Records that carry history are append-only:
``PlantVersion``, ``Revision``, ``RequirementVersion`` and ``Result`` rows are never updated
in place; a change makes a new row.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import (
    CheckConstraint,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    text,
    Text,
    text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

__all__ = [
    "Base",
    "Plant",
    "PlantVersion",
    "Loop",
    "Revision",
    "Requirement",
    "RequirementVersion",
    "RequirementParent",
    "RequirementLoop",
    "Result",
    "MetricValue",
    "LoopSpectrum",
]

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class Plant(Base):
    __tablename__ = "plant"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(80), unique=True)
    description: Mapped[str] = mapped_column(Text, default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    versions: Mapped[list["PlantVersion"]] = relationship(
        back_populates="plant", order_by="PlantVersion.number"
    )


class PlantVersion(Base):
    __tablename__ = "plant_version"
    __table_args__ = (UniqueConstraint("plant_id", "number", name="uq_plant_version_number"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    plant_id: Mapped[int] = mapped_column(ForeignKey("plant.id", ondelete="RESTRICT"), index=True)
    number: Mapped[int] = mapped_column(Integer)
    model_text: Mapped[str] = mapped_column(Text)
    canonical: Mapped[str] = mapped_column(Text)
    sample_time: Mapped[float | None] = mapped_column(Float, nullable=True)
    parameters_json: Mapped[str] = mapped_column(Text, default="{}")
    fidelity_json: Mapped[str] = mapped_column(Text, default="{}")
    measured_json: Mapped[str] = mapped_column(Text, default="{}", server_default="{}")
    samples: Mapped[int] = mapped_column(Integer, default=0)
    seed: Mapped[int] = mapped_column(Integer, default=0)
    input_unit: Mapped[str] = mapped_column(String(40), default="")
    output_unit: Mapped[str] = mapped_column(String(40), default="")
    note: Mapped[str] = mapped_column(Text, default="")
    author: Mapped[str] = mapped_column(String(120), default="")
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    plant: Mapped[Plant] = relationship(back_populates="versions")


class Loop(Base):
    __tablename__ = "loop"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(80), unique=True)
    plant_id: Mapped[int] = mapped_column(ForeignKey("plant.id", ondelete="RESTRICT"), index=True)
    kind: Mapped[str] = mapped_column(String(20), default="position")
    description: Mapped[str] = mapped_column(Text, default="")
    sensor_text: Mapped[str] = mapped_column(Text, default="")
    prefilter_text: Mapped[str] = mapped_column(Text, default="")
    input_delay: Mapped[float] = mapped_column(Float, default=0.0)
    output_delay: Mapped[float] = mapped_column(Float, default=0.0)
    sample_time: Mapped[float | None] = mapped_column(Float, nullable=True)
    computation_delay: Mapped[int] = mapped_column(Integer, default=0)
    actuator_limit: Mapped[float | None] = mapped_column(Float, nullable=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    #: largest |du/dt| of the actuator, plant input unit per second (migration 0008)
    rate_limit: Mapped[float | None] = mapped_column(Float, nullable=True)

    plant: Mapped[Plant] = relationship()


class Revision(Base):
    __tablename__ = "revision"
    __table_args__ = (
        UniqueConstraint("loop_id", "label", name="uq_revision_label"),
        CheckConstraint("length(trim(rationale)) > 0", name="rationale_not_empty"),
        Index("ix_revision_loop_seq", "loop_id", "seq"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    loop_id: Mapped[int] = mapped_column(ForeignKey("loop.id", ondelete="RESTRICT"), index=True)
    label: Mapped[str] = mapped_column(String(40))
    seq: Mapped[int] = mapped_column(Integer)
    parent_id: Mapped[int | None] = mapped_column(
        ForeignKey("revision.id", ondelete="RESTRICT"), nullable=True, index=True
    )
    author: Mapped[str] = mapped_column(String(120))
    rationale: Mapped[str] = mapped_column(Text)
    controller_text: Mapped[str] = mapped_column(Text)
    controller_canonical: Mapped[str] = mapped_column(Text)
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    # digital controllers (docs/digital.md): how a continuous design was discretised, the
    # number format of the coefficients, and the discrete controller verified (z text) when
    # it differs from the text entered; all empty for a controller verified as written
    discretization: Mapped[str] = mapped_column(String(80), default="",
                                                server_default=text("''"))
    number_format: Mapped[str] = mapped_column(String(40), default="",
                                               server_default=text("''"))
    verified_text: Mapped[str] = mapped_column(Text, default="", server_default=text("''"))
    # the revision's own prefilter and anti-windup (migration 0008; defaults: none)
    prefilter_text: Mapped[str] = mapped_column(Text, default="", server_default=text("''"))
    prefilter_canonical: Mapped[str] = mapped_column(Text, default="",
                                                     server_default=text("''"))
    anti_windup: Mapped[str] = mapped_column(String(20), default="none",
                                             server_default=text("'none'"))
    anti_windup_gain: Mapped[float | None] = mapped_column(Float, nullable=True)

    loop: Mapped[Loop] = relationship()


class Requirement(Base):
    __tablename__ = "requirement"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    key: Mapped[str] = mapped_column(String(40), unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    versions: Mapped[list["RequirementVersion"]] = relationship(
        back_populates="requirement", order_by="RequirementVersion.number"
    )


class RequirementVersion(Base):
    __tablename__ = "requirement_version"
    __table_args__ = (
        UniqueConstraint("requirement_id", "number", name="uq_requirement_version_number"),
        CheckConstraint(
            "method IN ('analysis', 'test', 'inspection', 'demonstration')", name="method_known"
        ),
        CheckConstraint("status IN ('draft', 'approved', 'retired')", name="status_known"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    requirement_id: Mapped[int] = mapped_column(
        ForeignKey("requirement.id", ondelete="RESTRICT"), index=True
    )
    number: Mapped[int] = mapped_column(Integer)
    title: Mapped[str] = mapped_column(String(200))
    statement: Mapped[str] = mapped_column(Text)
    rationale: Mapped[str] = mapped_column(Text, default="")
    method: Mapped[str] = mapped_column(String(20), default="analysis")
    status: Mapped[str] = mapped_column(String(10), default="draft")
    metric: Mapped[str | None] = mapped_column(String(60), nullable=True)
    settings_json: Mapped[str] = mapped_column(Text, default="{}")
    comparator: Mapped[str | None] = mapped_column(String(2), nullable=True)
    limit_value: Mapped[float | None] = mapped_column(Float, nullable=True)
    limit_text: Mapped[str] = mapped_column(String(60), default="")
    author: Mapped[str] = mapped_column(String(120), default="")
    note: Mapped[str] = mapped_column(Text, default="")
    content_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))

    requirement: Mapped[Requirement] = relationship(back_populates="versions")
    parents: Mapped[list["RequirementParent"]] = relationship(cascade="all")
    loops: Mapped[list["RequirementLoop"]] = relationship(cascade="all")


class RequirementParent(Base):
    """Trace: requirement version ``version_id`` derives from requirement ``parent_id``."""

    __tablename__ = "requirement_parent"

    version_id: Mapped[int] = mapped_column(
        ForeignKey("requirement_version.id", ondelete="RESTRICT"), primary_key=True
    )
    parent_id: Mapped[int] = mapped_column(
        ForeignKey("requirement.id", ondelete="RESTRICT"), primary_key=True, index=True
    )


class RequirementLoop(Base):
    """Requirement version ``version_id`` applies to loop ``loop_id``."""

    __tablename__ = "requirement_loop"

    version_id: Mapped[int] = mapped_column(
        ForeignKey("requirement_version.id", ondelete="RESTRICT"), primary_key=True
    )
    loop_id: Mapped[int] = mapped_column(
        ForeignKey("loop.id", ondelete="RESTRICT"), primary_key=True, index=True
    )


class Result(Base):
    """One verdict: a requirement version judged on a revision over a plant version's family."""

    __tablename__ = "result"
    __table_args__ = (
        UniqueConstraint(
            "revision_id", "requirement_version_id", "plant_version_id", "engine_version",
            name="uq_result_subject",
        ),  # one result per subject and engine version (migration 0010)
        CheckConstraint("verdict IN ('pass', 'fail', 'error', 'n/a')", name="verdict_known"),
        Index("ix_result_requirement_revision", "requirement_version_id", "revision_id"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    revision_id: Mapped[int] = mapped_column(
        ForeignKey("revision.id", ondelete="RESTRICT"), index=True
    )
    requirement_version_id: Mapped[int] = mapped_column(
        ForeignKey("requirement_version.id", ondelete="RESTRICT")
    )
    plant_version_id: Mapped[int] = mapped_column(
        ForeignKey("plant_version.id", ondelete="RESTRICT"), index=True
    )
    verdict: Mapped[str] = mapped_column(String(5))
    value: Mapped[float | None] = mapped_column(Float, nullable=True)
    headroom: Mapped[float | None] = mapped_column(Float, nullable=True)
    headroom_fraction: Mapped[float | None] = mapped_column(Float, nullable=True)
    worst_variant: Mapped[str] = mapped_column(String(80), default="")
    pass_fraction: Mapped[float | None] = mapped_column(Float, nullable=True)
    variants: Mapped[int] = mapped_column(Integer, default=0)
    #: random samples in the family and how many pass (migration 0012_yield; NULL: none, or
    #: recorded before sample counts were kept)
    samples: Mapped[int | None] = mapped_column(Integer, nullable=True)
    sample_passes: Mapped[int | None] = mapped_column(Integer, nullable=True)
    reason: Mapped[str] = mapped_column(Text, default="")
    metric_key: Mapped[str] = mapped_column(String(64), default="")
    engine_version: Mapped[str] = mapped_column(String(20))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    #: the chained write batch this result was recorded in (migration 0005)
    batch_id: Mapped[int] = mapped_column(
        ForeignKey("result_batch.id", ondelete="RESTRICT"), index=True
    )
    #: SHA-256 of the row's content (``ledger.chain.result_row_hash``), recomputed by the audit
    row_hash: Mapped[str] = mapped_column(String(64))


class MetricValue(Base):
    """Cache of computed metric values, keyed by a content hash of everything that determines
    them (plant family, controller, loop settings, metric settings, engine version).  Changing
    a requirement's limit re-judges from here without recomputing."""

    __tablename__ = "metric_value"

    key: Mapped[str] = mapped_column(String(64), primary_key=True)
    metric: Mapped[str] = mapped_column(String(60))
    values_json: Mapped[str] = mapped_column(Text)
    engine_version: Mapped[str] = mapped_column(String(20))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    #: SHA-256 of the row's content (``ledger.chain.metric_row_hash``; migration 0005)
    row_hash: Mapped[str] = mapped_column(String(64))


# -- baselines, sign-offs and the hash chain (migration 0003) ------------------------------
__all__ += ["Baseline", "BaselineEntry", "Signoff", "ChainLink"]


class Baseline(Base):
    """A named, frozen set of revisions, requirement versions and plant versions with the
    verdicts the ledger held for them; ``matrix_hash`` is the SHA-256 of its canonical matrix.
    A signed baseline never changes; a newer one may supersede it."""

    __tablename__ = "baseline"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(80), unique=True)
    note: Mapped[str] = mapped_column(Text, default="")
    author: Mapped[str] = mapped_column(String(120), default="")
    supersedes_id: Mapped[int | None] = mapped_column(
        ForeignKey("baseline.id", ondelete="RESTRICT"), nullable=True, unique=True
    )
    matrix_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class BaselineEntry(Base):
    """One frozen item of a baseline: a revision column (``kind='column'``) or a matrix cell
    (``kind='cell'``, a requirement version judged on that revision).  ``data_json`` is the
    canonical JSON of what was frozen; the foreign keys keep the frozen records from deletion."""

    __tablename__ = "baseline_entry"
    __table_args__ = (CheckConstraint("kind IN ('column', 'cell')", name="kind_known"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    baseline_id: Mapped[int] = mapped_column(
        ForeignKey("baseline.id", ondelete="RESTRICT"), index=True
    )
    kind: Mapped[str] = mapped_column(String(10))
    revision_id: Mapped[int] = mapped_column(ForeignKey("revision.id", ondelete="RESTRICT"))
    requirement_version_id: Mapped[int | None] = mapped_column(
        ForeignKey("requirement_version.id", ondelete="RESTRICT"), nullable=True
    )
    plant_version_id: Mapped[int] = mapped_column(
        ForeignKey("plant_version.id", ondelete="RESTRICT")
    )
    data_json: Mapped[str] = mapped_column(Text)


class Signoff(Base):
    """A named approval of a baseline, bound to the SHA-256 of its canonical matrix and to the
    hash-chain head at the moment of signing."""

    __tablename__ = "signoff"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    baseline_id: Mapped[int] = mapped_column(
        ForeignKey("baseline.id", ondelete="RESTRICT"), index=True
    )
    name: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(120))
    statement: Mapped[str] = mapped_column(Text)
    author: Mapped[str] = mapped_column(String(120), default="")
    matrix_hash: Mapped[str] = mapped_column(String(64))
    chain_head: Mapped[str] = mapped_column(String(64))
    signed_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))
    #: canonical JSON of the cells accepted explicitly and the waivers that covered cells at
    #: signing (migration 0010; ``""`` for sign-offs before it, and when nothing was covered)
    accepted_json: Mapped[str] = mapped_column(Text, default="", server_default=text("''"))


class ChainLink(Base):
    """Append-only hash chain: ``chain_hash = SHA-256(prev_hash + kind + record_id +
    record_hash)``; see ``ledger.chain``."""

    __tablename__ = "chain_link"
    __table_args__ = (Index("ix_chain_link_record", "kind", "record_id"),)

    seq: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    kind: Mapped[str] = mapped_column(String(30))
    record_id: Mapped[int] = mapped_column(Integer)
    record_hash: Mapped[str] = mapped_column(String(64))
    prev_hash: Mapped[str] = mapped_column(String(64))
    chain_hash: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


# -- result batches (migration 0005) -------------------------------------------------------
__all__ += ["ResultBatch"]


class ResultBatch(Base):
    """One write of results (a revision's verdicts written in one transaction), carried by the
    hash chain.  ``subjects`` lists the ``requirement_version_id:plant_version_id`` of each
    result written, sorted; ``digest`` is the SHA-256 over the results' row hashes and the
    row hashes of the metric values they were judged from (``ledger.chain.batch_digest``)."""

    __tablename__ = "result_batch"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    revision_id: Mapped[int] = mapped_column(
        ForeignKey("revision.id", ondelete="RESTRICT"), index=True
    )
    results: Mapped[int] = mapped_column(Integer)
    subjects: Mapped[str] = mapped_column(Text)
    digest: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


# -- text fields: one rule for every entry path (ledger/text.py) ---------------------------
#: (record class, kind named in messages, one-line fields, multi-line fields, JSON fields)
TEXT_FIELDS = (
    (Plant, "plant", ("name",), ("description",), ()),
    (PlantVersion, "plant", ("input_unit", "output_unit", "author"),
     ("model_text", "note"), ("parameters_json", "fidelity_json")),
    (Loop, "loop", ("name", "kind"), ("description", "sensor_text", "prefilter_text"), ()),
    (Revision, "revision", ("label", "author"), ("rationale", "controller_text"), ()),
    (Requirement, "requirement", ("key",), (), ()),
    (RequirementVersion, "requirement", ("title", "limit_text", "author", "method", "status"),
     ("statement", "rationale", "note"), ("settings_json",)),
    (Baseline, "baseline", ("name", "author"), ("note",), ()),
    (Signoff, "sign-off", ("name", "role", "author"), ("statement",), ()),
)


def _install_text_checks(fields=TEXT_FIELDS) -> None:
    """Refuse control characters when a record's text attribute is set (constructor or
    assignment), so the API, the CLI, spec import and the UI share one check; values loaded
    from the database are not checked (exports make those safe, ledger/text.py)."""
    from sqlalchemy import event

    from ledger.text import check_block, check_json_strings, check_line

    def listener(check, what):
        def on_set(target, value, oldvalue, initiator):
            return check(what, value)
        return on_set

    for cls, kind, lines, blocks, jsons in fields:
        for group, check in ((lines, check_line), (blocks, check_block),
                             (jsons, check_json_strings)):
            for name in group:
                label = f"{kind} {name.replace('_json', '').replace('_text', '').replace('_', ' ')}"
                if name in ("model_text", "controller_text", "sensor_text", "prefilter_text"):
                    label = f"{kind} {name.replace('_', ' ')}"
                event.listen(getattr(cls, name), "set", listener(check, label), retval=True)


_install_text_checks()


class LoopSpectrum(Base):
    """A noise or disturbance spectrum of a loop (migration 0009): one per loop and source,
    fixed once recorded like the loop's settings.  ``table_json`` holds rows
    ``[frequency Hz, PSD in source-unit^2/Hz]`` (converted from the file's units, which
    ``unit_text``/``frequency_unit`` keep); rational spectra keep the shaping filter text and
    the intensity in source-unit^2/Hz."""

    __tablename__ = "loop_spectrum"
    __table_args__ = (
        UniqueConstraint("loop_id", "source", name="uq_loop_spectrum_source"),
        CheckConstraint("kind IN ('rational', 'table')", name="spectrum_kind_known"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    loop_id: Mapped[int] = mapped_column(ForeignKey("loop.id", ondelete="RESTRICT"), index=True)
    source: Mapped[str] = mapped_column(String(30))
    kind: Mapped[str] = mapped_column(String(10))
    shaping_text: Mapped[str] = mapped_column(Text, default="")
    intensity: Mapped[float | None] = mapped_column(Float, nullable=True)
    table_json: Mapped[str] = mapped_column(Text, default="")
    unit_text: Mapped[str] = mapped_column(String(60), default="")
    frequency_unit: Mapped[str] = mapped_column(String(20), default="Hz")
    label: Mapped[str] = mapped_column(Text, default="")
    content_hash: Mapped[str] = mapped_column(String(64))
    author: Mapped[str] = mapped_column(String(120))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


# -- waivers (migration 0010) ---------------------------------------------------------------
__all__ += ["Waiver", "WaiverWithdrawal"]


class Waiver(Base):
    """An approved, recorded deviation (migration 0010): a failing (or error) verdict of one
    requirement accepted on one revision, or on every revision a baseline freezes, with the
    reason, who approved it in what role, and until when (``expires_on``, an ISO date
    ``YYYY-MM-DD``, the last day it counts) or on what condition (free text).  Append-only and
    chained as kind ``waiver``; a withdrawal is a :class:`WaiverWithdrawal` row, never an edit."""

    __tablename__ = "waiver"
    __table_args__ = (
        CheckConstraint("(revision_id IS NULL) <> (baseline_id IS NULL)",
                        name="waiver_one_scope"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    requirement_id: Mapped[int] = mapped_column(
        ForeignKey("requirement.id", ondelete="RESTRICT"), index=True)
    revision_id: Mapped[int | None] = mapped_column(
        ForeignKey("revision.id", ondelete="RESTRICT"), nullable=True, index=True)
    baseline_id: Mapped[int | None] = mapped_column(
        ForeignKey("baseline.id", ondelete="RESTRICT"), nullable=True, index=True)
    reason: Mapped[str] = mapped_column(Text)
    approver: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(120))
    expires_on: Mapped[str | None] = mapped_column(String(10), nullable=True)
    condition: Mapped[str] = mapped_column(Text, default="")
    author: Mapped[str] = mapped_column(String(120), default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


class WaiverWithdrawal(Base):
    """The withdrawal of a waiver (migration 0010): who withdrew it and why; at most one per
    waiver.  Chained as kind ``waiver_withdrawal``."""

    __tablename__ = "waiver_withdrawal"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    waiver_id: Mapped[int] = mapped_column(
        ForeignKey("waiver.id", ondelete="RESTRICT"), unique=True)
    reason: Mapped[str] = mapped_column(Text)
    approver: Mapped[str] = mapped_column(String(120))
    role: Mapped[str] = mapped_column(String(120))
    author: Mapped[str] = mapped_column(String(120), default="")
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True))


_WAIVER_TEXT = (
    (Waiver, "waiver", ("approver", "role", "author", "expires_on"), ("reason", "condition"), ()),
    (WaiverWithdrawal, "waiver withdrawal", ("approver", "role", "author"), ("reason",), ()),
)
TEXT_FIELDS += _WAIVER_TEXT
_install_text_checks(_WAIVER_TEXT)
