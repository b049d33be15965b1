"""The layout rules of the command line (docs/architecture.md, DEVELOPERS.md "Adding a CLI
command"), read from the source and from the built command tree.

Source: the project's own rules (issue 11: commands importable one by one, no closures; the
specific error subclass; environment variables read in ledger/config.py); common practice, no
outside source.
"""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import typer

from ledger.cli import app

ROOT = Path(__file__).resolve().parent.parent / "ledger"
CLI = sorted((ROOT / "cli").glob("*.py"))


def _commands(cmd, prefix=()):
    for name, sub in getattr(cmd, "commands", {}).items():
        if getattr(sub, "commands", None):
            yield from _commands(sub, prefix + (name,))
        else:
            yield " ".join(prefix + (name,)), sub


def test_the_cli_sources_are_found():
    # the checks below would pass vacuously on an empty package
    assert len(CLI) >= 5 and (ROOT / "cli" / "__init__.py") in CLI
    assert len(list(_commands(typer.main.get_command(app)))) >= 30


def test_every_command_is_a_module_level_function_with_the_error_mapping():
    """Each command is importable by name from its module (no closure registered inside a
    function) and goes through ``errors_to_exit`` (one line and status 1 for a LedgerError)."""
    bad = []
    for name, cmd in _commands(typer.main.get_command(app)):
        # functools.wraps copies the name; the code object keeps where it was written
        fn = cmd.callback
        while fn is not None and fn.__code__.co_qualname != "errors_to_exit.<locals>.command":
            fn = getattr(fn, "__wrapped__", None)   # Typer's own wrapper
        inner = getattr(fn, "__wrapped__", None)
        if inner is None:
            bad.append(f"{name}: not decorated with errors_to_exit")
            continue
        if "<locals>" in inner.__qualname__:
            bad.append(f"{name}: {inner.__qualname__} is defined inside a function")
            continue
        module = importlib.import_module(inner.__module__)
        if getattr(module, inner.__name__, None) is not fn:
            bad.append(f"{name}: {inner.__module__}.{inner.__name__} is not the command")
    assert not bad, bad


def test_the_error_mapping_turns_a_ledger_error_into_one_line_and_status_1(capsys):
    # the check above relies on this behaviour; it must be able to fail
    import pytest

    from ledger.cli.common import errors_to_exit
    from ledger.errors import UsageError

    @errors_to_exit
    def refuse():
        raise UsageError("give either A or B, not both")

    with pytest.raises(typer.Exit) as e:
        refuse()
    assert e.value.exit_code == 1
    assert capsys.readouterr().err == "error: give either A or B, not both\n"


def test_cli_modules_stay_small_and_raise_specific_errors():
    bad = []
    for path in CLI:
        text = path.read_text(encoding="utf-8")
        if len(text.splitlines()) > 600:
            bad.append(f"{path.name}: {len(text.splitlines())} lines (at most 600)")
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, ast.Raise) and isinstance(node.exc, ast.Call) \
                    and isinstance(node.exc.func, ast.Name) and node.exc.func.id == "LedgerError":
                bad.append(f"{path.name}:{node.lineno} raises the bare LedgerError")
    assert not bad, bad


def _is_environ(node) -> bool:
    return isinstance(node, ast.Attribute) and node.attr == "environ"


def _environment_reads(tree) -> list[int]:
    """Lines that read ``os.environ`` (``.get``, a subscript, ``in``, a copy) or call
    ``os.getenv``; setting a variable (``os.environ[k] = v``) is not a read."""
    lines = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and node.attr == "getenv":
            lines.append(node.lineno)
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) \
                and _is_environ(node.func.value) and node.func.attr in ("get", "copy", "items",
                                                                         "keys", "values"):
            lines.append(node.lineno)
        elif isinstance(node, ast.Subscript) and _is_environ(node.value) \
                and isinstance(node.ctx, ast.Load):
            lines.append(node.lineno)
        elif isinstance(node, ast.Compare) and any(_is_environ(c) for c in node.comparators):
            lines.append(node.lineno)
        elif isinstance(node, ast.Dict) and any(_is_environ(v) for v in node.values):
            lines.append(node.lineno)   # {**os.environ, ...}
    return lines


def test_environment_variables_are_read_only_in_config():
    bad = []
    for path in sorted(ROOT.rglob("*.py")):
        if path == ROOT / "config.py":
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        bad.extend(f"{path.relative_to(ROOT.parent)}:{n}" for n in _environment_reads(tree))
    assert not bad, f"environment read outside ledger/config.py: {bad}"
    # the finder does find a read (so the check can fail)
    probe = ("import os\na = os.environ.get('A')\nb = os.getenv('B')\nc = os.environ['C']\n"
             "d = 'D' in os.environ\nos.environ['E'] = '1'\n")
    assert sorted(_environment_reads(ast.parse(probe))) == [2, 3, 4, 5]
