"""The digital form of a controller revision: discretisation method, number format and the
discrete controller actually verified (docs/digital.md).

A revision keeps the controller as it was designed (``controller_text``, in ``s`` or ``z``).
On a digital loop it may also name the method that turns a continuous design into the one
that runs (:mod:`ledger.engine.c2d`) and the number format its coefficients are stored in
(:mod:`ledger.engine.quantize`).  The discrete controller that verification uses is then
written out as a difference equation (``diffeq([b0, ...], [a1, ...])``, every coefficient in
Python's shortest round-trip form, so the text is the exact double-precision controller) and
kept beside the design as ``verified_text``.  It is empty when the entered text is itself
what is verified.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import LedgerError, ModelError, with_context

__all__ = ["DigitalForm", "digital_form", "diffeq_text", "continuous_review",
           "method_description"]


@dataclass(frozen=True)
class DigitalForm:
    """What a revision stores beside its controller text (all ``""`` when not digital)."""

    discretization: str = ""
    number_format: str = ""
    verified_text: str = ""


def diffeq_text(system) -> str:
    """``diffeq([b0..bn], [a1..an])`` text of a discrete SISO system (exact float repr).

    Convention: ``y[k] = b0 u[k] + ... + bn u[k-n] - a1 y[k-1] - ... - an y[k-n]``.
    """
    import control

    if isinstance(system, control.StateSpace):
        system = control.ss2tf(system)
    num = np.trim_zeros(np.asarray(system.num[0][0], dtype=float), "f")
    den = np.trim_zeros(np.asarray(system.den[0][0], dtype=float), "f")
    if num.size == 0:
        num = np.zeros(1)
    num, den = num / den[0], den / den[0]
    n = den.size - 1
    b = np.concatenate([np.zeros(n + 1 - num.size), num]) if num.size <= n + 1 else num
    while b.size > 1 and b[-1] == 0.0 and b.size > n + 1:
        b = b[:-1]
    fmt = ", ".join
    return (f"diffeq([{fmt(repr(float(x)) for x in b)}], "
            f"[{fmt(repr(float(x)) for x in den[1:])}])")


def _evaluate(text: str, sample_time):
    from .systems import parse_model

    ev = parse_model(text, sample_time=sample_time)
    if ev.delay:
        raise ModelError("the controller text has a delay; give loop delays on the loop")
    return ev.system


def _is_continuous_dynamic(system) -> bool:
    import control

    if system.dt not in (None, 0):
        return False
    if isinstance(system, control.StateSpace):
        return system.nstates > 0
    return np.trim_zeros(np.asarray(system.den[0][0], dtype=float), "f").size > 1


def digital_form(controller: str, sample_time, *, discretization=None, number_format=None,
                 what: str = "controller") -> DigitalForm:
    """Check the digital settings of a controller text on a loop and make its verified form.

    Parameters
    ----------
    controller : str
        Controller model text (already checked by ``validate.model_canonical``).
    sample_time : float or None
        The loop's sample time; ``None`` for a continuous loop.
    discretization : str, optional
        Method text (``zoh``, ``tustin``, ``tustin@W``, ``tustin@FHz``, ``matched``).
    number_format : str, optional
        Number format of the coefficients (``fixed:W/F``, ``single``).

    Raises
    ------
    ModelError
        A method or format on a continuous loop, an unknown method or format, a continuous
        controller on a digital loop without a method, a coefficient that does not fit.
    """
    from .engine.c2d import discretize, parse_discretization

    try:
        method = parse_discretization(discretization or None)
        fmt = _number_format(number_format)
        if sample_time is None:
            if method is not None or fmt is not None:
                raise ModelError("the loop is continuous: a discretisation method or number "
                                 "format needs a digital loop (one with a sample time)")
            return DigitalForm()
        system = _evaluate(controller, sample_time)
        verified = ""
        if _is_continuous_dynamic(system):
            if method is None:
                raise ModelError(
                    f"the controller is continuous (in s) but the loop is digital (sample time "
                    f"{sample_time} s); name the discretisation method (zoh, tustin, "
                    "tustin@FREQ or matched; CLI --discretize) or give it in z")
            system = discretize(system, sample_time, method)
            verified = diffeq_text(system)
        if fmt is not None:
            from .engine.quantize import quantize_text

            verified = quantize_text(controller if not verified else verified, fmt,
                                     sample_time)
        return DigitalForm(discretization=method.text if method else "",
                           number_format=fmt.text if fmt else "", verified_text=verified)
    except LedgerError as e:
        raise with_context(e, what) from e


def _number_format(text):
    if text is None or (isinstance(text, str) and not text.strip()):
        return None
    from .engine.quantize import parse_number_format

    return parse_number_format(text)


def method_description(text: str) -> str:
    """Words for a stored method text (``""`` -> ``""``)."""
    from .engine.c2d import parse_discretization

    d = parse_discretization(text or None)
    return d.describe() if d else ""


def continuous_review(verified_or_controller: str, sample_time, discretization: str) -> str:
    """The continuous equivalent of the discrete controller under the recorded method, as
    a readable transfer function text, or ``""`` where it does not exist or no method is
    recorded (see :func:`ledger.engine.c2d.continuous_equivalent`)."""
    from .engine.c2d import continuous_equivalent

    if not discretization or sample_time is None:
        return ""
    try:
        system = _evaluate(verified_or_controller, sample_time)
    except LedgerError:
        return ""
    if system.dt in (None, 0):
        return ""
    sc = continuous_equivalent(system, discretization)
    if sc is None:
        return ""
    num = np.asarray(sc.num[0][0], dtype=float)
    den = np.asarray(sc.den[0][0], dtype=float)
    return f"({_poly(num)})/({_poly(den)})"


def _poly(p) -> str:
    p = np.trim_zeros(np.asarray(p, dtype=float), "f")
    scale = float(np.max(np.abs(p))) if p.size else 1.0
    n = p.size - 1
    terms = []
    for i, c in enumerate(p):
        k = n - i
        if c == 0.0 or abs(c) < 1e-12 * scale:
            continue
        mono = "" if k == 0 else ("*s" if k == 1 else f"*s^{k}")
        terms.append(f"{c:.7g}{mono}")
    return " + ".join(terms).replace("+ -", "- ") or "0"
