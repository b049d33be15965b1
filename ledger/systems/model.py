"""Compiled model text and its evaluation into python-control systems.

``compile_model`` parses once; the resulting :class:`Model` keeps parameters symbolic and
can be evaluated for one parameter set (a python-control system) or for a whole batch of
parameter sets at once (coefficient arrays, vectorised over variants).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from ledger.errors import ModelError, ModelSyntaxError
from ledger.systems.evaluator import _Eval, evaluate_tree
from ledger.systems.nodes import SS, Delay, Prod
from ledger.systems.parser import parse

__all__ = ["Model", "Evaluated", "compile_model", "parse_model", "normalise_rows"]


@dataclass(frozen=True)
class Evaluated:
    """A model evaluated at one parameter set.

    Parameters
    ----------
    system : control.TransferFunction or control.StateSpace
        SISO system; ``dt = 0`` for continuous time, ``dt = sample_time`` (s) for discrete.
        Transfer functions have a monic denominator and no leading zero coefficients.
    delay : float
        Pure (transport) delay in seconds from ``delay(...)`` factors, 0 if none.
    """

    system: Any
    delay: float = 0.0


def normalise_rows(num: np.ndarray, den: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Divide each row of ``num`` and ``den`` by that row's first non-zero ``den`` coefficient.

    Parameters
    ----------
    num, den : ndarray (V, k)
        Coefficients, highest power first; no row of ``den`` may be all zero.

    Returns
    -------
    num, den : ndarray (V, k)
        Same shapes; each denominator's leading non-zero coefficient is 1.
    """
    lead_idx = np.argmax(den != 0, axis=1)
    lead = den[np.arange(den.shape[0]), lead_idx][:, None]
    return num / lead, den / lead


def _param_values(names, params: Mapping[str, Any] | None, batch: bool):
    params = {} if params is None else params
    missing = sorted(n for n in names if n not in params)
    if missing:
        raise ModelError(f"parameter {missing[0]!r} has no value; give a value for "
                         f"{', '.join(missing)}")
    env = {}
    for n in sorted(names):
        raw = params[n]
        if isinstance(raw, (bool, np.bool_, str, bytes)):
            raise ModelError(f"parameter {n!r} must be a real number, not {raw!r}")
        try:
            arr = np.asarray(raw, dtype=float)
        except (TypeError, ValueError) as e:
            raise ModelError(f"parameter {n!r} must be a real number, not {raw!r}") from e
        if not batch and arr.ndim != 0:
            raise ModelError(f"parameter {n!r} must be a single number here, not an array")
        if batch and arr.ndim > 1:
            raise ModelError(f"parameter {n!r} must be a 1-D array of variant values")
        if not np.all(np.isfinite(arr)):
            raise ModelError(f"parameter {n!r} is not finite; give a finite value")
        env[n] = arr
    return env


