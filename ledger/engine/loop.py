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
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

import control
import numpy as np
import scipy.linalg
import scipy.signal

from ..errors import ModelError
from .discretize import zoh_discretize_inputs
from .timegrid import balance_scales
from .types import FreqBatch, PlantFamily, SSBatch

__all__ = ["LoopSpec", "Block", "ClosedLoopResponse", "LoopGroup", "Assembly", "PATHS",
           "make_block", "make_blocks", "assemble", "plan", "Plan", "GroupPlan"]

#: Closed-loop signal paths: input -> output.
PATHS = ("r->y", "r->e", "r->u", "d->y", "n->u")

_PATH_IO = {"r->y": ("r", "y"), "r->e": ("r", "e"), "r->u": ("r", "u"),
            "d->y": ("d", "y"), "n->u": ("n", "u")}


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
    computation_delay : int
        Whole samples of computation delay, ``z^-d`` (digital loops only; >= 0).
    actuator_limit : float or None
        Actuator limit in plant-input units, for the effort metric; ``None`` means none.
    controller_discretization : str or None
        ``None`` refuses a continuous controller in a digital loop; ``"tustin"`` converts it.
    """

    sensor: Any = None
    prefilter: Any = None
    input_delay: float = 0.0
    output_delay: float = 0.0
    sample_time: float | None = None
    computation_delay: int = 0
    actuator_limit: float | None = None
    controller_discretization: str | None = None

    def __post_init__(self):
        _check_time(self.input_delay, "input_delay")
        _check_time(self.output_delay, "output_delay")
        _check_time(self.sample_time, "sample_time", allow_zero=False)
        d = self.computation_delay
        if isinstance(d, bool) or not isinstance(d, (int, np.integer)) or d < 0:
            raise ModelError(f"computation_delay {d!r} is not a whole number of samples >= 0")
        if d and self.sample_time is None:
            raise ModelError("computation_delay needs a digital loop; give sample_time too")
        if self.actuator_limit is not None:
            a = float(self.actuator_limit)
            if not (math.isfinite(a) and a > 0):
                raise ModelError(f"actuator_limit {self.actuator_limit!r} is not positive and "
                                 "finite; give a limit > 0 or None")
        if self.controller_discretization not in (None, "tustin"):
            raise ModelError(f"controller_discretization {self.controller_discretization!r} "
                             "is unknown; use None or 'tustin'")


# --------------------------------------------------------------------------- blocks

def _trim(p: np.ndarray) -> np.ndarray:
    p = np.asarray(p, dtype=float).reshape(-1)
    nz = np.flatnonzero(p != 0.0)
    return p[nz[0]:] if nz.size else np.zeros(1)


@dataclass(frozen=True, eq=False)
class Block:
    """One SISO block: state-space matrices and zero/pole/gain for exact evaluation.

    ``dt`` is ``None`` (continuous), a float (discrete) or ``"any"`` (static gain).
    ``Bdist``/``Ddist`` are set for a discretised plant whose input disturbance reaches the
    plant through fewer delays than the controller output.
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: float
    zeros: np.ndarray
    poles: np.ndarray
    gain: float
    dt: Any
    Bdist: np.ndarray | None = None
    Ddist: float | None = None

    @property
    def order(self) -> int:
        return self.A.shape[0]

    @property
    def B_d(self) -> np.ndarray:
        """Input matrix of the plant-input disturbance (``B`` unless delays differ)."""
        return self.B if self.Bdist is None else self.Bdist

    @property
    def D_d(self) -> float:
        """Feedthrough of the plant-input disturbance (``D`` unless delays differ)."""
        return self.D if self.Ddist is None else self.Ddist

    def parts(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Numerator (gain included) and denominator products at complex points ``x``."""
        x = np.asarray(x, dtype=complex)
        num = np.prod(x[None, :] - self.zeros[:, None], axis=0) if self.zeros.size \
            else np.ones_like(x)
        den = np.prod(x[None, :] - self.poles[:, None], axis=0) if self.poles.size \
            else np.ones_like(x)
        return self.gain * num, den

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Evaluate at complex points ``x`` (s or z); ``inf`` exactly at a pole."""
        num, den = self.parts(x)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(den == 0, complex(np.inf, 0.0), num / np.where(den == 0, 1, den))


def _balance(A, B, C):
    """Diagonal state scaling that balances ``[[A, B], [C, 0]]`` (transfer function unchanged).

    Canonical realisations of plants with widely spread time constants have entries many
    orders of magnitude apart, which makes closed-loop equilibria needlessly ill-conditioned.
    """
    n = A.shape[0]
    if n == 0:
        return A, B, C
    B2 = B.reshape(n, -1)
    k = B2.shape[1]
    M = np.zeros((n + k, n + k))
    M[:n, :n], M[:n, n:], M[n, :n] = A, B2, C
    _, (scale, _) = scipy.linalg.matrix_balance(M, permute=False, separate=True)
    t = scale[:n] / scale[n]
    return A * t[None, :] / t[:, None], (B2 / t[:, None]).reshape(B.shape), C * t


def make_block(sys, role: str) -> Block:
    """Check one python-control SISO system and return it as a :class:`Block`.

    Raises
    ------
    ModelError
        Not a SISO LTI, non-finite coefficients, or improper (``role`` names the block).
    """
    if isinstance(sys, (int, float, np.integer, np.floating)):
        sys = control.tf(float(sys), 1)
    if not isinstance(sys, (control.TransferFunction, control.StateSpace)):
        raise ModelError(f"{role} is a {type(sys).__name__}, not a python-control "
                         "TransferFunction or StateSpace; give an LTI model")
    if sys.ninputs != 1 or sys.noutputs != 1:
        raise ModelError(f"{role} has {sys.ninputs} inputs and {sys.noutputs} outputs; "
                         "only SISO blocks are supported")
    if isinstance(sys, control.TransferFunction):
        num, den = _trim(sys.num[0][0]), _trim(sys.den[0][0])
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))) or not np.any(den):
            raise ModelError(f"{role} has non-finite or zero coefficients; fix the model")
        if num.size > den.size:
            raise ModelError(f"{role} is improper (more zeros than poles); an ideal "
                             "derivative needs a derivative filter, e.g. s/(T s + 1)")
        # controllable canonical form (the realisation python-control makes without
        # slycot), built here: the python-control object costs ~0.5 ms per block
        if den.size == 1:
            A, B, C = np.zeros((0, 0)), np.zeros(0), np.zeros(0)
            D = float(num[0] / den[0])
        else:
            try:
                A, B2, C2, D2 = scipy.signal.tf2ss(num, den)
            except ValueError as e:
                raise ModelError(f"{role} cannot be realised in state space: {e}") from e
            n = A.shape[0]
            A = np.asarray(A, dtype=float).reshape(n, n)
            B = np.asarray(B2, dtype=float).reshape(n)
            C = np.asarray(C2, dtype=float).reshape(n)
            D = float(np.asarray(D2, dtype=float).reshape(-1)[0])
    else:
        ss = sys
        if not all(np.all(np.isfinite(M)) for M in (ss.A, ss.B, ss.C, ss.D)):
            raise ModelError(f"{role} has non-finite matrix entries; fix the model")
        num = den = None
        A = np.asarray(ss.A, dtype=float).reshape(ss.nstates, ss.nstates)
        B = np.asarray(ss.B, dtype=float).reshape(ss.nstates)
        C = np.asarray(ss.C, dtype=float).reshape(ss.nstates)
        D = float(np.asarray(ss.D, dtype=float).reshape(-1)[0])
    A, B, C = _balance(A, B, C)
    if A.shape[0] == 0:
        dt = "any"
    elif sys.dt is None or sys.dt == 0:
        dt = None
    else:
        dt = sys.dt
    if num is None:
        zeros, poles, gain = _zpk_from_ss(A, B, C, D)
    elif not np.any(num):
        zeros, poles, gain = np.zeros(0, complex), np.zeros(0, complex), 0.0
    else:
        zeros = np.roots(num).astype(complex)
        poles = np.roots(den).astype(complex)
        gain = float(num[0] / den[0])
    return Block(A, B, C, D, zeros, poles, gain, dt)


