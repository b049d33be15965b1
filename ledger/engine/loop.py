"""Loop settings and assembly of closed-loop batches over a plant family.

Signals (SISO, negative feedback)::

    e  = F r - ym                 actuating error (F: prefilter, 1 if absent)
    u  = C e                      controller output
    v  = u(t - input_delay) + d   plant input; d is an input disturbance
    y  = G v(t - plant_delay)     plant output (plant_delay: the variant's own delay)
    ym = H y(t - output_delay) + n     measurement; H sensor (1 if absent), n noise

All blocks are SISO and linear, so every delay commutes round the loop.  The loop delay is
``tau = input_delay + plant_delay + output_delay`` and each path is
``e^{-s io} P0(s) / (1 + L0(s) e^{-s tau})`` with ``P0`` the delay-free forward blocks and
``io`` the delay met on the way in (``r->y``: input + plant delay; ``d->y``: plant delay;
``r->e``, ``r->u``, ``n->u``: none).  The delay-free part is built once with the delay cut
at the measurement (``z = y``, ``w = z(t - tau)``) and handed to the kernels as an
:class:`~ledger.engine.types.SSBatch` with one internal delay channel.

Digital loops (``sample_time`` set): the continuous plant and every loop delay are
discretised exactly with a zero-order hold (:mod:`ledger.engine.discretize`), the
computation delay becomes ``z^-d``.  The controller output reaches the plant through all
loop delays and the computation delay, the input disturbance (a held step) only through the
plant and output delays; ``y`` is the sampled measured output ``y(k Ts - output_delay)``.
Frequency responses run up to ``pi / Ts``.

Blocks live in :mod:`ledger.engine.blocks`, the closed-loop batches of a group in
:mod:`ledger.engine.closedloop`; this module holds the loop settings, the per-variant checks and
the planning of groups, and re-exports the names of both.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import control
import numpy as np

from ..errors import ModelError
from .blocks import (Block, _balance, _balance_batch, _batch_roots,  # noqa: F401
                     _block_from_matrices, _shape_key, _tf_coefficients, _trim, _zpk_from_ss,
                     make_block, make_blocks)
from .closedloop import (PATHS, _PATH_IO, Assembly, ClosedLoopResponse,  # noqa: F401
                         LoopGroup, _build_group, _close, _group_matrices, _interconnect,
                         _root_product)
from .discretize import zoh_discretize_inputs
from .types import PlantFamily

__all__ = ["LoopSpec", "Block", "ClosedLoopResponse", "LoopGroup", "Assembly", "PATHS",
           "make_block", "make_blocks", "assemble", "plan", "Plan", "GroupPlan"]


def _check_time(value, what: str, *, allow_zero: bool = True) -> None:
    if value is None:
        return
    try:
        x = float(value)
    except (TypeError, ValueError) as e:
        raise ModelError(f"{what} {value!r} is not a number; give seconds as a float") from e
    if not math.isfinite(x) or x < 0 or (x == 0 and not allow_zero):
        need = "> 0" if not allow_zero else ">= 0"
        raise ModelError(f"{what} {value!r} s is not finite and {need}; give a value {need}")


@dataclass(frozen=True)
class LoopSpec:
    """How a controller and a plant are connected.

    Parameters
    ----------
    sensor : control.LTI or None
        Sensor dynamics H in the feedback path; ``None`` is unity feedback.
    prefilter : control.LTI or None
        Reference prefilter F; ``None`` is 1.
    input_delay : float
        Delay from controller output to plant input, s (>= 0).
    output_delay : float
        Delay from plant output to measurement, s (>= 0).
    sample_time : float or None
        ``None``: continuous controller.  Otherwise the controller is discrete with this
        sample time, s (> 0).
    computation_delay : int or float
        Computation delay in samples (digital loops only; >= 0).  Whole samples are ``z^-d``;
        a fractional part (processor latency, e.g. 0.3 samples) is exact: it joins the loop's
        transport delay that the zero-order-hold discretisation of the plant carries through
        the modified z-transform (:mod:`ledger.engine.discretize`).
    actuator_limit : float or None
        Actuator limit in plant-input units, for the effort metric; ``None`` means none.
    controller_discretization : str or None
        ``None`` refuses a continuous controller in a digital loop; a method text
        (``"zoh"``, ``"tustin"``, ``"tustin@W"`` pre-warped at W rad/s or ``"tustin@FHz"``,
        ``"matched"``; :mod:`ledger.engine.c2d`) converts it.  A discrete controller is used
        as given whatever the method.
    number_format : str or None
        Digital loops: the number format of the controller's coefficients (``"fixed:W/F"``,
        ``"single"``; :mod:`ledger.engine.quantize`).  The controller (after its
        discretisation) is verified with its difference-equation coefficients quantised; the
        unquantised one is the reference of ``quantization_pole_shift``.
    reference_controller : control.LTI or None
        Digital loops: the controller before quantisation, when the controller given is
        already quantised (the ledger quantises firmware forms itself); the reference of
        ``quantization_pole_shift``.  Neither set: the shift is 0.
    spectra : tuple of Spectrum
        Noise and disturbance spectra, at most one per source
        (:class:`~ledger.engine.spectra.Spectrum`), for the rms metrics; ``()`` is none.
    rate_limit : float or None
        Largest |du/dt| of the actuator, plant-input units per second (large-move metrics
        only; ``None``: none).
    anti_windup : str
        ``"none"``, ``"clamping"`` (conditional integration) or ``"back-calculation"``: how
        the controller's integrator is kept from winding up while the actuator is at its
        limit (large-move metrics only; :mod:`ledger.engine.moves`).
    anti_windup_gain : float or None
        Back-calculation gain, 1/s (``back-calculation`` only).
    """

    sensor: Any = None
    prefilter: Any = None
    input_delay: float = 0.0
    output_delay: float = 0.0
    sample_time: float | None = None
    computation_delay: int = 0
    actuator_limit: float | None = None
    controller_discretization: str | None = None
    number_format: str | None = None
    reference_controller: Any = None
    spectra: tuple = ()
    rate_limit: float | None = None
    anti_windup: str = "none"
    anti_windup_gain: float | None = None

    def __post_init__(self):
        _check_time(self.input_delay, "input_delay")
        _check_time(self.output_delay, "output_delay")
        _check_time(self.sample_time, "sample_time", allow_zero=False)
        d = self.computation_delay
        if isinstance(d, bool) or not isinstance(d, (int, np.integer, float, np.floating)) \
                or not math.isfinite(d) or d < 0:
            raise ModelError(f"computation_delay {d!r} is not a number of samples >= 0")
        if d and self.sample_time is None:
            raise ModelError("computation_delay needs a digital loop; give sample_time too")
        if self.actuator_limit is not None:
            a = float(self.actuator_limit)
            if not (math.isfinite(a) and a > 0):
                raise ModelError(f"actuator_limit {self.actuator_limit!r} is not positive and "
                                 "finite; give a limit > 0 or None")
        from .c2d import parse_discretization

        parse_discretization(self.controller_discretization)  # a one-line error if unknown
        if (self.number_format or self.reference_controller is not None) \
                and self.sample_time is None:
            raise ModelError("number_format and reference_controller need a digital loop; "
                             "give sample_time too")
        if self.number_format:
            from .quantize import parse_number_format

            parse_number_format(self.number_format)
        object.__setattr__(self, "spectra", tuple(self.spectra or ()))
        _check_spectra(self.spectra)

        if self.rate_limit is not None:
            a = float(self.rate_limit)
            if not (math.isfinite(a) and a > 0):
                raise ModelError(f"rate_limit {self.rate_limit!r} is not positive and finite; "
                                 "give a limit > 0 (input units per second) or None")
        if self.anti_windup not in ("none", "clamping", "back-calculation"):
            raise ModelError(f"anti_windup {self.anti_windup!r} is unknown; use 'none', "
                             "'clamping' or 'back-calculation'")
        if self.anti_windup == "back-calculation":
            g = self.anti_windup_gain
            if g is None or not (math.isfinite(float(g)) and float(g) > 0):
                raise ModelError("back-calculation anti-windup needs anti_windup_gain > 0 (1/s)")
        elif self.anti_windup_gain is not None:
            raise ModelError("anti_windup_gain is only for back-calculation anti-windup")

def _check_spectra(spectra) -> None:
    from .spectra import Spectrum

    seen = set()
    for sp in spectra:
        if not isinstance(sp, Spectrum):
            raise ModelError(f"spectra must be Spectrum objects, got {type(sp).__name__}")
        if sp.source in seen:
            raise ModelError(f"two spectra for {sp.source}; give one per source")
        seen.add(sp.source)


def _prepare_controller(controller, loop: LoopSpec) -> Block:
    return make_block(_discrete_controller(controller, loop), "controller")


def _quantized(controller, loop: LoopSpec):
    """(controller as verified, reference before quantisation or None)."""
    controller = _discrete_controller(controller, loop)
    if loop.number_format:
        from .quantize import quantize_system

        return quantize_system(controller, loop.number_format), controller
    if loop.reference_controller is not None:
        return controller, _discrete_controller(loop.reference_controller, loop)
    return controller, None


def _discrete_controller(controller, loop: LoopSpec):
    """The controller in the loop's time domain (discretised by the loop's method)."""
    ts = loop.sample_time
    if isinstance(controller, (control.TransferFunction, control.StateSpace)):
        cdt = controller.dt
        if ts is not None and (cdt is None or cdt == 0) and _order(controller) > 0:
            if loop.controller_discretization:
                from .c2d import discretize

                _ = make_block(controller, "controller")  # properness check first
                controller = discretize(controller, ts, loop.controller_discretization)
            else:
                raise ModelError("controller is continuous but the loop is digital "
                                 f"(sample_time={ts} s); give it in z with that dt or a "
                                 "discretisation method (discretization='zoh', 'tustin', "
                                 "'tustin@W' or 'matched')")
        elif ts is None and cdt not in (None, 0):
            raise ModelError(f"controller is discrete (dt={cdt} s) but the loop is continuous; "
                             "set sample_time to the controller's dt")
        elif ts is not None and cdt not in (None, 0, True) and not math.isclose(cdt, ts):
            raise ModelError(f"controller dt={cdt} s differs from the loop sample_time={ts} s; "
                             "use one sample time")
    return controller


def _order(sys) -> int:
    if isinstance(sys, control.StateSpace):
        return sys.nstates
    return len(_trim(sys.den[0][0])) - 1


def _aux_block(sys, role: str, ts) -> Block:
    blk = make_block(1.0 if sys is None else sys, role)
    if ts is None and blk.dt not in (None, "any"):
        raise ModelError(f"{role} is discrete but the loop is continuous; give it in s")
    if ts is not None and blk.dt is None:
        raise ModelError(f"{role} is continuous but the loop is digital (sample_time={ts} s); "
                         "give it in z with that dt, or fold it into the plant")
    if ts is not None and blk.dt not in ("any", True) and not math.isclose(blk.dt, ts):
        raise ModelError(f"{role} dt={blk.dt} s differs from the loop sample_time={ts} s")
    return blk


def _plant_block(variant, loop: LoopSpec, blk: Block | None = None
                 ) -> tuple[Block, float, float]:
    """Return (plant Block, loop delay tau, r->y io delay) for one variant (``blk``: its block
    when already made)."""
    if blk is None:
        blk = make_block(variant.system, f"plant variant {variant.name!r}")
    pd = float(variant.delay)
    _check_time(pd, f"delay of plant variant {variant.name!r}")
    ts = loop.sample_time
    total = loop.input_delay + pd + loop.output_delay
    if ts is None:
        if blk.dt not in (None, "any"):
            raise ModelError(f"plant variant {variant.name!r} is discrete (dt={blk.dt} s) but "
                             "the loop is continuous; set sample_time")
        return blk, total, (loop.input_delay, pd)
    # controller output: every loop delay plus the computation delay; input disturbance:
    # only the delays after the plant input (plant and output delay)
    delays = [total + loop.computation_delay * ts, pd + loop.output_delay]
    if blk.dt in (None, "any"):
        A, B2, C, D2 = zoh_discretize_inputs(blk.A, blk.B, blk.C, blk.D, ts, delays)
        return _block_from_matrices(A, B2, C, D2, ts), 0.0, (0.0, 0.0)
    if blk.dt is True or not math.isclose(blk.dt, ts, rel_tol=1e-9):
        raise ModelError(f"plant variant {variant.name!r} has dt={blk.dt} s but the loop "
                         f"sample_time is {ts} s; resample the plant or change sample_time")
    try:
        A, B2, C, D2 = zoh_discretize_inputs(blk.A, blk.B, blk.C, blk.D, ts, delays,
                                             discrete=True)
    except ModelError as e:
        raise ModelError(f"plant variant {variant.name!r} is discrete but the loop delays "
                         f"({total} s) are not whole samples; give a continuous plant "
                         "instead") from e
    return _block_from_matrices(A, B2, C, D2, ts), 0.0, (0.0, 0.0)


_POINTS_PER_RESONANCE = 63
#: Most resonance points a group's shared grid may carry: groups of resonant variants hold at
#: most ``_RESONANCE_BUDGET // (_POINTS_PER_RESONANCE * pairs)`` variants, so the grid of a
#: group (the union over its variants) stays a few thousand points whatever the family size.
_RESONANCE_BUDGET = 3000
#: Most ``variants x m^2`` (``m``: closed-loop states + 1) of one pool of resonance clusters
#: that share a time response (one propagation of ``V x m x m`` blocks): more variants per
#: propagation save per-call work, and this bound keeps the propagation's power blocks in cache
#: (measured on the benchmark families: optimum near 7,000 at plant orders 4 and 16)
_POOL_BUDGET = 8192
#: Damping ratio below which a plant pole or zero counts as a resonance (the grid's
#: ``resonance_zeta``).
_RESONANCE_ZETA = 0.3


def _resonances(Gs: list, ts) -> list:
    """Per block: sorted damped frequencies (rad/s) of its lightly damped poles and zeros (one
    entry per conjugate pair; discrete roots mapped by ``log(z)/ts``).  Blocks with equally
    many poles and zeros are handled together."""
    out: list = [None] * len(Gs)
    shapes: dict = {}
    for j, G in enumerate(Gs):
        shapes.setdefault((G.poles.size, G.zeros.size), []).append(j)
    for idx in shapes.values():
        r = np.array([np.concatenate([Gs[j].poles, Gs[j].zeros]) for j in idx], dtype=complex)
        r = r.reshape(len(idx), -1)
        keep = np.ones(r.shape, bool)
        if ts:
            keep = np.abs(r) > 1e-12
            with np.errstate(divide="ignore", invalid="ignore"):
                r = np.log(np.where(keep, r, 1.0)) / ts
        mag = np.abs(r)
        with np.errstate(divide="ignore", invalid="ignore"):
            zeta = np.where(mag > 0, -r.real / np.where(mag > 0, mag, 1.0), 1.0)
        light = (keep & (mag > 0) & (np.abs(zeta) > 0) & (np.abs(zeta) < _RESONANCE_ZETA)
                 & (r.imag > 0))
        if not light.any():
            empty = np.zeros(0)
            for j in idx:
                out[j] = empty
            continue
        for row, j in enumerate(idx):
            out[j] = np.sort(r.imag[row][light[row]])
    return out


@dataclass(frozen=True, eq=False)
class GroupPlan:
    """Which variants form one group, before its matrices are built (see :func:`plan`)."""

    index: np.ndarray
    tau: float
    d_in: float
    d_plant: float
    #: resonant groups: the clusters of close resonances it pools (their index arrays, whose
    #: concatenation is ``index``); each cluster has its own frequency grid, and the group
    #: shares one time response (empty: the group is one cluster)
    clusters: tuple = ()

    def parts(self) -> list["GroupPlan"]:
        """The group's clusters, each as a group of its own (``[self]`` for one cluster)."""
        if not self.clusters:
            return [self]
        return [GroupPlan(c, self.tau, self.d_in, self.d_plant) for c in self.clusters]