@dataclass(frozen=True)
class Model:
    """Model text compiled once, parameters still symbolic.

    Parameters
    ----------
    text : str
        The text as typed.
    variable : str
        ``"z"`` when the text uses ``z``, else ``"s"`` (also for texts naming neither, such as
        ``zpk(...)``, ``ss(...)`` or a constant: those are continuous-time).
    parameters : frozenset of str
        Names that need values.
    canonical : str
        Whitespace-free text with every number in Python's shortest float repr, so that
        differently spaced or differently written numbers (``8``, ``8.0``, ``8e0``) agree.
    """

    text: str
    variable: str
    parameters: frozenset
    canonical: str
    tree: Any = field(default=None, repr=False, compare=False)

    @property
    def is_state_space(self) -> bool:
        """True for ``ss(...)`` models (optionally times delay factors)."""
        return self.tree.info.ss_pos >= 0

    def _dt(self, sample_time: float | None) -> float:
        """Sample time of the evaluated system: ``sample_time`` for z models, else 0."""
        if sample_time is not None:
            if isinstance(sample_time, bool) or not isinstance(sample_time, (int, float)) \
                    or not math.isfinite(sample_time) or sample_time <= 0:
                raise ModelError(f"sample_time must be a positive number of seconds, "
                                 f"got {sample_time!r}")
        if self.variable == "z":
            if sample_time is None:
                raise ModelError("a z model needs a sample time; give sample_time in seconds")
            return float(sample_time)
        # s models (and texts naming neither s nor z) are continuous-time; a sample time is
        # the loop's business (the engine discretises the continuous plant itself).
        return 0.0

    def evaluate(self, params: Mapping[str, float] | None = None, *,
                 sample_time: float | None = None) -> Evaluated:
        """Evaluate at one parameter set.

        Parameters
        ----------
        params : mapping of str to float, optional
            A value for every name in :attr:`parameters`; extra names are ignored.
        sample_time : float, optional
            Sample time in seconds; required for ``z`` models; not used by continuous-time
            models (``dt = 0``), so a loop may pass its sample time for every text.

        Returns
        -------
        Evaluated

        Raises
        ------
        ModelError
            Missing or non-finite parameter, bad sample time, division by zero, a block
            argument out of range, non-conjugate complex roots, overflow, zero denominator.
        """
        import control

        dt = self._dt(sample_time)
        env = _param_values(self.parameters, params, batch=False)
        env = {k: v.reshape(1) for k, v in env.items()}
        if self.is_state_space:
            return self._evaluate_ss(env, dt)
        num, den, delay = evaluate_tree(self.tree, env, 1, self.text)
        num, den = normalise_rows(num, den)
        n, d = np.trim_zeros(num[0], "f"), np.trim_zeros(den[0], "f")
        if n.size == 0:
            n = np.zeros(1)
        return Evaluated(control.tf(n, d, dt), float(delay[0]))

    def _evaluate_ss(self, env, dt) -> Evaluated:
        import control

        ev = _Eval(env, 1, self.text)
        tree = self.tree
        ss_node = tree
        if isinstance(tree, Prod):
            for _, f, _ in tree.factors:
                if isinstance(f, Delay):
                    ev.rat(f)
                elif isinstance(f, SS):
                    ss_node = f
        with np.errstate(all="ignore"):
            mats = [np.array([[ev.real_const(x, f"an entry of matrix {label}")[0] for x in row]
                              for row in m])
                    for label, m in zip("ABCD", (ss_node.a, ss_node.b, ss_node.c, ss_node.d))]
        return Evaluated(control.ss(*mats, dt), float(ev.delay[0]))

    def evaluate_batch(self, params: Mapping[str, np.ndarray] | None = None
                       ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Evaluate for V parameter sets at once, vectorised over the variant axis.

        Parameters
        ----------
        params : mapping of str to array_like (V,) or float
            Values per variant; scalars are broadcast.  V is the common array length
            (1 when every value is a scalar).

        Returns
        -------
        num, den : ndarray (V, k)
            Coefficients in s (or z), highest power first, each row divided by its leading
            non-zero denominator coefficient; both padded to the same length k with leading
            zeros.
        delay : ndarray (V,)
            Pure delay in seconds per variant.

        Raises
        ------
        ModelError
            For ``ss(...)`` models (evaluate those one at a time with :meth:`evaluate`), for
            arrays of different lengths, and as in :meth:`evaluate`.
        """
        if self.is_state_space:
            raise ModelError("evaluate_batch does not support ss(...) models; call evaluate "
                             "for each variant")
        env = _param_values(self.parameters, params, batch=True)
        lengths = {a.shape[0] for a in env.values() if a.ndim == 1}
        if len(lengths) > 1:
            raise ModelError(f"parameter arrays have different lengths {sorted(lengths)}; "
                             f"give one value per variant for every parameter")
        nvar = lengths.pop() if lengths else 1
        env = {k: np.broadcast_to(v, (nvar,)) for k, v in env.items()}
        num, den, delay = evaluate_tree(self.tree, env, nvar, self.text)
        num, den = normalise_rows(num, den)
        k = max(num.shape[1], den.shape[1])
        num = np.pad(num, ((0, 0), (k - num.shape[1], 0)))
        den = np.pad(den, ((0, 0), (k - den.shape[1], 0)))
        return num, den, delay


@functools.lru_cache(maxsize=512)
def _compile_cached(text: str) -> Model:
    r = parse(text)
    return Model(text=text, variable=r.variable, parameters=r.parameters,
                 canonical=r.canonical, tree=r.tree)


def compile_model(text: str) -> Model:
    """Parse model text once; parameters stay symbolic.

    Parameters
    ----------
    text : str
        Model text, e.g. ``"Kt/(s*(J*s+b))"`` or ``"pid(2, 5, 0.01, 0.001)*notch(377, 0.05, 0.7)"``.
        See ``docs/models.md`` for the grammar.

    Returns
    -------
    Model

    Raises
    ------
    ModelSyntaxError
        With the 0-based position of the offending character.
    """
    if not isinstance(text, str):
        raise ModelSyntaxError(f"model text must be a string, not {type(text).__name__}")
    return _compile_cached(text)


def parse_model(text: str, params: Mapping[str, float] | None = None, *,
                sample_time: float | None = None) -> Evaluated:
    """Compile and evaluate model text in one call.

    Parameters
    ----------
    text : str
        Model text.
    params : mapping of str to float, optional
        Parameter values.
    sample_time : float, optional
        Sample time in seconds, required for ``z`` models.

    Returns
    -------
    Evaluated

    Raises
    ------
    ModelSyntaxError, ModelError
    """
    return compile_model(text).evaluate(params, sample_time=sample_time)