def _batch_roots(P: np.ndarray) -> np.ndarray:
    """Roots of the polynomials in the rows of ``P`` (V, k), as ``numpy.roots`` gives them.

    Every row must have a nonzero leading coefficient and the same number of trailing zeros
    (``numpy.roots`` returns those as roots at 0, last).  The companion matrices are the ones
    ``numpy.roots`` builds and their eigenvalues are found in one stacked LAPACK call.
    """
    V, k = P.shape
    nz = np.flatnonzero(P[0] != 0.0)
    trailing = k - 1 - int(nz[-1])
    p = P[:, :k - trailing]
    N = p.shape[1]
    if N > 1:
        comp = np.zeros((V, N - 1, N - 1))
        idx = np.arange(N - 2)
        comp[:, idx + 1, idx] = 1.0
        comp[:, 0, :] = -p[:, 1:] / p[:, :1]
        roots = np.linalg.eigvals(comp).astype(complex)
    else:
        roots = np.zeros((V, 0), complex)
    return np.concatenate([roots, np.zeros((V, trailing), complex)], axis=1)


def _balance_batch(A, B, C):
    """:func:`_balance` for a stack of realisations (V, n, n), (V, n), (V, n).

    The balancing scale (powers of two) is computed once per pattern of binary exponents and
    zeros of ``[[A, B], [C, 0]]`` (:func:`~ledger.engine.timegrid.balance_scales`) and applied
    to every realisation with that pattern; powers of two scale exactly, so each result is an
    exact similarity of its input.
    """
    V, n = B.shape
    M = np.zeros((V, n + 1, n + 1))
    M[:, :n, :n], M[:, :n, n], M[:, n, :n] = A, B, C
    scale = balance_scales(M)
    t = scale[:, :n] / scale[:, n:]
    return A * t[:, None, :] / t[:, :, None], B / t, C * t


