"""Recursive-descent parser of model text into a checked syntax tree.

Grammar (``^`` and ``**`` are the same operator)::

    model    := sum END
    sum      := product (("+" | "-") product)*
    product  := unary (("*" | "/") unary)*
    unary    := ("-" | "+") unary | power
    power    := primary ("^" INTEGER)?
    primary  := NUMBER | NAME | NAME "(" arguments ")" | "(" sum ")"
    arguments:= argument ("," argument)*      argument := [NAME "="] sum | list
    list     := "[" [item ("," item)*] "]"    item := sum | list

``diffeq([b...], [a...])``, ``sos([[b0, b1, b2, a1, a2], ...], gain)`` and ``zss(A, B, C, D)``
hold a discrete controller as firmware does; a model using one is in ``z``
(docs/digital.md).

Checks made here, each reported with the 0-based position of the offending character:
implicit multiplication, unknown calls and arguments, mixing ``s`` and ``z``, blocks or
``delay`` in a ``z`` model, ``delay`` anywhere but as a factor of the whole model, ``ss``
anywhere but as the whole model, complex literals outside ``zpk`` lists, exponents that are
not non-negative integers, nesting depth and polynomial degree limits.

Every node carries the exact number of numerator and denominator coefficients its value
will have, so that shapes are known before any parameter value is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ledger.errors import ModelSyntaxError
from ledger.systems.blocks import BLOCKS
from ledger.systems.lexer import Token, tokenize
from ledger.systems.nodes import (SS, Block, Coeffs, Delay, Info, Neg, Num, Param, Pow, Prod,
                                  Sum, Var, Zpk)

__all__ = ["ParseResult", "parse", "MAX_DEGREE", "MAX_DEPTH", "RESERVED", "Z_CALLS"]

MAX_DEGREE = 60
"""Highest polynomial degree a model may reach anywhere in its evaluation."""
MAX_DEPTH = 60
"""Deepest nesting of parentheses, unary signs, calls and lists."""

_CALLS = ("delay", "zpk", "ss")
#: calls that hold a discrete controller as firmware does; a model using one is in z
Z_CALLS = ("diffeq", "sos", "zss")
RESERVED = frozenset({"s", "z", "pi", "j", *_CALLS, *Z_CALLS, *BLOCKS})
"""Names that cannot be parameters."""


@dataclass(frozen=True)
class ParseResult:
    """Outcome of :func:`parse`.

    Parameters
    ----------
    tree : node
        Root of the syntax tree.
    variable : str
        ``"s"`` or ``"z"``; ``"s"`` also when the text names neither.
    parameters : frozenset of str
        Parameter names used.
    canonical : str
        Whitespace-free token text with numbers in Python's shortest float repr.
    """

    tree: object
    variable: str
    parameters: frozenset
    canonical: str


def _canonical(tokens: list[Token]) -> str:
    out = []
    prev = ""
    for t in tokens:
        if t.kind == "number" and prev == "^":
            out.append(str(int(t.text)))  # exponents are validated non-negative integers
        elif t.kind == "number":
            out.append(repr(t.value))
        elif t.kind == "imag":
            out.append(repr(t.value) + "j")
        elif t.kind == "^":
            out.append("^")
        else:
            out.append(t.text)
        prev = t.kind
    return "".join(out)


class _Parser:
    def __init__(self, text: str, tokens: list[Token], variable: str):
        self.text = text
        self.toks = tokens
        self.i = 0
        self.variable = variable
        self.depth = 0
        self.in_zpk_list = False
        self.params: set[str] = set()

    # -- helpers -------------------------------------------------------------------------
    def error(self, message: str, pos: int) -> ModelSyntaxError:
        return ModelSyntaxError(message, self.text, pos)

    @property
    def tok(self) -> Token:
        return self.toks[self.i]

    def peek(self, k: int = 1) -> Token:
        return self.toks[min(self.i + k, len(self.toks) - 1)]

    def advance(self) -> Token:
        t = self.toks[self.i]
        if t.kind != "end":
            self.i += 1
        return t

    def expect(self, kind: str, what: str) -> Token:
        if self.tok.kind != kind:
            raise self.error(f"expected {what}, found {self.describe(self.tok)}", self.tok.pos)
        return self.advance()

    @staticmethod
    def describe(t: Token) -> str:
        return "end of text" if t.kind == "end" else repr(t.text)

    def enter(self, pos: int) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise self.error(f"nesting deeper than {MAX_DEPTH} levels; simplify the model", pos)

    def leave(self) -> None:
        self.depth -= 1

    def check_degree(self, info: Info, pos: int) -> Info:
        if max(info.nlen, info.dlen) - 1 > MAX_DEGREE:
            raise self.error(
                f"polynomial degree would exceed {MAX_DEGREE}; reduce the model order", pos)
        return info

    # -- grammar -------------------------------------------------------------------------
    def model(self):
        node = self.sum()
        if self.tok.kind != "end":
            raise self.error(f"unexpected {self.describe(self.tok)}", self.tok.pos)
        return node

    def sum(self):
        first_pos = self.tok.pos
        node = self.product()
        terms = [("+", node, first_pos)]
        while self.tok.kind in ("+", "-"):
            op = self.advance()
            terms.append((op.text, self.product(), op.pos))
        if len(terms) == 1:
            return node
        n, d = terms[0][1].info.nlen, terms[0][1].info.dlen
        dynamic = False
        for _, t, pos in terms:
            if t.info.delay_pos >= 0:
                raise self.error("delay(...) cannot be part of a sum; it may only multiply the "
                                 "whole model", t.info.delay_pos)
            if t.info.ss_pos >= 0:
                raise self.error("ss(...) must be the whole model; combine systems elsewhere",
                                 t.info.ss_pos)
            dynamic = dynamic or t.info.dynamic
        for _, t, pos in terms[1:]:
            n, d = max(n + t.info.dlen - 1, t.info.nlen + d - 1), d + t.info.dlen - 1
            self.check_degree(Info(n, d), pos)
        return Sum(tuple(terms), first_pos, Info(n, d, dynamic))

    def product(self):
        first_pos = self.tok.pos
        node = self.unary()
        factors = [("*", node, first_pos)]
        while True:
            t = self.tok
            if t.kind in ("*", "/"):
                self.advance()
                factors.append((t.kind, self.unary(), t.pos))
            elif t.kind in ("number", "imag", "name", "("):
                raise self.error("implicit multiplication is not allowed; write '*' between "
                                 "factors", t.pos)
            else:
                break
        if len(factors) == 1:
            return node
        n, d = 1, 1
        dynamic, delay_pos, ss_pos = False, -1, -1
        for op, f, pos in factors:
            fi = f.info
            if op == "/" and fi.delay_pos >= 0:
                raise self.error("delay(...) cannot be in a denominator; it may only multiply "
                                 "the whole model", fi.delay_pos)
            if fi.ss_pos >= 0 and (op == "/" or not all(
                    isinstance(g, (Delay, SS)) for _, g, _ in factors)):
                raise self.error("ss(...) must be the whole model (optionally times delay(...))",
                                 fi.ss_pos)
            if op == "*":
                n, d = n + fi.nlen - 1, d + fi.dlen - 1
            else:
                n, d = n + fi.dlen - 1, d + fi.nlen - 1
            self.check_degree(Info(n, d), pos)
            dynamic = dynamic or fi.dynamic
            if delay_pos < 0:
                delay_pos = fi.delay_pos
            if ss_pos < 0:
                ss_pos = fi.ss_pos
        if sum(isinstance(g, SS) for _, g, _ in factors) > 1:
            raise self.error("only one ss(...) is allowed; combine systems elsewhere",
                             [g.pos for _, g, _ in factors if isinstance(g, SS)][1])
        return Prod(tuple(factors), first_pos, Info(n, d, dynamic, delay_pos, ss_pos))

    def unary(self):
        t = self.tok
        if t.kind in ("-", "+"):
            self.advance()
            self.enter(t.pos)
            operand = self.unary()
            self.leave()
            if t.kind == "+":
                return operand
            if operand.info.ss_pos >= 0:
                raise self.error("ss(...) must be the whole model; put the sign into C and D",
                                 operand.info.ss_pos)
            return Neg(operand, t.pos, operand.info)
        return self.power()

    def power(self):
        base = self.primary()
        if self.tok.kind != "^":
            return base
        op = self.advance()
        e = self.tok
        if e.kind != "number" or not e.text.isdigit():
            raise self.error("exponent must be a non-negative integer such as 2", e.pos)
        self.advance()
        k = int(e.text)
        if k > MAX_DEGREE:
            raise self.error(f"exponent larger than {MAX_DEGREE}; reduce the model order", e.pos)
        if base.info.delay_pos >= 0:
            raise self.error("delay(...) cannot be raised to a power; write delay(n*tau)",
                             base.info.delay_pos)
        if base.info.ss_pos >= 0:
            raise self.error("ss(...) cannot be raised to a power", base.info.ss_pos)
        if self.tok.kind == "^":
            raise self.error("chained powers are ambiguous; add parentheses", self.tok.pos)
        bi = base.info
        info = Info((bi.nlen - 1) * k + 1, (bi.dlen - 1) * k + 1, bi.dynamic and k > 0)
        self.check_degree(info, op.pos)
        return Pow(base, k, op.pos, info)

    def primary(self):
        t = self.tok
        if t.kind == "number":
            self.advance()
            return Num(t.value, t.pos)
        if t.kind == "imag":
            if not self.in_zpk_list:
                raise self.error("complex numbers are allowed only inside zpk([...], [...], k) "
                                 "lists", t.pos)
            self.advance()
            return Num(complex(0.0, t.value), t.pos)
        if t.kind == "(":
            self.advance()
            self.enter(t.pos)
            node = self.sum()
            self.leave()
            self.expect(")", "')' to close the '(' at column %d" % (t.pos + 1))
            return node
        if t.kind == "name":
            return self.name()
        raise self.error(f"expected a number, name or '(', found {self.describe(t)}", t.pos)

    def name(self):
        t = self.advance()
        name = t.text
        if self.tok.kind == "(":
            if name in BLOCKS:
                return self.block(t)
            if name == "delay":
                return self.delay(t)
            if name == "zpk":
                return self.zpk(t)
            if name in ("ss", "zss"):
                return self.ss(t)
            if name == "diffeq":
                return self.diffeq(t)
            if name == "sos":
                return self.sos(t)
            raise self.error(f"unknown block {name!r}; known: "
                             f"{', '.join(sorted([*BLOCKS, *_CALLS, *Z_CALLS]))}", t.pos)
        if name in ("s", "z"):
            if name != self.variable:
                raise self.error("a model cannot use both s and z", t.pos)
            return Var(name, t.pos)
        if name == "pi":
            return Num(math.pi, t.pos)
        if name == "j":
            raise self.error("'j' alone is not a number; write e.g. 1j inside a zpk list", t.pos)
        if name in RESERVED:
            raise self.error(f"{name!r} is a block; call it as {name}(...)", t.pos)
        self.params.add(name)
        return Param(name, t.pos)

    def constant_arg(self, what: str):
        """Parse an expression that must not depend on s/z (block or list argument)."""
        pos = self.tok.pos
        node = self.sum()
        if node.info.dynamic or node.info.delay_pos >= 0 or node.info.ss_pos >= 0:
            raise self.error(f"{what} must be a number, parameter or expression of them "
                             f"(no s, z or blocks)", pos)
        return node

    def call_args(self, name_tok: Token, spec_args: tuple, defaults: dict, what: str):
        """Bind ``(a, b, key=c)`` to argument names; returns a tuple of (name, node|float)."""
        open_tok = self.expect("(", f"'(' after {name_tok.text}")
        self.enter(open_tok.pos)
        bound: dict[str, object] = {}
        seen_keyword = False
        if self.tok.kind != ")":
            while True:
                t = self.tok
                if t.kind == "name" and self.peek().kind == "=":
                    key = t.text
                    if key not in spec_args:
                        raise self.error(f"{name_tok.text}() has no argument {key!r}; it takes "
                                         f"{', '.join(spec_args)}", t.pos)
                    if key in bound:
                        raise self.error(f"argument {key!r} given twice", t.pos)
                    self.advance()
                    self.advance()
                    seen_keyword = True
                    bound[key] = self.constant_arg(f"argument {key!r} of {name_tok.text}()")
                else:
                    if seen_keyword:
                        raise self.error("a positional argument cannot follow a keyword "
                                         "argument", t.pos)
                    if len(bound) >= len(spec_args):
                        raise self.error(f"{name_tok.text}() takes at most {len(spec_args)} "
                                         f"arguments ({', '.join(spec_args)})", t.pos)
                    key = spec_args[len(bound)]
                    bound[key] = self.constant_arg(f"argument {key!r} of {name_tok.text}()")
                if self.tok.kind == ",":
                    self.advance()
                    continue
                break
        close = self.expect(")", f"',' or ')' in the arguments of {name_tok.text}()")
        self.leave()
        missing = [a for a in spec_args if a not in bound and a not in defaults]
        if missing:
            raise self.error(f"{what} needs argument {missing[0]!r} "
                             f"({name_tok.text}({', '.join(spec_args)}))", close.pos)
        return tuple((a, bound.get(a, defaults.get(a))) for a in spec_args)

    def block(self, t: Token):
        spec = BLOCKS[t.text]
        if self.variable == "z":
            raise self.error(f"{t.text}() is a continuous-time block and cannot be used in a z "
                             f"model; discretise the controller or write it in z", t.pos)
        args = self.call_args(t, spec.args, spec.defaults, f"{t.text}()")
        return Block(t.text, args, t.pos, Info(spec.nlen, spec.dlen, True))

    def delay(self, t: Token):
        if self.variable == "z":
            raise self.error("delay(...) is continuous-time; in a z model write z^-n as "
                             "1/z^n", t.pos)
        (_, arg), = self.call_args(t, ("tau",), {}, "delay()")
        return Delay(arg, t.pos, Info(delay_pos=t.pos))

    def list_(self, what: str, nested: bool):
        """Parse ``[item, ...]``; items are constant expressions or (if nested) lists."""
        open_tok = self.expect("[", f"'[' to start the {what}")
        self.enter(open_tok.pos)
        items = []
        if self.tok.kind != "]":
            while True:
                if nested:
                    items.append(self.list_(what, False)[0])
                else:
                    items.append(self.constant_arg(f"an entry of the {what}"))
                if self.tok.kind == ",":
                    self.advance()
                    continue
                break
        self.expect("]", f"',' or ']' in the {what}")
        self.leave()
        return tuple(items), open_tok.pos

    def zpk(self, t: Token):
        open_tok = self.expect("(", "'(' after zpk")
        self.enter(open_tok.pos)
        self.in_zpk_list = True
        zeros, _ = self.list_("list of zeros", False)
        self.expect(",", "',' after the list of zeros")
        poles, _ = self.list_("list of poles", False)
        self.in_zpk_list = False
        self.expect(",", "',' and the gain after the list of poles")
        gain = self.constant_arg("the zpk gain")
        self.expect(")", "')' after the zpk gain")
        self.leave()
        info = Info(len(zeros) + 1, len(poles) + 1, True)
        self.check_degree(info, t.pos)
        return Zpk(zeros, poles, gain, t.pos, info)

    def diffeq(self, t: Token):
        """``diffeq([b0, ..., bn], [a1, ..., am])``: ``y[k] = sum b_i u[k-i] - sum a_j y[k-j]``,
        i.e. ``(b0 + b1 z^-1 + ...)/(1 + a1 z^-1 + ...)``, written over ``z^N``."""
        open_tok = self.expect("(", "'(' after diffeq")
        self.enter(open_tok.pos)
        b, pb = self.list_("list of b coefficients", False)
        self.expect(",", "',' and the list of a coefficients (a1..an, a0 = 1 is implied)")
        a, _ = self.list_("list of a coefficients", False)
        self.expect(")", "')' after the list of a coefficients")
        self.leave()
        if not b:
            raise self.error("diffeq needs at least b0 (the list of b coefficients is empty)",
                             pb)
        n = max(len(b) - 1, len(a))
        info = Info(n + 1, n + 1, True)
        self.check_degree(info, t.pos)
        return Coeffs("diffeq", (b, a), None, t.pos, info)

    def sos(self, t: Token):
        """``sos([[b0, b1, b2, a1, a2], ...], gain)``: a cascade of second-order sections
        ``gain * prod (b0 + b1 z^-1 + b2 z^-2)/(1 + a1 z^-1 + a2 z^-2)``."""
        open_tok = self.expect("(", "'(' after sos")
        self.enter(open_tok.pos)
        rows, pr = self.list_("list of sections", True)
        gain = None
        if self.tok.kind == ",":
            self.advance()
            gain = self.constant_arg("the sos gain")
        self.expect(")", "')' after the sections (and the gain)")
        self.leave()
        if not rows:
            raise self.error("sos needs at least one section [b0, b1, b2, a1, a2]", pr)
        for r in rows:
            if len(r) != 5:
                raise self.error(f"each section has 5 entries [b0, b1, b2, a1, a2] (a0 = 1 is "
                                 f"implied); this one has {len(r)}", pr)
        info = Info(2 * len(rows) + 1, 2 * len(rows) + 1, True)
        self.check_degree(info, t.pos)
        return Coeffs("sos", rows, gain, t.pos, info)

    def ss(self, t: Token):
        open_tok = self.expect("(", f"'(' after {t.text}")
        self.enter(open_tok.pos)
        mats = []
        for k, label in enumerate("ABCD"):
            if k:
                self.expect(",", f"',' and matrix {label}")
            rows, pos = self.list_(f"matrix {label}", True)
            mats.append((rows, pos))
        self.expect(")", "')' after matrix D")
        self.leave()
        (a, pa), (b, pb), (c, pc), (d, pd) = mats
        n = len(a)
        if n == 0:
            raise self.error("matrix A is empty; a static gain is written as a number", pa)
        if any(len(r) != n for r in a):
            raise self.error(f"matrix A must be square ({n} x {n})", pa)
        if len(b) != n or any(len(r) != 1 for r in b):
            raise self.error(f"matrix B must be {n} x 1 (one input)", pb)
        if len(c) != 1 or len(c[0]) != n:
            raise self.error(f"matrix C must be 1 x {n} (one output)", pc)
        if len(d) != 1 or len(d[0]) != 1:
            raise self.error("matrix D must be 1 x 1", pd)
        info = Info(n + 1, n + 1, True, ss_pos=t.pos)
        self.check_degree(info, t.pos)
        return SS(a, b, c, d, t.pos, info)


def _variable(text: str, tokens: list[Token]) -> str:
    seen: dict[str, int] = {}
    for t in tokens:
        if t.kind == "name" and t.text in ("s", "z") and t.text not in seen:
            seen[t.text] = t.pos
        elif t.kind == "name" and t.text in Z_CALLS and "z" not in seen:
            seen["z"] = t.pos  # a firmware form is discrete
    if len(seen) == 2:
        later = max(seen, key=seen.get)
        raise ModelSyntaxError("a model cannot use both s and z", text, seen[later])
    return next(iter(seen), "s")


def parse(text: str) -> ParseResult:
    """Parse model text into a checked syntax tree.

    Parameters
    ----------
    text : str
        Model text (see the module docstring for the grammar).

    Returns
    -------
    ParseResult

    Raises
    ------
    ModelSyntaxError
        With the 0-based position of the offending character.
    """
    tokens = tokenize(text)
    variable = _variable(text, tokens)
    p = _Parser(text, tokens, variable)
    tree = p.model()
    return ParseResult(tree, variable, frozenset(p.params), _canonical(tokens))
