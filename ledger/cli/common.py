"""What every command module shares: the root app and its global options, opening the ledger,
the error-to-exit mapping (:func:`errors_to_exit`), the shared options and option parsing.

Exit status: 0 done; 1 a user error (any :class:`~ledger.errors.LedgerError`, printed as one
line ``error: ...``) or an interrupt; 2 a usage error (unknown option, missing argument, bad
value: one line with a ``--help`` hint) or an internal error; 3 a regression asked for with
``--exit-on`` (docs/cli.md).
"""

from __future__ import annotations

import functools
import json
import os
import sys
from dataclasses import dataclass
from typing import Optional

import typer
import typer.core

from ..errors import LedgerError, UsageError
from ..text import printable

__all__ = ["CAUTION", "WIDE_HELP", "JSON_OPTION", "WIDE_OPTION", "app", "state",
           "errors_to_exit", "run", "fail", "open_ledger", "emit_json", "set_wide",
           "key_values", "number"]

CAUTION = (
    "Caution: model-based verification does not replace hardware testing, applicable safety "
    "standards and qualified review."
)


def _terminal_safe_echo(message=None, file=None, nl: bool = True, err: bool = False,
                        color=None) -> None:
    """``typer.echo`` for every command: stored text is echoed with its control characters
    (ESC sequences, C1 controls, DEL...) escaped as ``\\uXXXX``, so text written into the
    database behind the ledger's back cannot drive the terminal.  Tab and line breaks stay;
    JSON output keeps its meaning (``\\uXXXX`` is a JSON escape of the same character)."""
    if isinstance(message, str):
        message = printable(message)
    _click_echo(message, file=file, nl=nl, err=err, color=color)


#: the echo underneath (click's); kept when this module is imported again
_click_echo = getattr(typer.echo, "wrapped", typer.echo)
_terminal_safe_echo.wrapped = _click_echo
# the command modules call typer.echo: one rule for all of them (tables escape their cells
# themselves, ledger/cli/output.py)
typer.echo = _terminal_safe_echo

WIDE_HELP = "Every table column whatever the terminal width (also a global option)."

#: ``--json`` of the commands that can print JSON
JSON_OPTION = typer.Option(False, "--json", help="Print JSON.")
#: ``--wide`` of a command with a wide table (the same as the global ``--wide``)
WIDE_OPTION = typer.Option(False, "--wide", help=WIDE_HELP)


class _Group(typer.core.TyperGroup):
    """The root command group: a usage error (unknown option, missing argument, bad value)
    is one line on stderr with a ``--help`` hint, exit status 2 (the Click convention,
    docs/cli.md); help for a bare group is printed as usual."""

    @staticmethod
    def _one_line(e) -> None:
        ctx = getattr(e, "ctx", None)
        where = ctx.command_path if ctx is not None else "loopledger"
        msg = " ".join(e.format_message().split())
        typer.echo(f"error: {msg} (see '{where} --help')", err=True)
        raise typer.Exit(2)

    def make_context(self, *args, **kwargs):
        from typer._click.exceptions import NoArgsIsHelpError
        from typer._click.exceptions import UsageError as ClickUsageError

        try:
            return super().make_context(*args, **kwargs)
        except NoArgsIsHelpError:
            raise
        except ClickUsageError as e:
            self._one_line(e)

    def invoke(self, ctx):
        from typer._click.exceptions import NoArgsIsHelpError
        from typer._click.exceptions import UsageError as ClickUsageError

        try:
            return super().invoke(ctx)
        except NoArgsIsHelpError:
            raise
        except ClickUsageError as e:
            self._one_line(e)


#: the root command: ``ledger/cli/__init__.py`` mounts the groups on it; command modules
#: register their top-level commands on it with ``@app.command(...)``
app = typer.Typer(
    cls=_Group,
    name="loopledger",
    help="A requirements ledger for feedback-control loops: plants, controller revisions with "
    "rationale, numeric requirements, automatic verification.\n\n" + CAUTION,
    no_args_is_help=True,
    add_completion=True,
    pretty_exceptions_enable=False,
)


@dataclass
class _Run:
    """The global options of this run (set by the root callback)."""

    db: Optional[str] = None
    author: Optional[str] = None
    init: Optional[str] = None   # the target of ``init`` (its password is masked too)
    wide: bool = False