def _tf_coefficients(sys):
    """(num, den) trimmed, when ``sys`` is a SISO TransferFunction the batched realisation
    handles exactly like :func:`make_block`; else ``None``."""
    if not isinstance(sys, control.TransferFunction) or sys.ninputs != 1 or sys.noutputs != 1:
        return None
    num, den = _trim(sys.num[0][0]), _trim(sys.den[0][0])
    if (den.size < 2 or num.size > den.size or not np.any(num)
            or not (np.all(np.isfinite(num)) and np.all(np.isfinite(den)))
            or not abs(num[0] / den[0]) > 1e-14):
        return None
    return num, den


def _shape_key(num, den):
    """(coefficient counts, trailing zeros) of a trimmed numerator and denominator."""
    return (num.size, den.size, num.size - 1 - int(np.flatnonzero(num)[-1]),
            den.size - 1 - int(np.flatnonzero(den)[-1]))


def make_blocks(systems, roles) -> list:
    """:func:`make_block` for many systems at once (the same blocks; a system it refuses
    raises its error, though with several bad systems not necessarily the first one's).

    SISO transfer functions that share numerator and denominator lengths and trailing zeros
    (the variants of one parametric family) are realised together: controllable canonical
    form from the stacked coefficients, roots from stacked companion matrices, one balancing
    per exponent pattern (see :func:`_balance_batch`).  Everything else goes through
    :func:`make_block` one by one.

    Parameters
    ----------
    systems : sequence of control.LTI or float
    roles : sequence of str
        Names of the blocks for error messages.

    Returns
    -------
    list of Block
    """
    out: list = [None] * len(systems)
    # raw coefficient rows of the SISO transfer functions, by coefficient counts
    raw: dict = {}
    for i, sys in enumerate(systems):
        if isinstance(sys, control.TransferFunction) and sys.ninputs == 1 \
                and sys.noutputs == 1:
            num, den = sys.num[0][0], sys.den[0][0]
            raw.setdefault((np.size(num), np.size(den)), []).append((i, num, den))
        else:
            out[i] = make_block(sys, roles[i])
    shapes: dict = {}
    for (m, k), items in raw.items():
        idx = np.array([it[0] for it in items])
        with np.errstate(all="ignore"):
            num = np.array([np.ravel(it[1]) for it in items], dtype=float).reshape(len(items), m)
            den = np.array([np.ravel(it[2]) for it in items], dtype=float).reshape(len(items), k)
            # rows the batched path takes as they are: already trimmed (nonzero leading
            # coefficients), finite, proper, dynamic, numerator not negligible
            fast = (np.all(np.isfinite(num), axis=1) & np.all(np.isfinite(den), axis=1)
                    & (num[:, 0] != 0) & (den[:, 0] != 0) & (k >= 2) & (m <= k)
                    & (np.abs(num[:, 0] / den[:, 0]) > 1e-14))
        for r in np.flatnonzero(~fast):
            i = int(idx[r])
            nd = _tf_coefficients(systems[i])
            if nd is None:
                out[i] = make_block(systems[i], roles[i])
            else:
                shapes.setdefault(_shape_key(*nd), []).append(([i], nd[0], nd[1]))
        if not fast.any():
            continue
        nf, df, ids = num[fast], den[fast], idx[fast]
        tz_n = np.argmax(nf[:, ::-1] != 0, axis=1)        # trailing zeros of each row
        tz_d = np.argmax(df[:, ::-1] != 0, axis=1)
        for a, b in sorted(set(zip(tz_n.tolist(), tz_d.tolist()))):
            sel = np.flatnonzero((tz_n == a) & (tz_d == b))
            shapes.setdefault((m, k, a, b), []).append((ids[sel], nf[sel], df[sel]))
    for (m, k, _tn, _td), parts in shapes.items():
        order = np.concatenate([np.atleast_1d(p[0]) for p in parts]).astype(int)
        num = np.concatenate([np.reshape(p[1], (-1, m)) for p in parts])
        den = np.concatenate([np.reshape(p[2], (-1, k)) for p in parts])
        V = order.size
        d0 = den[:, :1]
        numn, denn = num / d0, den / d0
        nump = np.zeros((V, k))
        nump[:, k - m:] = numn
        n = k - 1
        A = np.zeros((V, n, n))
        A[:, 0, :] = -denn[:, 1:]
        j = np.arange(n - 1)
        A[:, j + 1, j] = 1.0
        B = np.zeros((V, n))
        B[:, 0] = 1.0
        C = nump[:, 1:] - nump[:, :1] * denn[:, 1:]
        D = nump[:, 0]
        A, B, C = _balance_batch(A, B, C)
        zeros, poles = _batch_roots(num), _batch_roots(den)
        gains = num[:, 0] / den[:, 0]
        for r, i in enumerate(order.tolist()):
            dt = systems[i].dt
            out[i] = Block(A[r], B[r], C[r], float(D[r]), zeros[r], poles[r], float(gains[r]),
                           None if (dt is None or dt == 0) else dt)
    return out


