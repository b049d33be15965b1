"""The layer rules of docs/architecture.md, read from the source with ``ast``.

Every module under ``ledger/`` is parsed (nothing is imported), and every ``import`` in it
(at the top or inside a function) is resolved to the module it names.  Nothing here lists
today's modules: a new module is checked the moment it exists.

Source: docs/architecture.md (the project's own rules; common practice, no outside source).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent / "ledger"

#: Cycles allowed (none since the engine reorganisation of issue 11, step 5).  An entry is a set
#: of package (or module) names forming one cycle.
KNOWN_PACKAGE_CYCLES: list[set[str]] = []
KNOWN_MODULE_CYCLES: list[set[str]] = []


def _modname(path: Path) -> str:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


MODULES = {_modname(p): p for p in sorted(ROOT.rglob("*.py"))}


def _imports(name: str) -> list[tuple[str, int]]:
    """(imported module, line) for every import statement of module ``name``; relative
    imports resolved; ``from pkg import sub`` names ``pkg.sub`` when that is a module.
    Imports under ``if TYPE_CHECKING:`` never run (type annotations only) and are left out."""
    path = MODULES[name]
    is_pkg = path.name == "__init__.py"
    out = []
    tree = ast.parse(path.read_text(encoding="utf-8"))
    typing_only = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and (
                (isinstance(node.test, ast.Name) and node.test.id == "TYPE_CHECKING")
                or (isinstance(node.test, ast.Attribute) and node.test.attr == "TYPE_CHECKING")):
            typing_only.update(id(n) for stmt in node.body for n in ast.walk(stmt))
    for node in ast.walk(tree):
        if id(node) in typing_only:
            continue
        if isinstance(node, ast.Import):
            out.extend((a.name, node.lineno) for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".") if is_pkg else name.split(".")[:-1]
                base = base[:len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            subs = [f"{mod}.{a.name}" for a in node.names if f"{mod}.{a.name}" in MODULES]
            out.extend((m, node.lineno) for m in (subs or [mod]))
    return out


def _internal(target: str) -> str | None:
    """The ``ledger`` module ``target`` lives in (itself or its nearest parent), if any."""
    while target and target not in MODULES:
        target = target.rpartition(".")[0]
    return target or None


def _package(module: str) -> str:
    """The layer a module belongs to: the first name under ``ledger`` (``ledger.store.db``
    -> ``store``; ``ledger.api`` -> ``api``; ``ledger`` itself -> ``ledger``)."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "ledger"


def _under(module: str, package: str) -> bool:
    return module == f"ledger.{package}" or module.startswith(f"ledger.{package}.")


def _third_party(module: str, top: str) -> list[tuple[str, int]]:
    return [(m, line) for m, line in _imports(module) if m == top or m.startswith(top + ".")]


def _cycles(edges: dict[str, set[str]]) -> list[set[str]]:
    """Strongly connected components with more than one member (Tarjan, iterative)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    found = []
    counter = 0
    for start in sorted(edges):
        if start in index:
            continue
        work = [(start, iter(sorted(edges.get(start, ()))))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on.add(start)
        while work:
            v, it = work[-1]
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter
                    counter += 1
                    stack.append(w)
                    on.add(w)
                    work.append((w, iter(sorted(edges.get(w, ())))))
                    break
                if w in on:
                    low[v] = min(low[v], index[w])
            else:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = set()
                    while True:
                        w = stack.pop()
                        on.discard(w)
                        comp.add(w)
                        if w == v:
                            break
                    if len(comp) > 1:
                        found.append(comp)
    return found


def test_the_source_is_found():
    # the rules below would pass vacuously on an empty tree
    assert "ledger.api" in MODULES and "ledger.store.session" in MODULES
    assert any(_under(m, "engine") for m in MODULES) and any(_under(m, "tui") for m in MODULES)


@pytest.mark.parametrize("package", ["engine", "systems"])
def test_engine_and_systems_import_neither_sqlalchemy_nor_textual(package):
    bad = [f"{m}:{line} imports {t}" for m in MODULES if _under(m, package)
           for top in ("sqlalchemy", "alembic", "textual", "textual_plotext")
           for t, line in _third_party(m, top)]
    assert not bad, bad


def test_sqlalchemy_is_imported_only_by_the_store():
    """Outside ``ledger/store`` the database is reached through the unit of work
    (``ledger.store.session``) and the store's functions, never SQLAlchemy itself."""
    bad = [f"{m}:{line} imports {t}" for m in MODULES if not _under(m, "store")
           for top in ("sqlalchemy", "alembic") for t, line in _third_party(m, top)]
    assert not bad, bad


