"""The range of numbers a model may hold, checked when a model is recorded.

Double precision holds numbers up to about 1.8e308, but a model near that edge is not
representable in any useful sense: normalising ``1e308*s/(1e-308*s+1)`` overflows, and a
zero at ``-1e308`` rad/s puts the frequency grid's upper end at infinity.  So the ledger
refuses, when a plant, loop filter or controller is recorded:

* a number in the model text, or a parameter value (nominal, bound, tolerance), whose
  magnitude exceeds :data:`NUMBER_RANGE`;
* an evaluated model (each variant of a plant family) with a pole, a zero or a gain (the
  leading numerator coefficient once the denominator is monic) whose magnitude exceeds
  :data:`ROOT_RANGE`, or with a coefficient that is not finite.

Both bounds are 1e100, far beyond any physical rate in rad/s (or any z-plane radius) and
far enough below the float limit that products of two bounded numbers stay finite.  A
sample generator seed is a whole number in ``[0, SEED_MAX]`` (NumPy takes non-negative seeds;
the database column is a signed 64-bit integer).  See docs/models.md ("Representable range").
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from ledger.errors import ModelError

__all__ = ["NUMBER_RANGE", "ROOT_RANGE", "SEED_MAX", "check_number", "check_seed",
           "check_system", "check_family", "check_model"]

NUMBER_RANGE = 1e100
"""Largest magnitude of a number in model text or of a parameter value."""

ROOT_RANGE = 1e100
"""Largest magnitude of a pole, zero or gain of an evaluated model (rad/s, or z-plane radius)."""

SEED_MAX = 2 ** 63 - 1
"""Largest sample-generator seed."""


def check_number(what: str, value) -> float:
    """``value`` as a float when it is a finite real number of magnitude <= NUMBER_RANGE.

    Raises
    ------
    ModelError
        Not a number, not finite, too large (also for integers too large for a float).
    """
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.integer, np.floating)):
        raise ModelError(f"{what} must be a number, got {value!r}")
    try:
        x = float(value)
    except OverflowError:
        x = math.inf
    if math.isnan(x):
        raise ModelError(f"{what} must be finite, got {value!r}")
    if not abs(x) <= NUMBER_RANGE:
        shown = f"{value:.3g}" if isinstance(value, float) else _short(value)
        raise ModelError(f"{what} must be finite and at most 1e100 in magnitude, "
                         f"got {shown}; rescale (choose other units)")
    return x


def _short(value) -> str:
    text = str(value)
    return text if len(text) <= 24 else f"a number of {len(text)} digits"


def check_seed(value, what: str = "seed") -> int:
    """A sample-generator seed: a whole number in ``[0, SEED_MAX]``."""
    if isinstance(value, bool) or not isinstance(value, (numbers.Integral, np.integer)):
        raise ModelError(f"{what} must be a whole number, got {value!r}")
    if not 0 <= int(value) <= SEED_MAX:
        raise ModelError(f"{what} must be between 0 and {SEED_MAX} (2^63 - 1), got "
                         f"{_short(int(value))}")
    return int(value)


def _fmt(r: complex) -> str:
    r = complex(r)
    return f"{r.real:.3g}" if r.imag == 0 else f"{r.real:.3g}{r.imag:+.3g}j"


def check_system(system, what: str = "the model") -> None:
    """Refuse a SISO system with a non-finite coefficient, or a pole, zero or gain beyond
    :data:`ROOT_RANGE`.

    Parameters
    ----------
    system : control.TransferFunction or control.StateSpace
    what : str
        Names the model (and variant) in the message.
    """
    import control

    with np.errstate(all="ignore"):
        if isinstance(system, control.StateSpace):
            mats = [np.asarray(m, dtype=float) for m in (system.A, system.B, system.C, system.D)]
            if not all(np.all(np.isfinite(m)) for m in mats):
                raise ModelError(f"{what}: a state-space matrix entry is not finite; rescale")
            big = max((float(np.max(np.abs(m))) for m in mats if m.size), default=0.0)
            if big > ROOT_RANGE:
                raise ModelError(f"{what}: a state-space matrix entry of magnitude {big:.3g} "
                                 f"exceeds 1e100; rescale (choose other units)")
            poles = np.linalg.eigvals(mats[0]) if mats[0].size else np.zeros(0)
            _check_roots(poles, "pole", what)
            return
        num = np.atleast_1d(np.asarray(system.num[0][0], dtype=float))
        den = np.atleast_1d(np.asarray(system.den[0][0], dtype=float))
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
            raise ModelError(f"{what}: a coefficient is not finite once the denominator is made "
                             f"monic (overflow); rescale the model or its parameters")
        num, den = np.trim_zeros(num, "f"), np.trim_zeros(den, "f")
        if den.size == 0:
            raise ModelError(f"{what}: the denominator is zero")
        lead = den[0]
        num, den = num / lead, den / lead
        if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
            raise ModelError(f"{what}: a coefficient is not finite once the denominator is made "
                             f"monic (overflow); rescale the model or its parameters")
        _check_roots(np.roots(den) if den.size > 1 else np.zeros(0), "pole", what)
        _check_roots(np.roots(num) if num.size > 1 else np.zeros(0), "zero", what)
        if num.size and abs(num[0]) > ROOT_RANGE:
            raise ModelError(f"{what}: gain {num[0]:.3g} exceeds 1e100 in magnitude; "
                             f"rescale (choose other units)")


def _check_roots(roots: np.ndarray, kind: str, what: str) -> None:
    if roots.size == 0:
        return
    mag = np.abs(roots)
    bad = ~(mag <= ROOT_RANGE)  # also catches NaN
    if np.any(bad):
        r = roots[np.argmax(np.where(np.isnan(mag), np.inf, mag))]
        raise ModelError(f"{what}: {kind} at {_fmt(r)} is beyond 1e100 in magnitude, "
                         f"not representable; rescale (choose other units)")


def check_family(family, what: str = "the model") -> None:
    """:func:`check_system` on every variant of a plant family (the variant is named)."""
    for v in family.variants:
        name = what if v.name == "nominal" and len(family.variants) == 1 \
            else f"{what} ({v.name})"
        check_system(v.system, name)


def check_model(model, what: str, sample_time: float | None = None) -> None:
    """:func:`check_system` on a compiled model without parameters (a controller or loop
    filter), evaluated as written; a parametric model is checked per variant of its plant
    family instead (:func:`check_family`).  Errors are prefixed with ``what``."""
    from ledger.errors import LedgerError

    if model.parameters:
        return
    try:
        check_system(model.evaluate(sample_time=sample_time).system, "model")
    except LedgerError as e:
        raise type(e)(f"{what}: {e}") from e