def _zpk_from_ss(A, B, C, D, *, rel_tol: float = 1e-10):
    """Zeros, poles and gain of a SISO state-space model without forming polynomials.

    Poles are the eigenvalues of ``A``; zeros the finite generalised eigenvalues of the
    system pencil ``([[A, B], [C, D]], [[I, 0], [0, 0]])`` (Emami-Naeini and Van Dooren,
    Automatica 1982); the gain is the first non-zero Markov parameter ``C A^(r-1) B``
    (``D`` when ``r = 0``) with ``r`` the relative degree.  Converting to a transfer
    function instead leaves round-off in the leading numerator coefficients, which turns
    into spurious zeros far away.
    """
    n = A.shape[0]
    poles = np.linalg.eigvals(A).astype(complex) if n else np.zeros(0, complex)
    if n == 0:
        return np.zeros(0, complex), poles, float(D)
    M = np.zeros((n + 1, n + 1))
    M[:n, :n], M[:n, n], M[n, :n], M[n, n] = A, B, C, D
    N = np.zeros((n + 1, n + 1))
    N[:n, :n] = np.eye(n)
    alpha, beta = scipy.linalg.eigvals(M, N, homogeneous_eigvals=True)
    scale = max(1.0, float(np.max(np.abs(M))))
    finite = np.abs(beta) > rel_tol * np.abs(alpha) / scale
    zeros = (alpha[finite] / beta[finite]).astype(complex)
    if zeros.size > n:  # the whole pencil is singular: zero transfer function
        return np.zeros(0, complex), np.zeros(0, complex), 0.0
    r = n - zeros.size
    if r == 0:
        gain = float(D)
    else:
        v = B.copy()
        for _ in range(r - 1):
            v = A @ v
        gain = float(C @ v)
    if gain == 0.0:
        return np.zeros(0, complex), np.zeros(0, complex), 0.0
    return zeros, poles, gain