state = _Run()


@app.callback()
def _main(
    db: Optional[str] = typer.Option(
        None, "--db", metavar="PATH|URL",
        help="Ledger file or database URL (default: $LOOPLEDGER_DB or ./loopledger.db).",
    ),
    author: Optional[str] = typer.Option(
        None, "--author", help="Name recorded on new records (default: $LOOPLEDGER_AUTHOR or login)."
    ),
    digits: Optional[int] = typer.Option(
        None, "--digits", min=1, max=17,
        help="Significant digits of shown values (default: $LOOPLEDGER_DIGITS or 4).",
    ),
    wide: bool = typer.Option(
        False, "--wide", help="Show every table column whatever the terminal width.",
    ),
):
    from ..display import set_digits

    state.db = db
    state.author = author
    state.init = None
    state.wide = wide
    set_digits(digits)


def set_wide(on: bool) -> None:
    """A command's own ``--wide`` adds to the global one."""
    state.wide = state.wide or bool(on)


def open_ledger(create: bool = False):
    """The ledger named by ``--db`` (else ``$LOOPLEDGER_DB``, else ``./loopledger.db``)."""
    from ..api import open_ledger as _open_ledger

    return _open_ledger(state.db, create=create, author=state.author)


def _masked(msg: str) -> str:
    """``msg`` with the password of every database named on this run masked."""
    from .. import config
    from ..store.db import scrub_secret

    for target in (state.init, state.db, config.db_target()):
        if target:
            msg = scrub_secret(msg, str(target))
    return scrub_secret(msg, None)


def fail(msg: str) -> None:
    """Print ``error: msg`` (passwords masked) and exit with status 1."""
    typer.echo(f"error: {_masked(msg)}", err=True)
    raise typer.Exit(1)


#: exit status when standard output is closed by its reader (``... | head``); the same status
#: click gives when the pipe breaks while it flushes at the end
EXIT_BROKEN_PIPE = 1


def errors_to_exit(fn):
    """Decorate a command: a :class:`~ledger.errors.LedgerError` becomes one line
    ``error: ...`` and exit status 1, an interrupt too; any other exception is an internal
    error, one line and exit status 2 (its traceback with ``$LOOPLEDGER_DEBUG`` set).
    ``typer.Exit`` (a chosen status) passes through.  Put it under ``@app.command(...)``."""

    @functools.wraps(fn)
    def command(*args, **kwargs):
        from .. import config

        try:
            return fn(*args, **kwargs)
        except LedgerError as e:
            fail(str(e))
        except KeyboardInterrupt:
            fail("interrupted; nothing was written by the unfinished command")
        except (typer.Exit, typer.Abort, SystemExit):
            raise
        except BrokenPipeError:
            # the reader went away (``... | head``): stop quietly, as command-line tools do;
            # what was recorded stays recorded
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            raise typer.Exit(EXIT_BROKEN_PIPE) from None
        except Exception as e:  # noqa: BLE001 - last resort: one line, not a traceback
            if config.debug():
                raise
            typer.echo(f"error: internal error ({type(e).__name__}: {_masked(str(e))}); nothing of "
                       "the failed step was written; rerun with LOOPLEDGER_DEBUG=1 for details "
                       "and report it", err=True)
            raise typer.Exit(2) from e

    return command


def run(fn):
    """Call ``fn()`` with the error-to-exit mapping of :func:`errors_to_exit`."""
    return errors_to_exit(fn)()


def emit_json(obj) -> None:
    """Print ``obj`` (records, dataclasses, plain data) as indented JSON."""
    from ..records import to_jsonable

    typer.echo(json.dumps(to_jsonable(obj), indent=2, ensure_ascii=False))


def key_values(pairs: list[str], what: str) -> dict:
    """``NAME=VALUE`` items to a dict; ``what`` names the option in the error."""
    out = {}
    for item in pairs or []:
        if "=" not in item:
            raise UsageError(f"{what} {item!r} must look like NAME=VALUE")
        k, v = item.split("=", 1)
        out[k.strip()] = v.strip()
    return out


def number(text: str, what: str) -> float:
    """``text`` as a float; ``what`` names it in the error."""
    try:
        return float(text)
    except ValueError as e:
        raise UsageError(f"{what}: {text!r} is not a number") from e
