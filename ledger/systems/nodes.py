"""Syntax-tree nodes of model text, each with its static :class:`Info`.

Positions are 0-based indices into the model text.  Nodes are immutable.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Info", "Num", "Var", "Param", "Sum", "Prod", "Neg", "Pow", "Block", "Delay",
           "Zpk", "SS", "Coeffs"]


@dataclass(frozen=True)
class Info:
    """Static facts of a node: coefficient counts and what it contains.

    ``dynamic`` is true when the value depends on the Laplace/z variable (including blocks,
    ``zpk`` and ``ss``); ``delay_pos``/``ss_pos`` give the position of a contained
    ``delay``/``ss`` call or -1.
    """

    nlen: int = 1
    dlen: int = 1
    dynamic: bool = False
    delay_pos: int = -1
    ss_pos: int = -1


_CONST = Info()


@dataclass(frozen=True)
class Num:
    value: complex
    pos: int
    info: Info = _CONST


@dataclass(frozen=True)
class Var:
    name: str
    pos: int
    info: Info = Info(nlen=2, dynamic=True)


@dataclass(frozen=True)
class Param:
    name: str
    pos: int
    info: Info = _CONST


@dataclass(frozen=True)
class Sum:
    terms: tuple  # of (sign "+"|"-", node, position of the sign or term)
    pos: int
    info: Info


@dataclass(frozen=True)
class Prod:
    factors: tuple  # of (op "*"|"/", node, position of the operator or factor)
    pos: int
    info: Info


@dataclass(frozen=True)
class Neg:
    operand: object
    pos: int
    info: Info


@dataclass(frozen=True)
class Pow:
    base: object
    exponent: int
    pos: int
    info: Info


@dataclass(frozen=True)
class Block:
    name: str
    args: tuple  # of (argument name, node or float default)
    pos: int
    info: Info


@dataclass(frozen=True)
class Delay:
    arg: object
    pos: int
    info: Info


@dataclass(frozen=True)
class Zpk:
    zeros: tuple
    poles: tuple
    gain: object
    pos: int
    info: Info


@dataclass(frozen=True)
class SS:
    a: tuple  # matrices as tuples of rows of nodes
    b: tuple
    c: tuple
    d: tuple
    pos: int
    info: Info


@dataclass(frozen=True)
class Coeffs:
    """A controller as firmware holds it (always in ``z``).

    ``kind`` is ``"diffeq"`` (``rows = (b, a)``: ``b0..bn`` and ``a1..am`` of
    ``y[k] = sum b_i u[k-i] - sum a_j y[k-j]``) or ``"sos"`` (``rows``: one
    ``(b0, b1, b2, a1, a2)`` per second-order section; ``gain`` multiplies the cascade).
    """

    kind: str
    rows: tuple  # tuples of nodes
    gain: object  # node or None
    pos: int
    info: Info