def _block_from_matrices(A, B2, C, D2, dt) -> Block:
    """Discrete plant block from matrices with inputs (controller output, disturbance)."""
    ss = control.ss(A, B2[:, :1], np.reshape(C, (1, -1)), D2[0], dt)
    zpk = make_block(ss, "discretised plant")
    Ab, Bb, Cb = _balance(np.asarray(A, float), np.asarray(B2, float), np.asarray(C, float))
    return Block(Ab, Bb[:, 0].copy(), Cb, float(D2[0]), zpk.zeros, zpk.poles, zpk.gain, dt,
                 Bdist=Bb[:, 1].copy(), Ddist=float(D2[1]))


# --------------------------------------------------------------------------- assembly

@dataclass(frozen=True, eq=False)
class ClosedLoopResponse:
    """Exact frequency response of one closed-loop function (S, T, CS or PS) over a group.

    ``evaluate(w) -> complex (V, len(w))``; ``poles``/``zeros`` per variant for gridding
    (s-plane or z-plane like :class:`~ledger.engine.types.FreqBatch`).
    """

    evaluate: Callable[[np.ndarray], np.ndarray]
    dt: float | None
    poles: list
    zeros: list


@dataclass(frozen=True, eq=False)
class LoopGroup:
    """Variants that share a state dimension and a loop delay, batched together.

    Attributes
    ----------
    index : ndarray of int
        Positions of these variants in the family.
    tau : float
        Loop delay in s (0 for digital loops, where delays are in the state).
    paths : dict[str, SSBatch]
        Closed-loop batches keyed by :data:`PATHS`.
    loop_gain : FreqBatch
        L = C G H e^{-s tau}.
    closed : dict[str, ClosedLoopResponse]
        ``"S"``, ``"T"``, ``"CS"``, ``"PS"``.
    poles : list of ndarray or None
        Closed-loop poles per variant (delay-free loops), else ``None``.
    prefilter_poles : ndarray
        Poles of the prefilter (outside the loop, but on the r paths).
    blocks : tuple
        ``(controller Block, list of plant Blocks, sensor Block)``.
    """

    index: np.ndarray
    tau: float
    paths: dict
    loop_gain: FreqBatch
    closed: dict
    poles: list | None
    prefilter_poles: np.ndarray
    blocks: tuple = field(repr=False, default=())


@dataclass(frozen=True, eq=False)
class Assembly:
    """A controller closed round every variant of a family.

    Attributes
    ----------
    variants : tuple of str
        Variant names in family order.
    dt : float or None
        Sample time of the loop (None: continuous).
    loop : LoopSpec
    groups : tuple of LoopGroup
    """

    variants: tuple
    dt: float | None
    loop: LoopSpec
    groups: tuple

    def scatter(self, per_group: list) -> np.ndarray:
        """Put per-group (V_g,) arrays back into one (V,) array in family order."""
        out = np.empty(len(self.variants), dtype=np.asarray(per_group[0]).dtype)
        for g, vals in zip(self.groups, per_group):
            out[g.index] = vals
        return out


def _prepare_controller(controller, loop: LoopSpec) -> Block:
    ts = loop.sample_time
    if isinstance(controller, (control.TransferFunction, control.StateSpace)):
        cdt = controller.dt
        if ts is not None and (cdt is None or cdt == 0) and _order(controller) > 0:
            if loop.controller_discretization == "tustin":
                _ = make_block(controller, "controller")  # properness check first
                controller = control.sample_system(controller, ts, method="tustin")
            else:
                raise ModelError("controller is continuous but the loop is digital "
                                 f"(sample_time={ts} s); give it in z with that dt or set "
                                 "controller_discretization='tustin'")
        elif ts is None and cdt not in (None, 0):
            raise ModelError(f"controller is discrete (dt={cdt} s) but the loop is continuous; "
                             "set sample_time to the controller's dt")
        elif ts is not None and cdt not in (None, 0, True) and not math.isclose(cdt, ts):
            raise ModelError(f"controller dt={cdt} s differs from the loop sample_time={ts} s; "
                             "use one sample time")
    blk = make_block(controller, "controller")
    return blk


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


