"""Properness test and a content digest of a numeric LTI system.

The digest is a cache key: equal for the same transfer function however it was typed
(spacing, number spelling, factored or expanded, zpk or tf form, scaled numerator and
denominator), different when any coefficient differs in its first 12 significant digits.
"""

from __future__ import annotations

import hashlib
import math

import numpy as np

from ledger.errors import ModelError

__all__ = ["is_proper", "system_digest", "tf_coefficients", "DIGEST_DIGITS"]

DIGEST_DIGITS = 12
"""Significant digits kept of each normalised coefficient before hashing."""


def tf_coefficients(system) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator of a SISO system, leading zeros removed, not normalised.

    Parameters
    ----------
    system : control.TransferFunction or control.StateSpace
        SISO system; a state-space system is converted with ``control.ss2tf``.

    Returns
    -------
    num, den : ndarray
        Real coefficients, highest power first.

    Raises
    ------
    ModelError
        Not a SISO python-control LTI system, or a zero denominator.
    """
    import control

    if isinstance(system, control.StateSpace):
        system = control.ss2tf(system)
    if not isinstance(system, control.TransferFunction):
        raise ModelError(f"expected a python-control TransferFunction or StateSpace, got "
                         f"{type(system).__name__}")
    if system.ninputs != 1 or system.noutputs != 1:
        raise ModelError("only single-input single-output systems are supported")
    num = np.trim_zeros(np.atleast_1d(np.asarray(system.num[0][0], dtype=float)), "f")
    den = np.trim_zeros(np.atleast_1d(np.asarray(system.den[0][0], dtype=float)), "f")
    if den.size == 0:
        raise ModelError("the system's denominator is zero")
    if num.size == 0:
        num = np.zeros(1)
    return num, den


def is_proper(system) -> bool:
    """Whether a SISO system is proper (numerator degree <= denominator degree).

    Parameters
    ----------
    system : control.TransferFunction or control.StateSpace
        State-space systems are always proper.

    Returns
    -------
    bool
        Degrees are counted after removing exactly-zero leading coefficients.
    """
    import control

    if isinstance(system, control.StateSpace):
        return True
    num, den = tf_coefficients(system)
    if not np.any(num):
        return True
    return num.size <= den.size


def _fmt(x: float) -> str:
    x = float(x) + 0.0  # turns -0.0 into 0.0
    return format(x, f".{DIGEST_DIGITS - 1}e")


def system_digest(system, delay: float = 0.0) -> str:
    """SHA-256 hex digest of a canonical numeric form of a SISO system and its delay.

    The canonical form is: transfer function with leading zeros removed and a monic
    denominator (a zero system becomes 0/1), each coefficient rounded to
    :data:`DIGEST_DIGITS` significant digits, the sample time (0 for continuous) and the
    delay in seconds.

    Parameters
    ----------
    system : control.TransferFunction or control.StateSpace
        SISO system.  State-space systems are converted with ``control.ss2tf``; round-off of
        that conversion can make their digest differ from the same system typed as a
        transfer function (a cache miss, never a false match).
    delay : float
        Pure delay in seconds, >= 0.

    Returns
    -------
    str
        64 hexadecimal characters.

    Raises
    ------
    ModelError
        Not a SISO LTI system, non-finite coefficients or delay.
    """
    num, den = tf_coefficients(system)
    if not (np.all(np.isfinite(num)) and np.all(np.isfinite(den))):
        raise ModelError("the system has non-finite coefficients")
    if not math.isfinite(delay) or delay < 0:
        raise ModelError(f"delay must be finite and >= 0 seconds, got {delay!r}")
    if not np.any(num):
        num, den = np.zeros(1), np.ones(1)
    else:
        num, den = num / den[0], den / den[0]
    dt = system.dt
    dt_text = "unspecified" if dt is True else _fmt(dt or 0.0)
    canon = "|".join([
        "siso-tf-v1",
        ",".join(_fmt(c) for c in num),
        ",".join(_fmt(c) for c in den),
        dt_text,
        _fmt(delay),
    ])
    return hashlib.sha256(canon.encode("ascii")).hexdigest()
