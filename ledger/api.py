"""The Python API of the ledger: ``open_ledger`` and the :class:`Ledger` object.

Every public method that writes is one database transaction: it either records everything it
was asked to or nothing.  Records with history are append-only.

:class:`Ledger` is a facade: each method opens a reading or writing context of the unit of
work (:mod:`ledger.store.session`) and calls the store module of its record kind
(:mod:`ledger.store.plants`, ``loops``, ``requirements``, ``revisions``, ``results``) or the
verification runner (:mod:`ledger.verification.runner`).  See docs/architecture.md.
"""

from __future__ import annotations

import os
from typing import Callable, Iterable, Mapping, Sequence

from . import config
from .errors import LedgerError, SchemaError
from .records import (LineageNode, LoopInfo, lineage_forest, PlantInfo, RequirementInfo,
                      ResultInfo, RevisionInfo, WaiverInfo)
from .store import loops as loops_db
from .store import plants as plants_db
from .store import requirements as req_db
from .store import results as results_db
from .store import revisions as rev_db
from .store import waivers as waivers_db
from .store.db import display_url, resolve_url, scrub_secret
from .store.migrate import ensure_schema
from .store.session import UnitOfWork
from .validate import LOOP_KINDS, METHODS, STATUSES
from .validate import PLANT_HASH_FIELDS, plant_content_hash  # noqa: F401 - importable from here
from .verification import runner

__all__ = ["open_ledger", "Ledger", "METHODS", "STATUSES", "LOOP_KINDS"]

#: the name recorded on new records by default (kept importable from here; see ledger.config)
default_author = config.author