def _interconnect(F: Block, K: Block, Gs: list, H: Block):
    """Rows over the basis [x (N), r, d, n, w] of every loop signal, delay cut at ym, for the
    plants ``Gs`` (blocks of one order) at once.

    Returns ``(N, nf, xdot rows (V, N, N+4), signals dict of rows (V, N+4))``.
    """
    nf, nc, nh = F.order, K.order, H.order
    ng = Gs[0].order
    V = len(Gs)
    N = nf + nc + ng + nh
    of, oc, og, oh = 0, nf, nf + nc, nf + nc + ng
    ir, idd, inn, iw = N, N + 1, N + 2, N + 3
    GA = np.stack([G.A for G in Gs]).reshape(V, ng, ng)
    GB = np.stack([G.B for G in Gs]).reshape(V, ng)
    GBd = np.stack([G.B_d for G in Gs]).reshape(V, ng)
    GC = np.stack([G.C for G in Gs]).reshape(V, ng)
    GD = np.array([G.D for G in Gs], dtype=float)
    GDd = np.array([G.D_d for G in Gs], dtype=float)

    ym = np.zeros(N + 4)
    ym[oh:oh + nh] = H.C
    ym[iw] = H.D
    ym[inn] = 1.0
    e = np.zeros(N + 4)
    e[of:of + nf] = F.C
    e[ir] = F.D
    e -= ym
    u = K.D * e
    u[oc:oc + nc] += K.C
    y = GD[:, None] * u[None, :]
    y[:, idd] += GDd
    y[:, og:og + ng] += GC
    X0 = np.zeros((N, N + 4))
    X0[of:of + nf, of:of + nf] = F.A
    X0[of:of + nf, ir] = F.B
    X0[oc:oc + nc, :] = np.outer(K.B, e)
    X0[oc:oc + nc, oc:oc + nc] += K.A
    X0[oh:oh + nh, iw] = H.B
    X0[oh:oh + nh, oh:oh + nh] += H.A
    X = np.repeat(X0[None], V, axis=0)
    X[:, og:og + ng, :] = GB[:, :, None] * u[None, None, :]
    X[:, og:og + ng, idd] += GBd
    X[:, og:og + ng, og:og + ng] += GA
    return N, nf, X, {"y": y, "e": np.repeat(e[None], V, axis=0),
                      "u": np.repeat(u[None], V, axis=0)}


def _close(rows: np.ndarray, z: np.ndarray, N: int, *, algebraic_tol: float):
    """Substitute w = z (no delay) into rows (V, R, N+4) over [x, r, d, n, w]; z (V, N+4)."""
    denom = 1.0 - z[:, N + 3]
    if np.any(np.abs(denom) < algebraic_tol):
        raise ModelError("algebraic loop: 1 + D_C D_G D_H = 0 (the loop has no dynamics at "
                         "infinite frequency); add a pole or change a feedthrough")
    sub = z.copy()
    sub[:, N + 3] = 0.0
    sub /= denom[:, None]
    out = rows + rows[..., N + 3][..., None] * sub[:, None, :]
    out[..., N + 3] = 0.0
    return out


def _group_matrices(F, K, Gs, H, tau: float, *, algebraic_tol: float):
    N, nf, X, sig = _interconnect(F, K, Gs, H)
    z = sig["y"]
    if tau == 0.0:
        Xc = _close(X, z, N, algebraic_tol=algebraic_tol)
        sigc = {k: _close(v[:, None, :], z, N, algebraic_tol=algebraic_tol)[:, 0]
                for k, v in sig.items()}
        return N, nf, Xc, sigc, z
    if np.any(np.abs(z[:, N + 3]) >= 1.0):
        raise ModelError("the delayed loop has |D_C D_G D_H| >= 1 (a neutral delay system); "
                         "make the loop gain roll off at high frequency")
    return N, nf, X, sig, z


