"""Tokenizer of the model-text language.

The language is small and typed by people: numbers, names, the operators
``+ - * / ^ **``, parentheses, square brackets, commas and ``=`` (keyword arguments).
Every token remembers the 0-based index of its first character so that a later error can
point at it.  Nothing here evaluates text.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from ledger.errors import ModelSyntaxError
from ledger.systems.bounds import NUMBER_RANGE

__all__ = ["Token", "tokenize", "MAX_TEXT_LENGTH"]

MAX_TEXT_LENGTH = 10_000
"""Longest model text accepted, in characters."""

# ASCII only on purpose: ``\d`` would also accept other scripts' digits.
_NUMBER = re.compile(r"(?:[0-9]+\.?[0-9]*|\.[0-9]+)")
_EXPONENT = re.compile(r"[eE][+-]?[0-9]+")
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_WHITESPACE = " \t\r\n\f\v"
_SINGLE = {"+": "+", "-": "-", "*": "*", "/": "/", "^": "^", "(": "(", ")": ")",
           "[": "[", "]": "]", ",": ",", "=": "="}


@dataclass(frozen=True)
class Token:
    """One token of model text.

    Parameters
    ----------
    kind : str
        ``"number"``, ``"imag"`` (a number written with a ``j`` suffix), ``"name"``, an
        operator or punctuation character (``"+"``, ``"^"`` for both ``^`` and ``**``, ...),
        or ``"end"``.
    text : str
        The characters as typed.
    pos : int
        0-based index of the first character in the model text.
    value : float
        The number for ``number`` and ``imag`` tokens (the imaginary part), else 0.
    """

    kind: str
    text: str
    pos: int
    value: float = 0.0


def _number(text: str, i: int) -> tuple[Token, int]:
    m = _NUMBER.match(text, i)
    assert m is not None  # the caller saw a digit or ".digit"
    end = m.end()
    if end < len(text) and text[end] in "eE":
        e = _EXPONENT.match(text, end)
        if e is None:
            raise ModelSyntaxError(
                "malformed exponent in number; write e.g. 1e-3", text, end)
        end = e.end()
    lexeme = text[i:end]
    value = float(lexeme)  # a validated numeric lexeme, never arbitrary text
    if not math.isfinite(value):
        raise ModelSyntaxError(
            f"number {lexeme} is too large for a float; rescale the model", text, i)
    if abs(value) > NUMBER_RANGE:
        raise ModelSyntaxError(
            f"number {lexeme} exceeds 1e100 in magnitude, not representable; "
            "rescale the model (choose other units)", text, i)
    kind = "number"
    if end < len(text) and text[end] == "j" and (
            end + 1 == len(text) or not (text[end + 1].isascii()
                                         and (text[end + 1].isalnum() or text[end + 1] == "_"))):
        kind = "imag"
        lexeme = text[i:end + 1]
        end += 1
    return Token(kind, lexeme, i, value), end


def tokenize(text: str) -> list[Token]:
    """Split model text into tokens.

    Parameters
    ----------
    text : str
        Model text, at most :data:`MAX_TEXT_LENGTH` characters.

    Returns
    -------
    list of Token
        The tokens, ending with one ``end`` token positioned after the last character.

    Raises
    ------
    ModelSyntaxError
        Text too long or empty, an unexpected character, a malformed or overflowing number.
    """
    if not isinstance(text, str):
        raise ModelSyntaxError(f"model text must be a string, not {type(text).__name__}")
    if len(text) > MAX_TEXT_LENGTH:
        raise ModelSyntaxError(
            f"model text is longer than {MAX_TEXT_LENGTH} characters; simplify it",
            text, MAX_TEXT_LENGTH)
    tokens: list[Token] = []
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c in _WHITESPACE:
            i += 1
        elif c.isascii() and (c.isdigit() or (c == "." and i + 1 < n and text[i + 1].isascii()
                                              and text[i + 1].isdigit())):
            tok, i = _number(text, i)
            tokens.append(tok)
        elif c.isascii() and (c.isalpha() or c == "_"):
            m = _NAME.match(text, i)
            tokens.append(Token("name", m.group(), i))
            i = m.end()
        elif text.startswith("**", i):
            tokens.append(Token("^", "**", i))
            i += 2
        elif c in _SINGLE:
            tokens.append(Token(_SINGLE[c], c, i))
            i += 1
        else:
            raise ModelSyntaxError(f"unexpected character {c!r}", text, i)
    if not tokens:
        raise ModelSyntaxError("model text is empty; type a transfer function such as 1/(s+1)",
                               text, 0 if text else None)
    tokens.append(Token("end", "", n))
    return tokens