class Ledger:
    """An open ledger.  Use :func:`open_ledger` to get one; close it (or use ``with``).

    Attributes
    ----------
    url : str
        The database URL (print :attr:`display_url`, which masks the password).
    author : str
        Name recorded on new records.
    store : UnitOfWork
        Connections and transactions (:mod:`ledger.store.session`).
    schema_action : str
        What opening did to the schema (``"current"``, ``"created"``, ``"upgraded from ..."``).
    auto_verify : bool
        Verify after each change of requirements (default true).
    kernel_requests : int
        (metric, settings) requests the engine evaluated through this object.
    """

    #: how many times a write may be retried when the database is busy (bounded; read when
    #: the ledger is opened, ``lg.store.write_retries`` afterwards)
    WRITE_RETRIES = config.WRITE_RETRIES

    def __init__(self, url: str, *, author: str | None = None):
        self.url = url
        self.author = author or config.author()
        self.store = UnitOfWork(url, write_retries=self.WRITE_RETRIES)
        self.schema_action = "current"
        self.auto_verify = True
        self.kernel_requests = 0

    @property
    def display_url(self) -> str:
        """:attr:`url` fit to print or store in an export: the password masked."""
        return display_url(self.url)

    @property
    def retries(self) -> int:
        """Write transactions retried because the database was busy."""
        return self.store.retries

    # -- plumbing -------------------------------------------------------------------------
    def close(self) -> None:
        self.store.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def transaction(self):
        """A session context manager: one write transaction, committed on success."""
        return self.store.writing()

    def reading(self):
        """A session context manager for reads: one consistent snapshot, no write lock."""
        return self.store.reading()

    # -- plants ---------------------------------------------------------------------------
    def add_plant(self, name: str, model: str, *, params: Mapping | None = None,
                  fidelity: Mapping[str, str] | None = None, samples: int = 0, seed: int = 0,
                  sample_time: float | None = None, input_unit: str = "", output_unit: str = "",
                  description: str = "", note: str = "",
                  measured: Mapping | None = None) -> PlantInfo:
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
        measured : mapping, optional
            Bench measurements by name (:class:`~ledger.systems.measured.MeasuredResponse`),
            members ``measured:<name>`` of the family (``docs/measured.md``).
        """
        info, _ = self.store.write(
            plants_db.add, name, model, author=self.author, params=params, fidelity=fidelity,
            samples=samples, seed=seed, sample_time=sample_time, input_unit=input_unit,
            output_unit=output_unit, description=description, note=note, measured=measured)
        return info

    def add_measurement(self, plant: str, name: str, measurement, *, note: str = "",
                        replace: bool = False) -> PlantInfo:
        """Record a bench measurement as member ``measured:<name>`` of a plant's family: a new
        plant version with everything else as in the latest one.

        Parameters
        ----------
        plant : str
        name : str
            Measurement name, e.g. ``"unit-1"`` (letters, digits, ``.``, ``_``, ``-``).
        measurement : MeasuredResponse or control.FrequencyResponseData
            A ``FrequencyResponseData`` is taken with the defaults of
            :func:`~ledger.systems.measured.from_frd` (no RHP poles, no integrators).
        replace : bool
            Allow replacing a measurement of the same name (else refused).
        """
        from .errors import IntegrityViolation
        from .systems.measured import MeasuredResponse, from_frd

        if not isinstance(measurement, MeasuredResponse):
            measurement = from_frd(measurement)
        p = self.plant(plant)
        if name in p.measured and not replace:
            raise IntegrityViolation(f"plant {plant!r} already has a measurement {name!r}; "
                                     f"choose another name or replace it")
        measured = dict(p.measured)
        measured[name] = measurement
        return self.add_plant(p.name, p.model, params=p.params, fidelity=p.fidelity,
                              samples=p.samples, seed=p.seed, sample_time=p.sample_time,
                              input_unit=p.input_unit, output_unit=p.output_unit,
                              description=p.description,
                              note=note or f"measurement {name} recorded", measured=measured)

    def plants(self) -> list[PlantInfo]:
        """Every plant at its latest version, by name."""
        with self.reading() as s:
            return plants_db.all_plants(s)

    def plant(self, name: str, version: int | None = None) -> PlantInfo:
        """One plant, at its latest version or at ``version``."""
        with self.reading() as s:
            return plants_db.get(s, name, version)

    def plant_history(self, name: str) -> list[PlantInfo]:
        """Every version of plant ``name``, oldest first."""
        with self.reading() as s:
            return plants_db.history(s, name)

    # -- loops ----------------------------------------------------------------------------
    def add_loop(self, name: str, plant: str, *, kind: str = "position", sensor: str = "",
                 prefilter: str = "", input_delay: float = 0.0, output_delay: float = 0.0,
                 sample_time: float | None = None, computation_delay: int = 0,
                 actuator_limit: float | None = None, description: str = "",
                 rate_limit: float | None = None) -> LoopInfo:
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
        rate_limit : float, optional
            Largest |du/dt| of the actuator, plant input unit per second (large moves).
        """
        info, _ = self.store.write(
            loops_db.add, name, plant, kind=kind, sensor=sensor, prefilter=prefilter,
            input_delay=input_delay, output_delay=output_delay, sample_time=sample_time,
            computation_delay=computation_delay, actuator_limit=actuator_limit,
            description=description, rate_limit=rate_limit)
        return info

    def add_spectrum(self, loop: str, source: str, *, shaping: str = "",
                     intensity: float | None = None, table_text: str | None = None,
                     unit: str = "", frequency_unit: str = "Hz", label: str = "") -> dict:
        """Record a noise or disturbance spectrum on a loop (one per source, fixed once
        recorded; see :mod:`ledger.spectra_io` for the forms and units).  Returns the stored
        form with its content hash."""
        from .store import spectra as spectra_db

        form, _ = self.store.write(spectra_db.add, loop, source, author=self.author,
                                   shaping=shaping, intensity=intensity, table_text=table_text,
                                   unit=unit, frequency_unit=frequency_unit, label=label)
        return form

    def spectra(self, loop: str) -> list[dict]:
        """The stored forms of a loop's spectra, in source order."""
        from .store import spectra as spectra_db

        with self.reading() as s:
            return spectra_db.forms(s, loop)

    def rms_view(self, loop: str, label: str | None = None, *, output: str = "error",
                 bands=None):
        """The rms budget of a revision per source and band (:func:`ledger.rmsview.rms_view`)."""
        from .rmsview import rms_view

        return rms_view(self, loop, label, output=output, bands=bands)

    def loops(self) -> list[LoopInfo]:
        """Every loop, by name."""
        with self.reading() as s:
            return loops_db.all_loops(s)

    def loop(self, name: str) -> LoopInfo:
        """One loop."""
        with self.reading() as s:
            return loops_db.get(s, name)

    # -- requirements ---------------------------------------------------------------------
    def add_requirement(self, key: str, *, title: str, statement: str, rationale: str = "",
                        metric: str | None = None, limit: str | None = None,
                        settings: Mapping | None = None, parents: Sequence[str] = (),
                        loops: Sequence[str] = (), method: str = "analysis",
                        status: str = "draft", yield_claim: str | None = None,
                        confidence: str | float | None = None) -> RequirementInfo:
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
        yield_claim : str, optional
            A yield target ``'99 % at 95 %'`` (docs/history.md): the requirement is then judged
            on the lower confidence bound of its random samples' pass probability.
        confidence : str or float, optional
            Confidence of the bound shown beside the pass fraction (``'90 %'``; default 95 %).
        """
        info, _ = self.store.write(
            req_db.upsert, key, title=title, statement=statement, author=self.author,
            rationale=rationale, method=method, status=status, metric=metric,
            settings=settings, limit=limit, parents=parents, loops=loops, must_exist=False,
            yield_claim=yield_claim, confidence=confidence)
        runner.after_requirement_change(self, info)
        return info

    def edit_requirement(self, key: str, *, note: str = "", **changes) -> RequirementInfo:
        """Make a new version of a requirement with ``changes`` applied.

        Accepted changes: ``title, statement, rationale, method, status, metric, settings,
        limit, parents, loops, yield_claim, confidence`` (``yield_claim=""`` removes the yield
        target).  The old version stays readable.  Nothing changes (and no
        version is made) when the changes equal the latest version.
        """
        info, _ = self.store.write(req_db.edit, key, author=self.author, note=note, **changes)
        runner.after_requirement_change(self, info)
        return info

    def retire_requirement(self, key: str, *, note: str = "") -> RequirementInfo:
        """Retire a requirement (a new version with status ``retired``)."""
        return self.edit_requirement(key, status="retired", note=note)

    def requirements(self, *, status: str | None = None, loop: str | None = None,
                     include_retired: bool = True) -> list[RequirementInfo]:
        """Latest version of every requirement, by ID; optionally filtered."""
        with self.reading() as s:
            return req_db.all_requirements(s, status=status, loop=loop,
                                           include_retired=include_retired)

    def requirement(self, key: str, version: int | None = None) -> RequirementInfo:
        """One requirement, at its latest version or at ``version``."""
        with self.reading() as s:
            return req_db.get(s, key, version)

    def requirement_history(self, key: str) -> list[RequirementInfo]:
        """Every version of requirement ``key``, oldest first."""
        with self.reading() as s:
            return req_db.history(s, key)

    def add_starter_requirements(self, loop: str, kind: str | None = None) -> list[RequirementInfo]:
        """Record the starter requirement set for ``loop``'s kind as draft requirements with
        IDs ``<LOOP>-S01``...  (common-practice limits; edit them to the system's needs).
        Requirements that already exist with those IDs are left as they are.  One transaction;
        then each is verified on the loop's tip."""
        infos = self.store.write(req_db.add_starters, loop, kind, author=self.author)
        if infos and self.auto_verify:
            self.verify(loop, tips_only=True, keys=[i.key for i in infos])
        return infos

    # -- revisions ------------------------------------------------------------------------
    def add_revision(self, loop: str, controller: str, *, rationale: str,
                     parent: str | None = "tip", author: str | None = None,
                     label: str | None = None, verify: bool = True,
                     discretization: str | None = None,
                     number_format: str | None = None, prefilter: str = "",
                     anti_windup: str = "none",
                     anti_windup_gain: float | None = None) -> RevisionInfo:
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
        discretization : str, optional
            Digital loops: how a continuous design becomes the controller that runs
            (``"zoh"``, ``"tustin"``, ``"tustin@W"`` with W in rad/s or ``"tustin@30Hz"``,
            ``"matched"``; docs/digital.md).  Required for a controller in s on a digital
            loop; on a controller in z it records the method for review.
        number_format : str, optional
            Digital loops: the number format of the stored coefficients (``"fixed:W/F"``,
            ``"single"``); verification then uses the quantised coefficients.
        prefilter : str
            The revision's own reference prefilter / feedforward shaping F (model text):
            ``u = C (F r - ym)``.  Empty: the loop's prefilter applies (the revision's takes
            precedence when given).  Hashed, shown and diffed like the controller.
        anti_windup : str
            ``"none"`` (default), ``"clamping"`` (conditional integration) or
            ``"back-calculation"``: what the controller's integrator does while the actuator
            is at its limit (large-move metrics, docs/metrics.md).
        anti_windup_gain : float, optional
            Back-calculation gain, 1/s.

        Raises
        ------
        ModelError
            The controller cannot close this loop (e.g. an ideal derivative without a filter,
            a continuous controller in a digital loop); nothing is recorded.
        """
        return runner.add_revision(self, loop, controller, rationale=rationale, parent=parent,
                                   author=author, label=label, verify=verify,
                                   discretization=discretization or "",
                                   number_format=number_format or "",
                                   prefilter=prefilter, anti_windup=anti_windup,
                                   anti_windup_gain=anti_windup_gain)

    def try_revision(self, loop: str, controllers: str | Sequence[str], *,
                     against: str | None = None, threshold: float = 0.25):
        """Dry run: verify candidate controller(s) over the whole plant family and compare each
        with a recorded revision, recording nothing (no row in any table, no chain link).

        Parameters
        ----------
        controllers : str or sequence of str
            One controller text, or several (named ``A``, ``B``... in the report).
        against : str, optional
            Label of the revision to compare with (default: the loop's tip; none when the
            loop has no revision yet, so every result is ``new``).
        threshold : float
            As for :func:`ledger.history.diff.diff`.

        Returns
        -------
        TryReport
            ``candidates``: per candidate its results (as ``results`` would show them), its
            changes against the reference (regression classes of docs/history.md), and
            whether it breaks nothing; ``safe``: the names of those that break nothing.

        The values computed are kept outside the ledger, keyed by content hash
        (:mod:`ledger.verification.tried`): recording a tried candidate afterwards with
        :meth:`add_revision` computes nothing.
        """
        from .verification.tryout import try_revision

        return try_revision(self, loop, controllers, against=against, threshold=threshold)

    def revisions(self, loop: str) -> list[RevisionInfo]:
        """Every revision of ``loop`` in the order recorded (two queries, any length)."""
        with self.reading() as s:
            return rev_db.all_revisions(s, loop)

    def revision(self, loop: str, label: str | None = None) -> RevisionInfo:
        """One revision; ``label=None`` gives the loop's tip (latest recorded)."""
        with self.reading() as s:
            return rev_db.get(s, loop, label)

    def lineage(self, loop: str) -> list[LineageNode]:
        """The revision tree of ``loop``: a list of roots, children in recorded order."""
        return lineage_forest(self.revisions(loop))

    def ancestry(self, loop: str, label: str) -> list[RevisionInfo]:
        """``label`` and its ancestors, newest first."""
        labels = self.ancestry_labels(loop, label)
        revs = {r.label: r for r in self.revisions(loop)}
        return [revs[l] for l in labels]

    def ancestry_labels(self, loop: str, label: str) -> list[str]:
        """Labels of ``label`` and its ancestors, newest first (one light query)."""
        with self.reading() as s:
            return rev_db.ancestry_labels(s, loop, label)

    # -- verification ---------------------------------------------------------------------
    def verify(self, loop: str | None = None, *, label: str | None = None,
               tips_only: bool = False, keys: Iterable[str] | None = None,
               progress: Callable[[int, int, str], None] | None = None,
               workers: int = 1, cluster=None) -> list[dict]:
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
        cluster : str or distributed.Client, optional
            Compute on a Dask cluster instead (the ``cluster`` extra): a scheduler address
            (``tcp://host:8786``, ``tls://host:8786``), ``"local:N"`` (a cluster of N worker
            processes on this machine, started and stopped by this call) or a connected
            ``distributed.Client``.  Tasks are whole revisions when there are many, chunks of
            one family's variant groups when there are few; the values, verdicts and cache
            keys are the same as in-process.  Not combined with ``workers`` > 1.
        progress : callable, optional
            Called as ``progress(tasks done, tasks in all, what)``: with ``(0, n, ...)`` once
            planning is done, then after each task (in this process a task is one revision).

        Returns
        -------
        list of dict
            One entry per revision touched: ``loop``, ``revision``, ``results`` (written),
            ``computed`` (metric requests evaluated by the engine).
        """
        return runner.verify(self, loop, label=label, tips_only=tips_only, keys=keys,
                             progress=progress, workers=workers, cluster=cluster)

    def numeric_setup(self, loop: str, label: str | None = None):
        """The numeric objects a revision is verified with: ``(family, controller, loop_spec)``
        (a ``PlantFamily`` of the plant's latest version, the controller and the ``LoopSpec``)
        for plots, evidence and notebook work with ``ledger.engine``."""
        return runner.numeric_setup(self, loop, label)

    # -- waivers (rules: ledger.waivers) --------------------------------------------------
    def add_waiver(self, requirement: str, *, reason: str, approver: str, role: str,
                   loop: str | None = None, revision: str | None = None,
                   baseline: str | None = None, expires=None, condition: str = "",
                   as_of=None) -> WaiverInfo:
        """Record a waiver of ``requirement``'s failing (or error) verdict on revision
        ``loop``/``revision`` (the loop's tip when ``revision`` is ``None``) or on every
        revision ``baseline`` freezes (give ``loop`` or ``baseline``, not both).

        ``expires`` (a date or ``YYYY-MM-DD``) is the last day it counts and must not be
        before ``as_of`` (default today, UTC); ``condition`` is free text ("until the next
        hardware build").  Raises ``WaiverError`` (no reason/approver/role, past expiry, no
        cell there), ``NotFoundError`` or ``UsageError``; nothing is recorded then.
        """
        from .errors import UsageError
        from .waivers import check_waiver

        if (loop is None) == (baseline is None) or (baseline is not None and revision):
            raise UsageError("a waiver names a loop (and optionally a revision) or a "
                             "baseline, not both and not neither")
        fields = check_waiver(reason=reason, approver=approver, role=role, expires=expires,
                              condition=condition, as_of=as_of)

        def work(s):
            return waivers_db.get(s, waivers_db.add(
                s, requirement, loop=loop, label=revision, baseline=baseline,
                author=self.author, **fields))

        return self.store.write(work)

    def waivers(self, requirement: str | None = None) -> list[WaiverInfo]:
        """Every waiver (withdrawn and expired ones included: see ``WaiverInfo.status``),
        oldest first; of one requirement if given."""
        with self.reading() as s:
            return waivers_db.all_waivers(s, requirement=requirement)

    def withdraw_waiver(self, waiver_id: int, *, reason: str, approver: str,
                        role: str) -> WaiverInfo:
        """Withdraw a waiver: a new, chained withdrawal record (the waiver is not edited)."""
        from .waivers import check_withdrawal

        fields = check_withdrawal(reason=reason, approver=approver, role=role)

        def work(s):
            waivers_db.withdraw(s, int(waiver_id), author=self.author, **fields)
            return waivers_db.get(s, int(waiver_id))

        return self.store.write(work)

    # -- results --------------------------------------------------------------------------
    def results(self, loop: str, label: str | None = None, *,
                include_stale: bool = True) -> list[ResultInfo]:
        """Verdicts on one revision (default: the loop's tip), one per requirement.

        For each requirement the result judged against the latest requirement and plant
        versions is given; when there is none, the newest older one is given marked stale.
        """
        with self.reading() as s:
            return results_db.of_revision(s, loop, label, include_stale=include_stale)

    def results_many(self, loop: str, labels: Sequence[str], *, include_stale: bool = True,
                     keys: Sequence[str] | None = None) -> dict[str, list[ResultInfo]]:
        """:meth:`results` for several revisions of one loop at once (a fixed number of
        queries, whatever the number of revisions)."""
        with self.reading() as s:
            return results_db.of_revisions(s, loop, labels, include_stale=include_stale,
                                           keys=keys)

    def verdict_counts(self, loop: str, labels: Sequence[str] | None = None
                       ) -> dict[str, dict[str, int]]:
        """Per revision label of ``loop`` (all, or ``labels``): how many current requirements
        pass, fail, are in error or are stale — counted in the database."""
        with self.reading() as s:
            return results_db.verdict_counts(s, loop, labels)

    def counts(self) -> dict[str, int]:
        """Rows per table of the records with history (used by tests and the CLI summary)."""
        with self.reading() as s:
            return results_db.counts(s)


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