#: Frequency points a grid gains per lightly damped plant pole or zero pair of one variant
#: (41 across the resonance width plus 2 x 11 approaching its damped frequency, see
#: :func:`~ledger.engine.freqresp.frequency_grid`).
_POINTS_PER_RESONANCE = 63
#: Most resonance points a group's shared grid may carry: groups of resonant variants hold at
#: most ``_RESONANCE_BUDGET // (_POINTS_PER_RESONANCE * pairs)`` variants, so the grid of a
#: group (the union over its variants) stays a few thousand points whatever the family size.
_RESONANCE_BUDGET = 3000
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
    the most lightly damped pairs of one variant), because a group's frequency grid carries
    every member's resonance points and would otherwise grow with the family.  The grouping
    depends only on the family, never on how its groups are later processed (one by one,
    streamed, or in worker processes), so every way gives the same numbers.

    The plant blocks are checked (and their resonances read) in chunks of ``chunk`` variants
    and dropped; :meth:`Plan.build` makes them again group by group, so memory stays bounded.
    """
    loop = loop or LoopSpec()
    if not isinstance(family, PlantFamily):
        family = PlantFamily.single(family)
    ts = loop.sample_time
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
            for s0 in range(0, srt.size, c):
                groups.append(GroupPlan(np.sort(srt[s0:s0 + c]), tau, d_in, d_plant))
    return Plan(family=family, loop=loop, blocks=(F, K, H), groups=tuple(groups),
                algebraic_tol=algebraic_tol, variants=family.names)


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


def _root_product(x: np.ndarray, R: np.ndarray) -> np.ndarray:
    """``prod_k (x - R[:, k])`` for every row of ``R`` (V, m) at every point of ``x``: (V, len(x)).

    Multiplied factor by factor in the order of the roots, the same operations and order as
    ``numpy.prod(x - R[:, :, None], axis=1)`` without its (V, m, len(x)) temporary."""
    V, m = R.shape
    if m == 0:
        return np.ones((V, x.size), complex)
    out = x[None, :] - R[:, :1]
    for k in range(1, m):
        out *= x[None, :] - R[:, k:k + 1]
    return out


def _build_group(idx, Gs, F, K, H, tau, d_in, d_plant, ts, algebraic_tol) -> LoopGroup:
    N, nf, X, sig, zr = _group_matrices(F, K, Gs, H, tau, algebraic_tol=algebraic_tol)
    col = {"r": N, "d": N + 1, "n": N + 2}
    io = {"r->y": d_in + d_plant, "d->y": d_plant}
    V = len(Gs)
    paths = {}
    for name in PATHS:
        src, dst = _PATH_IO[name]
        keep = np.arange(N) if src == "r" else np.arange(nf, N)  # prefilter unreachable from d, n
        A = X[:, keep][:, :, keep]
        B = X[:, keep, col[src]]
        Cr = sig[dst][:, keep]
        Dv = sig[dst][:, col[src]]
        if tau > 0:
            paths[name] = SSBatch(A=A, B=B, C=Cr, D=Dv, dt=ts, tau=tau,
                                  Bw=X[:, keep, N + 3], Cz=zr[:, keep], Dz=zr[:, col[src]],
                                  Dw=sig[dst][:, N + 3], Dzw=zr[:, N + 3],
                                  io_delay=io.get(name, 0.0))
        else:
            z0 = np.zeros((V, keep.size))
            paths[name] = SSBatch(A=A, B=B, C=Cr, D=Dv, dt=ts, tau=0.0, Bw=z0, Cz=z0.copy(),
                                  Dz=np.zeros(V), Dw=np.zeros(V), Dzw=np.zeros(V),
                                  io_delay=io.get(name, 0.0))
    loop_poles = None
    if tau == 0:
        Aloop = X[:, nf:N, nf:N]
        ev = np.linalg.eigvals(Aloop) if Aloop.shape[1] else np.zeros((V, 0))
        # as one eigvals call per matrix gives them: real when every imaginary part is zero
        loop_poles = [e.real if not np.any(e.imag) else e for e in ev] \
            if np.iscomplexobj(ev) else list(ev)
    same_shape = len({(G.zeros.size, G.poles.size) for G in Gs}) == 1

    def joined(first, plant, last):
        """Per variant: first block's roots, the plant's (``"poles"``/``"zeros"``), last's."""
        if same_shape:
            R = np.stack([getattr(G, plant) for G in Gs]).astype(complex)
            V_ = R.shape[0]
            full = np.concatenate([np.broadcast_to(first.astype(complex), (V_, first.size)), R,
                                   np.broadcast_to(last.astype(complex), (V_, last.size))],
                                  axis=1)
            return list(full)
        return [np.concatenate([first, getattr(G, plant), last]) for G in Gs]

    ol_poles = joined(K.poles, "poles", H.poles)
    ol_zeros = joined(K.zeros, "zeros", H.zeros)
    point = (lambda w: np.exp(1j * np.asarray(w, float) * ts)) if ts else \
        (lambda w: 1j * np.asarray(w, dtype=float))

    if same_shape:
        Zs = np.stack([G.zeros for G in Gs])      # (V, nz)
        Ps = np.stack([G.poles for G in Gs])      # (V, np)
        gains = np.array([G.gain for G in Gs])

    def plant_parts(x):
        """Plant numerator and denominator products (V, len(x)), vectorised when possible."""
        if not same_shape:
            ng, dg = zip(*(G.parts(x) for G in Gs))
            return np.stack(ng), np.stack(dg)
        return gains[:, None] * _root_product(x, Zs), _root_product(x, Ps)


    memo: dict = {}

    def parts(w):
        """Numerator and denominator of L per variant, block by block, delay in the numerator
        (the last few grids are remembered: L, S, T and the refinements of each start from
        the same grid)."""
        w = np.asarray(w, dtype=float)
        key = w.tobytes()
        hit = memo.get(key)
        if hit is None:
            hit = _parts(w)
            if len(memo) >= 4:
                memo.pop(next(iter(memo)))
            memo[key] = hit
        return hit

    def _parts(w):
        x = point(w)
        nk, dk = K.parts(x)
        nh, dh = H.parts(x)
        ng, dg = plant_parts(x)
        num = ng * (nk * nh)[None, :]
        if tau > 0:
            num = num * np.exp(-1j * np.asarray(w, float) * tau)[None, :]
        return num, dg * (dk * dh)[None, :], (nk, dk), (ng, dg)

    def _ratio(a, b):
        zero = b == 0
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if not zero.any():
                return a / b
            return np.where(zero, complex(np.inf, 0.0), a / np.where(zero, 1, b))

    def L_of(w):
        num, den, _, _ = parts(w)
        return _ratio(num, den)

    def S_of(w):
        num, den, _, _ = parts(w)
        return _ratio(den, den + num)

    def T_of(w):
        num, den, _, _ = parts(w)
        return _ratio(num, den + num)

    def CS_of(w):
        num, den, (nk, dk), _ = parts(w)
        return _ratio(den / dk[None, :] * nk[None, :], den + num)

    def PS_of(w):
        num, den, _, (ng, dg) = parts(w)
        return _ratio(den / dg * ng, den + num)

    origin = 1.0 if ts else 0.0
    dc = np.empty(V, dtype=complex)
    if same_shape and ol_poles[0].size:
        P = np.stack(ol_poles)
        at_origin = (np.min(np.abs(P - origin), axis=1)
                     < 1e-9 * np.maximum(1.0, np.max(np.abs(P), axis=1)))
    else:
        at_origin = np.array([bool(p.size) and bool(
            np.min(np.abs(p - origin)) < 1e-9 * max(1.0, np.max(np.abs(p)))) for p in ol_poles],
            dtype=bool).reshape(V)
    dc[at_origin] = complex(np.inf, 0.0)
    if not at_origin.all():
        dc[~at_origin] = L_of(np.array([0.0]))[~at_origin, 0]
    cl_poles = loop_poles if loop_poles is not None else \
        [np.concatenate([p, z]) for p, z in zip(ol_poles, ol_zeros)]
    closed = {
        "S": ClosedLoopResponse(S_of, ts, cl_poles, ol_poles),
        "T": ClosedLoopResponse(T_of, ts, cl_poles, ol_zeros),
        "CS": ClosedLoopResponse(CS_of, ts, cl_poles,
                                 joined(K.zeros, "poles", H.poles)),
        "PS": ClosedLoopResponse(PS_of, ts, cl_poles,
                                 joined(K.poles, "zeros", H.poles)),
    }
    fb = FreqBatch(evaluate=L_of, dt=ts, poles=ol_poles, zeros=ol_zeros, dc=dc)
    return LoopGroup(index=idx, tau=float(tau), paths=paths, loop_gain=fb, closed=closed,
                     poles=loop_poles, prefilter_poles=F.poles, blocks=(K, Gs, H))