@dataclass(frozen=True, eq=False)
class Plan:
    """The grouping of a family's variants and the shared blocks; groups are built one at a
    time by :meth:`build` (see :func:`plan`)."""

    family: PlantFamily
    loop: LoopSpec
    blocks: tuple            # (prefilter F, controller K, sensor H)
    groups: tuple            # of GroupPlan
    algebraic_tol: float
    variants: tuple = ()     # variant names in family order
    reference: Any = None    # the controller before quantisation (quantization_pole_shift)

    @property
    def dt(self):
        return self.loop.sample_time

    def build(self, gp: GroupPlan) -> LoopGroup:
        """The :class:`LoopGroup` of one planned group.  Its plant blocks are made here from
        the group's variants alone (:func:`make_blocks` balances realisations per batch), so a
        group is the same whether built in one call, streamed or in a worker process."""
        F, K, H = self.blocks
        idx = gp.index
        vs = [self.family.variants[int(i)] for i in idx]
        bl = make_blocks([v.system for v in vs], [f"plant variant {v.name!r}" for v in vs])
        Gs = [_plant_block(v, self.loop, b)[0] for v, b in zip(vs, bl)]
        return _build_group(np.asarray(idx), Gs, F, K, H, gp.tau, gp.d_in, gp.d_plant,
                            self.dt, self.algebraic_tol)

    def assembly(self) -> "Assembly":
        """Every group built: the :class:`Assembly` of the whole family."""
        return Assembly(variants=self.variants, dt=self.dt, loop=self.loop,
                        groups=tuple(self.build(gp) for gp in self.groups))


