"""Exception hierarchy.

Every error the product raises on purpose is a :class:`LedgerError`.  Subclasses also
subclass the matching built-in so that callers may catch ``ValueError`` and friends.
Messages are one line, name the offending thing, and say what to do where possible.
"""

from __future__ import annotations

__all__ = [
    "LedgerError",
    "ModelSyntaxError",
    "ModelError",
    "UnitError",
    "SpecError",
    "NotFoundError",
    "DuplicateError",
    "IntegrityViolation",
    "WaiverError",
    "UnknownMetricError",
    "SchemaError",
    "ComputeError",
    "UnstableLoopError",
    "UsageError",
    "OutputError",
    "ClusterError",
    "with_context",
]


class LedgerError(Exception):
    """Base class of every deliberate loopledger error."""


class ModelSyntaxError(LedgerError, ValueError):
    """Model text could not be parsed.

    Parameters
    ----------
    message : str
        What is wrong.
    text : str
        The text that was parsed.
    position : int
        0-based index of the offending character in ``text``.
    """

    def __init__(self, message: str, text: str = "", position: int | None = None):
        self.text = text
        self.position = position
        self.reason = message
        if position is not None and text:
            where = f" at column {position + 1}"
            caret = f": {text!r}, here -> {text[position:position + 12]!r}"
            super().__init__(f"{message}{where}{caret}")
        else:
            super().__init__(message)


class ModelError(LedgerError, ValueError):
    """A model parsed but is not acceptable (improper, NaN coefficients, wrong sample time...)."""


class UnitError(LedgerError, ValueError):
    """A unit is unknown or does not fit the metric."""


class SpecError(LedgerError, ValueError):
    """A spec file is malformed; the message names the file, record and field."""


class NotFoundError(LedgerError, LookupError):
    """A named record does not exist."""


class DuplicateError(LedgerError, ValueError):
    """A record with that name or ID already exists."""


class IntegrityViolation(LedgerError, ValueError):
    """An operation would break a ledger invariant (cycle, append-only, missing rationale...)."""


class UnknownMetricError(SpecError, IntegrityViolation):
    """A metric name the catalogue does not have (``ledger.engine.metrics.get_metric``).

    Raised by the one catalogue whether the name comes from a spec file or ``measure``
    (a :class:`SpecError`) or from a requirement record (an :class:`IntegrityViolation`), so
    either ``except`` clause catches it; the message lists the valid names."""


class SchemaError(LedgerError, RuntimeError):
    """The database is not a ledger, is damaged, or comes from a newer schema."""


class ComputeError(LedgerError, ArithmeticError):
    """A metric could not be computed; the message says why."""


class UnstableLoopError(ComputeError):
    """The closed loop is unstable, so a response metric does not exist."""


class UsageError(LedgerError, ValueError):
    """A request that does not make sense as given (an unknown export format, options that
    exclude each other, a folder that does not exist, an optional package not installed)."""


class OutputError(LedgerError, OSError):
    """A file could not be written (nothing is left half-written)."""


class ClusterError(LedgerError, RuntimeError):
    """The compute cluster could not be reached, lost the worker of a task, or computes with
    another engine version; results recorded before it stay, none half-written."""


def with_context(e: LedgerError, prefix: str) -> LedgerError:
    """A copy of ``e`` (same class, same fields, e.g. a parse error's ``text`` and
    ``position``) whose message starts with ``prefix: ``.  Raise it ``from e``."""
    import copy

    out = copy.copy(e)
    out.args = (f"{prefix}: {e}",)
    return out


class WaiverError(IntegrityViolation):
    """A waiver that cannot be recorded or withdrawn as given (no reason, approver or role, an
    expiry that has passed or is not a date, a requirement that has no cell there, a waiver
    withdrawn already), or a sign-off whose ``accept`` names no cell that needs it."""