def test_session_machinery_is_used_only_through_the_unit_of_work():
    """Inside the store, only ``db`` (engines, the session scope) and ``session`` (the unit
    of work) make sessions; and nothing outside the store imports ``store.db``'s session
    scope or ``sessionmaker``."""
    makers = {m for m in MODULES if any(
        t in ("sqlalchemy.orm", "sqlalchemy.orm.sessionmaker") and "sessionmaker" in
        MODULES[m].read_text(encoding="utf-8") for t, _ in _imports(m))}
    assert makers <= {"ledger.store.db", "ledger.store.session"}, makers
    bad = []
    for m in MODULES:
        if _under(m, "store"):
            continue
        tree = ast.parse(MODULES[m].read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.endswith("store.db"):
                names = {a.name for a in node.names}
                if names & {"session_scope", "make_engine"}:
                    bad.append(f"{m}:{node.lineno} imports {sorted(names)} from store.db")
    assert not bad, bad


def test_textual_is_imported_only_by_the_tui():
    bad = [f"{m}:{line} imports {t}" for m in MODULES if not _under(m, "tui")
           for top in ("textual", "textual_plotext") for t, line in _third_party(m, top)]
    assert not bad, bad


def _edges(group) -> dict[str, set[str]]:
    edges: dict[str, set[str]] = {}
    for m in MODULES:
        for t, _ in _imports(m):
            target = _internal(t)
            if target is None or not target.startswith("ledger"):
                continue
            a, b = group(m), group(target)
            if a != b:
                edges.setdefault(a, set()).add(b)
    return edges


def test_no_import_cycle_between_packages():
    cycles = [c for c in _cycles(_edges(_package)) if c not in KNOWN_PACKAGE_CYCLES]
    assert not cycles, f"import cycles between packages: {cycles}"


def test_no_import_cycle_between_modules():
    cycles = [c for c in _cycles(_edges(lambda m: m)) if c not in KNOWN_MODULE_CYCLES]
    assert not cycles, f"import cycles between modules: {cycles}"


def test_cycle_finder_finds_a_cycle():
    # the check above must be able to fail
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [{"a", "b", "c"}]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_ledger_facade_holds_only_public_methods():
    """``Ledger`` delegates: every function in its body is public (or a dunder)."""
    tree = ast.parse(MODULES["ledger.api"].read_text(encoding="utf-8"))
    cls = next(n for n in tree.body if isinstance(n, ast.ClassDef) and n.name == "Ledger")
    private = [f.name for f in cls.body if isinstance(f, (ast.FunctionDef, ast.AsyncFunctionDef))
               and f.name.startswith("_") and not (f.name.startswith("__") and f.name.endswith("__"))]
    assert not private, private
    # 40 methods, and the three of waivers (add, list, withdraw: issue 17 item 4)
    assert len([f for f in cls.body if isinstance(f, ast.FunctionDef)]) <= 43


@pytest.mark.parametrize("name", ["ledger.spec", "ledger.signoff", "ledger.api"])
def test_workflows_call_no_private_function_of_another_module(name):
    """``x._name(...)`` on anything but ``self`` reaches into another module's privates."""
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    bad = [f"line {n.lineno}: {ast.unparse(n.func)}" for n in ast.walk(tree)
           if isinstance(n, ast.Call) and isinstance(n.func, ast.Attribute)
           and n.func.attr.startswith("_") and not n.func.attr.startswith("__")
           and not (isinstance(n.func.value, ast.Name) and n.func.value.id == "self")]
    assert not bad, bad


def test_systems_import_nothing_of_the_engine():
    """The dependency runs one way: engine -> systems (``Variant``/``PlantFamily`` live in
    ``ledger.systems.variants``; ``ledger.engine.types`` re-exports them)."""
    bad = [f"{m}:{line} imports {t}" for m in MODULES if _under(m, "systems")
           for t, line in _imports(m) if _under(t, "engine")]
    assert not bad, bad
    from ledger.engine import types
    from ledger.systems import variants
    assert types.Variant is variants.Variant and types.PlantFamily is variants.PlantFamily


@pytest.mark.parametrize("package", ["engine", "systems"])
def test_engine_and_systems_modules_stay_under_600_lines(package):
    """Issue 11, "done when": no module over 600 lines (the engine and systems layers, which
    the engine reorganisation split by concept)."""
    long = {m: n for m in MODULES if _under(m, package)
            and (n := len(MODULES[m].read_text(encoding="utf-8").splitlines())) > 600}
    assert not long, long


def test_freqresp_front_gives_the_margin_functions_of_their_home():
    # the public path ledger.engine.freqresp.<margin name> stays, without a cycle
    from ledger.engine import freqresp, margins, peaks
    for name in ("Margins", "DiskMargin", "margins", "encirclements",
                 "closed_loop_unstable_count", "disk_margin"):
        assert getattr(freqresp, name) is getattr(margins, name)
    assert freqresp.peak_gain is peaks.peak_gain and freqresp.bandwidth is peaks.bandwidth
    assert not hasattr(freqresp, "__getattr__")


def test_every_engine_module_exports_what_its_all_lists():
    # a name in __all__ that a module does not hold breaks ``from module import *``
    import importlib
    bad = []
    for m in MODULES:
        if _under(m, "engine") or _under(m, "systems"):
            mod = importlib.import_module(m)
            bad += [f"{m}.{n}" for n in getattr(mod, "__all__", ()) if not hasattr(mod, n)]
    assert not bad, bad