def plan(family: PlantFamily, controller, loop: LoopSpec | None = None, *,
         algebraic_tol: float = 1e-12, batch_size: int = 1024, chunk: int = 4096) -> Plan:
    """Check every block and decide the groups of :func:`assemble` without building them.

    Variants are grouped by plant order and loop delays.  Within that, variants without a
    lightly damped plant pole or zero (damping below 0.3) form groups of up to
    ``batch_size`` in family order; resonant variants are sorted by their damped resonance
    frequencies and cut into clusters of at most ``3000 // (63 * pairs)`` variants (``pairs``:
    the most lightly damped pairs of one variant), because a cluster's frequency grid carries
    every member's resonance points and would otherwise grow with the family.  Consecutive
    clusters are pooled into one group of at most ``8192 // m**2`` variants (``m``: closed-loop
    states + 1): each cluster keeps its own frequency grid and the pool shares one time
    response (:attr:`GroupPlan.clusters`).  The grouping
    depends only on the family, never on how its groups are later processed (one by one,
    streamed, or in worker processes), so every way gives the same numbers.

    The plant blocks are checked (and their resonances read) in chunks of ``chunk`` variants
    and dropped; :meth:`Plan.build` makes them again group by group, so memory stays bounded.
    """
    loop = loop or LoopSpec()
    if not isinstance(family, PlantFamily):
        family = PlantFamily.single(family)
    ts = loop.sample_time
    controller, reference = _quantized(controller, loop)
    K = _prepare_controller(controller, loop)
    F = _aux_block(loop.prefilter, "prefilter", ts)
    H = _aux_block(loop.sensor, "sensor", ts)
    V = len(family)
    step = max(1, int(chunk))
    keys: dict = {}
    feats: list = [None] * V
    for s0 in range(0, V, step):
        vs = family.variants[s0:s0 + step]
        blocks = make_blocks([v.system for v in vs], [f"plant variant {v.name!r}" for v in vs])
        Gs = []
        for j, (v, b) in enumerate(zip(vs, blocks)):
            G, tau, delays = _plant_block(v, loop, b)
            keys.setdefault((G.order, tau, delays), []).append(s0 + j)
            Gs.append(G)
        feats[s0:s0 + len(Gs)] = _resonances(Gs, ts)
    size = max(1, int(batch_size))
    groups = []
    for (ng, tau, (d_in, d_plant)), idx_all in keys.items():
        plain = [i for i in idx_all if feats[i].size == 0]
        res = [i for i in idx_all if feats[i].size]
        for s0 in range(0, len(plain), size):
            groups.append(GroupPlan(np.asarray(plain[s0:s0 + size]), tau, d_in, d_plant))
        if res:
            pairs = max(feats[i].size for i in res)
            c = max(1, min(size, _RESONANCE_BUDGET // (_POINTS_PER_RESONANCE * pairs)))
            F_ = np.full((len(res), pairs), np.inf)
            for r, i in enumerate(res):
                F_[r, :feats[i].size] = feats[i]
            # lexicographic by resonance frequencies, family order on ties
            order = np.lexsort((np.asarray(res),) + tuple(F_[:, k] for k in
                                                          range(pairs - 1, -1, -1)))
            srt = np.asarray(res)[order]
            clusters = [np.sort(srt[s0:s0 + c]) for s0 in range(0, srt.size, c)]
            # consecutive clusters (close resonances) share their time responses: a pool
            # holds at most _POOL_BUDGET / m^2 variants (m: closed-loop states + the step)
            m = ng + K.order + F.order + H.order + 1
            per = max(1, min(size, _POOL_BUDGET // (m * m)) // c)
            for k in range(0, len(clusters), per):
                cl = tuple(clusters[k:k + per])
                groups.append(GroupPlan(np.concatenate(cl), tau, d_in, d_plant,
                                        clusters=cl if len(cl) > 1 else ()))
    return Plan(family=family, loop=loop, blocks=(F, K, H), groups=tuple(groups),
                algebraic_tol=algebraic_tol, variants=family.names, reference=reference)


def assemble(family: PlantFamily, controller, loop: LoopSpec | None = None, *,
             algebraic_tol: float = 1e-12, batch_size: int = 1024) -> Assembly:
    """Close ``controller`` round every variant of ``family``.

    Parameters
    ----------
    family : PlantFamily
    controller : control.LTI or float
        Continuous controller, or discrete with ``dt == loop.sample_time``.
    loop : LoopSpec, optional
        Loop settings (default: unity feedback, continuous, no delays).
    algebraic_tol : float, optional
        ``|1 + D_C D_G D_H|`` below this is an algebraic loop (default 1e-12, dimensionless).
    batch_size : int, optional
        Most variants per group (default 1024).  Frequency grids are shared within a group
        (their union over the variants); resonant variants are grouped in small clusters of
        close resonances (see :func:`plan`), the others share a group up to this size.

    Returns
    -------
    Assembly

    Raises
    ------
    ModelError
        An unacceptable block or loop (improper, mismatched sample times, algebraic loop...).
    """
    return plan(family, controller, loop, algebraic_tol=algebraic_tol,
                batch_size=batch_size).assembly()
