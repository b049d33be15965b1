"""Command-line interface: a thin layer over the Python API (``ledger.api``).

Each command opens the ledger, calls one library function and formats the result.  Domain
errors become one line on stderr and exit status 1 (``common.errors_to_exit``).

One module per command group, each command a plain Typer function::

    common.py        the root app and its global options (--db, --author, --digits, --wide),
                     opening the ledger, the error-to-exit mapping, --json / --wide, option
                     parsing
    output.py        tables that fit the terminal width, wrapped lines, short cells
    spec.py          init, import, export
    plants.py        plant add/list/show
    loops.py         loop add/list/show; starter
    requirements.py  requirement add/edit/retire/list/show; metrics
    revisions.py     revision add/list/show; verify, results
    history.py       diff, since, trace (and print_regressions for revision add)
    exports.py       export-matrix
    signoff.py       baseline create/list/show; sign, audit
    ui.py            ui
    tryout.py        try (dry run of candidate controllers)
    waivers.py       waiver add/list/show/withdraw

Adding a command group (docs/architecture.md, "Where a change goes"): write
``ledger/cli/<group>.py`` with ``group = typer.Typer(help=..., no_args_is_help=True)`` for
``loopledger <name> ...`` sub-commands and/or ``commands = typer.Typer()`` for top-level
commands; decorate each command with ``@group.command("name")`` (or ``@commands.command``)
and then ``@errors_to_exit`` from ``common``; import the module below and add it to
``_TOP_LEVEL`` and/or ``_GROUPS``.  ``--help`` lists the top-level commands, then the groups, in
the order of those two tuples.
"""

from __future__ import annotations

from . import exports, gate, history, loops, plants, requirements, revisions, signoff, spec, ui
from . import tryout, waivers
from .common import CAUTION, app, run
from .output import short_variant

__all__ = ["app", "main", "CAUTION", "run", "short_variant"]

#: modules whose ``commands`` are top-level commands, in the order ``--help`` lists them
_TOP_LEVEL = (spec, requirements, loops, revisions, history, exports, gate, signoff, ui,
              tryout)
#: ``(name, module)``: ``loopledger <name> ...`` is ``module.group``
_GROUPS = (("plant", plants), ("loop", loops), ("requirement", requirements),
           ("revision", revisions), ("baseline", signoff), ("waiver", waivers))

for _module in _TOP_LEVEL:
    app.add_typer(_module.commands)
for _name, _module in _GROUPS:
    app.add_typer(_module.group, name=_name)


def main() -> None:
    """The ``loopledger`` console script (and ``python -m ledger``)."""
    app()
