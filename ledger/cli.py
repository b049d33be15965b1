"""Command-line interface: a thin layer over the Python API (``ledger.api``).

Each command opens the ledger, calls one library function and formats the result.  Domain
errors become one line on stderr and exit status 1.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import List, Optional

import typer
import typer.core

from .errors import LedgerError

CAUTION = (
    "Caution: model-based verification does not replace hardware testing, applicable safety "
    "standards and qualified review."
)

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
        from typer._click.exceptions import NoArgsIsHelpError, UsageError

        try:
            return super().make_context(*args, **kwargs)
        except NoArgsIsHelpError:
            raise
        except UsageError as e:
            self._one_line(e)

    def invoke(self, ctx):
        from typer._click.exceptions import NoArgsIsHelpError, UsageError

        try:
            return super().invoke(ctx)
        except NoArgsIsHelpError:
            raise
        except UsageError as e:
            self._one_line(e)


app = typer.Typer(
    cls=_Group,
    name="loopledger",
    help="A requirements ledger for feedback-control loops: plants, controller revisions with "
    "rationale, numeric requirements, automatic verification.\n\n" + CAUTION,
    no_args_is_help=True,
    add_completion=True,
    pretty_exceptions_enable=False,
)
plant_app = typer.Typer(help="Plants (the things controlled) and their versions.", no_args_is_help=True)
loop_app = typer.Typer(help="Loops: how a controller and a plant are connected.", no_args_is_help=True)
req_app = typer.Typer(help="Requirements: IDs, limits, traces, versions.", no_args_is_help=True)
rev_app = typer.Typer(help="Controller revisions: lineage, rationale.", no_args_is_help=True)
app.add_typer(plant_app, name="plant")
app.add_typer(loop_app, name="loop")
app.add_typer(req_app, name="requirement")
app.add_typer(rev_app, name="revision")

_state: dict = {"db": None, "author": None, "init": None, "wide": False}

WIDE_HELP = "Every table column whatever the terminal width (also a global option)."


def _set_wide(on: bool) -> None:
    _state["wide"] = _state["wide"] or bool(on)


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
    from .display import set_digits

    _state["db"] = db
    _state["author"] = author
    _state["wide"] = wide
    set_digits(digits)


def _open(create: bool = False):
    from .api import open_ledger

    return open_ledger(_state["db"], create=create, author=_state["author"])


def _masked(msg: str) -> str:
    """``msg`` with the password of every database named on this run masked."""
    import os

    from .store.db import scrub_secret

    for target in (_state.get("init"), _state["db"], os.environ.get("LOOPLEDGER_DB")):
        if target:
            msg = scrub_secret(msg, str(target))
    return scrub_secret(msg, None)


def _fail(msg: str) -> None:
    typer.echo(f"error: {_masked(msg)}", err=True)
    raise typer.Exit(1)


def _width() -> int | None:
    """Terminal width for tables and wrapped lines (``None``: no limit, ``--wide``)."""
    import os
    import shutil

    if _state.get("wide"):
        return None
    env = int(os.environ.get("COLUMNS", "0") or 0)
    if env > 0:
        return env
    return shutil.get_terminal_size((160, 24)).columns if sys.stdout.isatty() else 160


def _console():
    from rich.console import Console

    width = _width()
    return Console(soft_wrap=False, highlight=False, width=width or 100_000)


def _say(text: str, indent: str = "") -> None:
    """Echo ``text`` wrapped to the terminal width (continuation lines indented)."""
    import textwrap

    width = _width()
    for line in str(text).splitlines() or [""]:
        if width is None or len(line) <= width:
            typer.echo(line)
            continue
        lead = line[:len(line) - len(line.lstrip())]
        typer.echo("\n".join(textwrap.wrap(line, width=width, initial_indent="",
                                            subsequent_indent=lead + (indent or "  "),
                                            break_long_words=True, break_on_hyphens=False)))


def _emit_json(obj) -> None:
    from .records import to_jsonable

    typer.echo(json.dumps(to_jsonable(obj), indent=2, ensure_ascii=False))


def short_variant(text: str) -> str:
    """Plant variant names shortened for narrow tables: ``corner:mp+`` -> ``mp+``,
    ``sample:0007`` -> ``#0007``, ``fidelity:full-order`` -> ``full-order``."""
    import re

    text = re.sub(r"\bsample:", "#", text or "")
    return re.sub(r"\b(corner|fidelity):", "", text)


def _table(columns: list[str], rows: list[list[str]], title: str | None = None, *,
           drop: tuple[str, ...] = (), shorten: dict | None = None,
           quiet: dict | None = None) -> None:
    """Print a table that fits the terminal width.

    When the table is wider than the terminal (and ``--wide`` is not given), first the
    columns in ``shorten`` get their short form (``{column: function}``), then the columns
    named in ``drop`` are taken out in that order until it fits; what they held is printed
    below the table, one detail line per row (keyed by the first column), so nothing is lost,
    except values ``quiet[column](value)`` calls unremarkable (e.g. a 100 % pass fraction).
    Cells still too wide are wrapped inside their column.
    """
    from rich import box
    from rich.measure import Measurement
    from rich.table import Table

    console = _console()
    width = _width()
    from .text import printable

    # stored text may hold ESC sequences: shown as \uXXXX, never sent raw
    rows = [[printable(str(x)) for x in r] for r in rows]

    def build(keep):
        t = Table(title=title, show_lines=False, header_style="bold",
                  box=box.HEAVY_HEAD if width is None else box.SIMPLE_HEAD,
                  pad_edge=width is None, show_edge=width is None,
                  collapse_padding=width is not None)
        for j, c in enumerate(columns):
            if j in keep:
                t.add_column(c, overflow="fold")
        for r in rows:
            t.add_row(*[r[j] for j in keep])
        return t

    keep = list(range(len(columns)))
    if width is not None:  # a column empty in every row says nothing
        keep = [j for j in keep if j == 0 or any(r[j] not in ("",) for r in rows)] or keep
    t = build(keep)
    hidden: list[int] = []
    if width is not None:
        wide_open = console.options.update_width(1_000_000)
        full = [list(r) for r in rows]
        if shorten and Measurement.get(console, wide_open, t).maximum > width:
            for name, fn in shorten.items():
                if name in columns:
                    j = columns.index(name)
                    for r in rows:
                        r[j] = fn(r[j])
            t = build(keep)
        for name in drop:
            if Measurement.get(console, wide_open, t).maximum <= width:
                break
            if name in columns and columns.index(name) in keep:
                j = columns.index(name)
                keep.remove(j)
                hidden.append(j)
                t = build(keep)
    console.print(t)
    if hidden:
        quiet = quiet or {}
        for r in full:
            parts = [f"{columns[j]} {r[j]}" for j in sorted(hidden) if r[j] not in ("", "-")
                     and not (columns[j] in quiet and quiet[columns[j]](r[j]))]
            if parts:
                _say(f"  {r[0]}: " + "; ".join(parts), indent="      ")
        _say(f"  (not in the table: {', '.join(columns[j] for j in sorted(hidden))}; "
             "their notable values are above; --wide shows every column)")


def _short(text: str, n: int = 60) -> str:
    line = (text or "").strip().splitlines()[0] if (text or "").strip() else ""
    return line if len(line) <= n else line[: n - 1] + "…"


def _kv(pairs: list[str], what: str) -> dict:
    out = {}
    for item in pairs or []:
        if "=" not in item:
            raise LedgerError(f"{what} {item!r} must look like NAME=VALUE")
        k, v = item.split("=", 1)
        out[k.strip()] = v.strip()
    return out


def _number(text: str, what: str) -> float:
    try:
        return float(text)
    except ValueError as e:
        raise LedgerError(f"{what}: {text!r} is not a number") from e


def _param_arg(items: list[str]) -> dict:
    """``NAME=VALUE`` or ``NAME=VALUE:TOL`` (TOL like ``20%`` or an absolute ``0.5``)."""
    out = {}
    for k, v in _kv(items, "--param").items():
        if ":" in v:
            nom, tol = v.split(":", 1)
            tol = tol.strip()
            out[k] = {"nominal": _number(nom, f"parameter {k}"),
                      "tol": tol.replace("%", " %") if tol.endswith("%") else _number(tol, f"parameter {k} tolerance")}
        else:
            out[k] = _number(v, f"parameter {k}")
    return out


def _settings_arg(items: list[str]) -> dict:
    out = {}
    for k, v in _kv(items, "--setting").items():
        try:
            out[k] = json.loads(v)
        except json.JSONDecodeError:
            out[k] = v
    return out


def run(fn):
    """Run a command body, turning domain errors into one line and exit status 1."""
    import os

    try:
        return fn()
    except LedgerError as e:
        _fail(str(e))
    except KeyboardInterrupt:
        _fail("interrupted; nothing was written by the unfinished command")
    except (typer.Exit, typer.Abort, SystemExit):
        raise
    except Exception as e:  # noqa: BLE001 - last resort: one line, not a traceback
        if os.environ.get("LOOPLEDGER_DEBUG"):
            raise
        typer.echo(f"error: internal error ({type(e).__name__}: {_masked(str(e))}); nothing of the failed "
                   "step was written; rerun with LOOPLEDGER_DEBUG=1 for details and report it",
                   err=True)
        raise typer.Exit(2) from e


# ---------------------------------------------------------------------------------------
@app.command("init")
def init_cmd(path: Optional[str] = typer.Argument(None, help="Ledger file or URL to create.")):
    """Create a new ledger (or upgrade an older one) at PATH."""
    def body():
        from .api import open_ledger

        _state["init"] = path
        with open_ledger(path or _state["db"], create=True) as lg:
            typer.echo(f"ledger {lg.schema_action}: {lg.display_url}")
    run(body)


@app.command("import")
def import_cmd(spec: Path = typer.Argument(..., help="Spec file (TOML) to import."),
               no_verify: bool = typer.Option(False, "--no-verify", help="Record only; verify later.")):
    """Import plants, loops, requirements and revisions from a spec file (idempotent), then
    verify what is missing."""
    def body():
        from .spec import import_spec

        with _open(create=True) as lg:
            rep = import_spec(lg, spec)
            for line in rep.created:
                typer.echo(f"created   {line}")
            for line in rep.new_versions:
                typer.echo(f"new       {line}")
            for loop, label in rep.revisions_added:
                typer.echo(f"recorded  revision {loop}/{label}")
            typer.echo(f"unchanged {len(rep.unchanged)} record(s)")
        if not no_verify:
            verify_cmd(loop=None, tips=False, workers=0)
    run(body)


@app.command("export")
def export_cmd(spec: Path = typer.Argument(..., help="Spec file (TOML) to write.")):
    """Write the ledger's plants, loops, requirements and revisions as a spec file."""
    def body():
        from .spec import export_spec

        with _open() as lg:
            export_spec(lg, spec)
            typer.echo(f"wrote {spec}")
    run(body)


@app.command("metrics")
def metrics_cmd(as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """List the metrics a requirement can use, with units and settings."""
    def body():
        from .catalogue import metric_def, metric_names
        from .units import PLANT_UNIT_METRICS

        defs = [metric_def(n) for n in metric_names()]
        if as_json:
            _emit_json([{"name": d.name, "unit": d.unit, "better": d.better,
                         "unit_from_plant": PLANT_UNIT_METRICS.get(d.name),
                         "settings": dict(d.settings), "doc": d.doc} for d in defs])
            return
        words = {"in": "plant input", "out": "plant output", "in/out": "input/output"}

        def unit(d):
            own = words.get(PLANT_UNIT_METRICS.get(d.name, ""))
            return f"{own} ({d.unit or '-'} if none)" if own else (d.unit or "-")
        _table(["metric", "unit", "better", "settings"],
               [[d.name, unit(d), d.better, ", ".join(f"{k}={v}" for k, v in dict(d.settings).items())]
                for d in defs], drop=("settings",))
    run(body)


# -- plants --------------------------------------------------------------------------------
@plant_app.command("add")
def plant_add(
    name: str = typer.Argument(..., help="Plant name."),
    model: str = typer.Argument(..., help="Nominal model text, e.g. 'K/(s*(tau*s+1))'."),
    param: List[str] = typer.Option([], "--param", help="NAME=VALUE or NAME=VALUE:TOL (TOL '20%' or absolute). Repeatable."),
    fidelity: List[str] = typer.Option([], "--fidelity", help="NAME=MODEL: an extra model, e.g. the full-order one. Repeatable."),
    samples: int = typer.Option(0, "--samples", help="Seeded Monte Carlo samples from the tolerances."),
    seed: int = typer.Option(0, "--seed", help="Seed of the samples."),
    sample_time: Optional[float] = typer.Option(None, "--sample-time", help="Seconds, for a model in z."),
    input_unit: str = typer.Option("", "--input-unit", help="Unit of the plant input (e.g. A, V)."),
    output_unit: str = typer.Option("", "--output-unit", help="Unit of the plant output (e.g. mm)."),
    description: str = typer.Option("", "--description", help="Free text."),
    note: str = typer.Option("", "--note", help="Why this version."),
):
    """Add a plant, or a new version of it when anything changed."""
    def body():
        with _open() as lg:
            p = lg.add_plant(name, model, params=_param_arg(param), fidelity=_kv(fidelity, "--fidelity"),
                             samples=samples, seed=seed, sample_time=sample_time,
                             input_unit=input_unit, output_unit=output_unit,
                             description=description, note=note)
            typer.echo(f"plant {p.name} version {p.version}: {p.canonical}")
    run(body)


@plant_app.command("list")
def plant_list(as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """List plants at their latest versions."""
    def body():
        with _open() as lg:
            ps = lg.plants()
        if as_json:
            return _emit_json(ps)
        _table(["plant", "ver", "model", "params", "variants"],
               [[p.name, p.version, _short(p.model, 50), ", ".join(p.params),
                 f"{len(p.fidelity)} fidelity, {p.samples} samples"] for p in ps])
    run(body)


@plant_app.command("show")
def plant_show(name: str, version: Optional[int] = typer.Option(None, "--version", help="Version number."),
               as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """Show one plant version in full."""
    def body():
        with _open() as lg:
            p = lg.plant(name, version)
        if as_json:
            return _emit_json(p)
        typer.echo(f"plant {p.name}  version {p.version} of {p.versions}  by {p.author}  {p.created_at:%Y-%m-%d %H:%M}")
        typer.echo(f"  model      {p.model}")
        typer.echo(f"  canonical  {p.canonical}")
        for k, v in p.params.items():
            typer.echo(f"  param      {k} = {v}")
        for k, v in p.fidelity.items():
            typer.echo(f"  fidelity   {k}: {v}")
        if p.samples:
            typer.echo(f"  samples    {p.samples} (seed {p.seed})")
        if p.sample_time:
            typer.echo(f"  sample time {p.sample_time} s")
        if p.input_unit or p.output_unit:
            typer.echo(f"  units      in {p.input_unit or '-'}, out {p.output_unit or '-'}")
        if p.note:
            typer.echo(f"  note       {p.note}")
    run(body)


# -- loops ---------------------------------------------------------------------------------
@loop_app.command("add")
def loop_add(
    name: str = typer.Argument(..., help="Loop name."),
    plant: str = typer.Option(..., "--plant", help="Plant it controls."),
    kind: str = typer.Option("position", "--kind", help="position, speed, temperature, process or other."),
    sensor: str = typer.Option("", "--sensor", help="Sensor model text (default: unity feedback)."),
    prefilter: str = typer.Option("", "--prefilter", help="Reference prefilter model text."),
    input_delay: float = typer.Option(0.0, "--input-delay", help="Actuation delay, s."),
    output_delay: float = typer.Option(0.0, "--output-delay", help="Measurement delay, s."),
    sample_time: Optional[float] = typer.Option(None, "--sample-time", help="Digital controller sample time, s."),
    computation_delay: int = typer.Option(0, "--computation-delay", help="Whole samples of computation delay."),
    actuator_limit: Optional[float] = typer.Option(None, "--actuator-limit", help="Largest |u|, in the plant input unit."),
    description: str = typer.Option("", "--description", help="Free text."),
    starter: bool = typer.Option(False, "--starter", help="Also record the starter requirement set for this kind of loop (common-practice limits, as drafts)."),
):
    """Add a loop (optionally with a starter set of common-practice requirements)."""
    def body():
        with _open() as lg:
            lp = lg.add_loop(name, plant, kind=kind, sensor=sensor, prefilter=prefilter,
                             input_delay=input_delay, output_delay=output_delay,
                             sample_time=sample_time, computation_delay=computation_delay,
                             actuator_limit=actuator_limit, description=description)
            typer.echo(f"loop {lp.name} on plant {lp.plant}")
            if starter:
                for r in lg.add_starter_requirements(lp.name):
                    typer.echo(f"  draft {r.key}: {r.metric} {r.limit_text}  ({r.title})")
            else:
                typer.echo(f"  tip: 'loopledger starter {lp.kind}' lists common-practice "
                           "requirements; add them with 'loop add --starter'")
    run(body)


@app.command("starter")
def starter_cmd(kind: str = typer.Argument("position", help="Loop kind: position, speed, temperature, process, other."),
                as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """List the starter requirement set for a kind of loop: limits customary in practice."""
    def body():
        from .starters import starter_set

        try:
            items = starter_set(kind)
        except KeyError as e:
            raise LedgerError(f"unknown loop kind {kind!r}; use position, speed, temperature, process or other") from e
        if as_json:
            return _emit_json(items)
        _table(["ID suffix", "metric", "limit", "title", "why (common practice)"],
               [[i.suffix, i.metric, i.limit, i.title, i.rationale] for i in items])
    run(body)


@loop_app.command("list")
def loop_list(as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """List loops."""
    def body():
        with _open() as lg:
            ls = lg.loops()
        if as_json:
            return _emit_json(ls)
        _table(["loop", "kind", "plant", "sample time", "revisions", "tip"],
               [[l.name, l.kind, l.plant, f"{l.sample_time} s" if l.sample_time else "continuous",
                 l.revisions, l.tip or "-"] for l in ls])
    run(body)


@loop_app.command("show")
def loop_show(name: str, as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """Show a loop's settings."""
    def body():
        with _open() as lg:
            lp = lg.loop(name)
        if as_json:
            return _emit_json(lp)
        typer.echo(f"loop {lp.name} ({lp.kind}) on plant {lp.plant}")
        if lp.description:
            typer.echo(f"  {lp.description}")
        typer.echo(f"  feedback       {lp.sensor or 'unity'}")
        typer.echo(f"  prefilter      {lp.prefilter or 'none'}")
        typer.echo(f"  delays         input {lp.input_delay} s, output {lp.output_delay} s")
        typer.echo(f"  controller     " + (f"digital, Ts = {lp.sample_time} s, computation delay {lp.computation_delay} sample(s)" if lp.sample_time else "continuous"))
        typer.echo(f"  actuator limit {lp.actuator_limit if lp.actuator_limit is not None else 'none'}")
        typer.echo(f"  revisions      {lp.revisions} (tip {lp.tip or '-'})")
    run(body)


# -- requirements --------------------------------------------------------------------------
def _req_changes(title, statement, rationale, metric, limit, setting, derives_from, loop,
                 method, status) -> dict:
    ch = {}
    for k, v in (("title", title), ("statement", statement), ("rationale", rationale),
                 ("metric", metric), ("limit", limit), ("method", method), ("status", status)):
        if v is not None:
            ch[k] = v
    if setting:
        ch["settings"] = _settings_arg(setting)
    if derives_from:
        ch["parents"] = [x for x in derives_from if x != "-"]
    if loop:
        ch["loops"] = [x for x in loop if x != "-"]
    return ch


_OPT_TITLE = typer.Option(None, "--title", help="Short title.")
_OPT_STMT = typer.Option(None, "--statement", help="The requirement as a sentence.")
_OPT_WHY = typer.Option(None, "--rationale", help="Why it is needed.")
_OPT_METRIC = typer.Option(None, "--metric", help="Metric name (see 'loopledger metrics').")
_OPT_LIMIT = typer.Option(None, "--limit", help="Comparator, number, unit: '<= 25 ms', '>= 45 deg'.")
_OPT_SET = typer.Option([], "--setting", help="Metric setting NAME=VALUE (JSON value). Repeatable.")
_OPT_PARENT = typer.Option([], "--derives-from", help="Parent requirement ID (trace). Repeatable.")
_OPT_LOOP = typer.Option([], "--loop", help="Loop it applies to. Repeatable.")
_OPT_METHOD = typer.Option(None, "--method", help="analysis, test, inspection or demonstration.")
_OPT_STATUS = typer.Option(None, "--status", help="draft, approved or retired.")


@req_app.command("add")
def req_add(key: str = typer.Argument(..., help="Requirement ID, e.g. PZ-07."),
            title: Optional[str] = _OPT_TITLE, statement: Optional[str] = _OPT_STMT,
            rationale: Optional[str] = _OPT_WHY, metric: Optional[str] = _OPT_METRIC,
            limit: Optional[str] = _OPT_LIMIT, setting: List[str] = _OPT_SET,
            derives_from: List[str] = _OPT_PARENT, loop: List[str] = _OPT_LOOP,
            method: Optional[str] = _OPT_METHOD, status: Optional[str] = _OPT_STATUS):
    """Add a requirement."""
    def body():
        ch = _req_changes(title, statement, rationale, metric, limit, setting, derives_from,
                          loop, method, status)
        ch.setdefault("title", "")
        ch.setdefault("statement", "")
        if "parents" in ch:
            ch["parents"] = ch["parents"]
        with _open() as lg:
            r = lg.add_requirement(key, **ch)
            typer.echo(f"requirement {r.key} version {r.version} ({r.status})")
    run(body)


@req_app.command("edit")
def req_edit(key: str = typer.Argument(..., help="Requirement ID."),
             title: Optional[str] = _OPT_TITLE, statement: Optional[str] = _OPT_STMT,
             rationale: Optional[str] = _OPT_WHY, metric: Optional[str] = _OPT_METRIC,
             limit: Optional[str] = _OPT_LIMIT, setting: List[str] = _OPT_SET,
             derives_from: List[str] = typer.Option([], "--derives-from", help="Replace the parents (give '-' alone for none). Repeatable."),
             loop: List[str] = typer.Option([], "--loop", help="Replace the loops (give '-' alone for none). Repeatable."),
             method: Optional[str] = _OPT_METHOD, status: Optional[str] = _OPT_STATUS,
             note: str = typer.Option("", "--note", help="Why this change.")):
    """Change a requirement: records a new version; the old one stays readable."""
    def body():
        ch = _req_changes(title, statement, rationale, metric, limit, setting, derives_from,
                          loop, method, status)
        if not ch:
            raise LedgerError("nothing to change; give at least one option")
        with _open() as lg:
            before = lg.requirement(key).version
            r = lg.edit_requirement(key, note=note, **ch)
            if r.version == before:
                typer.echo(f"requirement {r.key}: no change (still version {r.version})")
            else:
                typer.echo(f"requirement {r.key} version {r.version} ({r.status})")
    run(body)


@req_app.command("retire")
def req_retire(key: str, note: str = typer.Option(..., "--note", help="Why it is retired.")):
    """Retire a requirement (a new version with status 'retired')."""
    def body():
        with _open() as lg:
            r = lg.retire_requirement(key, note=note)
            typer.echo(f"requirement {r.key} version {r.version} retired")
    run(body)


@req_app.command("list")
def req_list(status: Optional[str] = typer.Option(None, "--status", help="Only this status."),
             loop: Optional[str] = typer.Option(None, "--loop", help="Only those applying to this loop."),
             as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """List requirements at their latest versions."""
    def body():
        with _open() as lg:
            rs = lg.requirements(status=status, loop=loop)
        if as_json:
            return _emit_json(rs)
        _table(["ID", "v", "status", "title", "metric", "limit", "derives from", "loops"],
               [[r.key, r.version, r.status, _short(r.title, 40), r.metric or "-",
                 r.limit_text or "-", ", ".join(r.parents) or "-", ", ".join(r.loops) or "-"]
                for r in rs])
    run(body)


@req_app.command("show")
def req_show(key: str, version: Optional[int] = typer.Option(None, "--version", help="Version number."),
             history: bool = typer.Option(False, "--history", help="Show every version."),
             as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """Show a requirement (or its whole history)."""
    def body():
        with _open() as lg:
            rs = lg.requirement_history(key) if history else [lg.requirement(key, version)]
        if as_json:
            return _emit_json(rs if history else rs[0])
        for r in rs:
            typer.echo(f"{r.key} version {r.version} of {r.latest_version}  [{r.status}]  {r.title}")
            typer.echo(f"  statement  {r.statement}")
            if r.rationale:
                typer.echo(f"  rationale  {r.rationale}")
            typer.echo(f"  method     {r.method}")
            if r.metric:
                typer.echo(f"  check      {r.metric} {r.limit_text}" + (f"  settings {r.settings}" if r.settings else ""))
            typer.echo(f"  derives    {', '.join(r.parents) or '-'}")
            typer.echo(f"  loops      {', '.join(r.loops) or '-'}")
            typer.echo(f"  recorded   {r.created_at:%Y-%m-%d %H:%M} by {r.author}" + (f"; note: {r.note}" if r.note else ""))
    run(body)


# -- revisions -----------------------------------------------------------------------------
@rev_app.command("add")
def rev_add(loop: str = typer.Argument(..., help="Loop name."),
            controller: str = typer.Argument(..., help="Controller model text."),
            why: str = typer.Option(..., "--why", help="Rationale: why this change (required)."),
            parent: Optional[str] = typer.Option(None, "--parent", help="Parent revision label (default: the loop's tip)."),
            root: bool = typer.Option(False, "--root", help="Start a new root (no parent)."),
            label: Optional[str] = typer.Option(None, "--label", help="Label (default r<N>)."),
            no_verify: bool = typer.Option(False, "--no-verify", help="Record only; verify later with 'loopledger verify'."),
            exit_on: Optional[str] = typer.Option(None, "--exit-on", help="Exit with status 3 (the revision is still recorded) when a requirement broke against the parent ('broke'), an approved one broke ('approved-broke'), or anything broke or eroded ('any')."),
):
    """Record a controller revision and verify every applicable requirement on it at once."""
    from .cli_history import ExitOn

    try:
        exit_choice = ExitOn(exit_on) if exit_on else None
    except ValueError:
        _fail(f"--exit-on must be one of {', '.join(e.value for e in ExitOn)}")
    status = {"code": 0}

    def body():
        with _open() as lg:
            r = lg.add_revision(loop, controller, rationale=why,
                                parent=None if root else (parent or "tip"), label=label,
                                verify=not no_verify)
            typer.echo(f"revision {r.loop}/{r.label} recorded (parent {r.parent or 'none'})")
            if not no_verify:
                from .cli_history import _exit_status, print_regressions

                d = print_regressions(lg, r.loop, r.label, _Tools)
                _print_results(lg.results(r.loop, r.label), f"verdicts for {r.loop}/{r.label}")
                _say(CAUTION)
                status["code"] = _exit_status(d, exit_choice) if d.old is not None else 0
    run(body)
    if status["code"]:
        raise typer.Exit(status["code"])


def _tree_lines(nodes, prefix: str = "") -> list[str]:
    out = []
    for i, n in enumerate(nodes):
        last = i == len(nodes) - 1
        r = n.revision
        out.append(f"{prefix}{'└─ ' if last else '├─ '}{r.label}  {r.created_at:%Y-%m-%d %H:%M}  {r.author}  {_short(r.rationale, 60)}")
        out.extend(_tree_lines(n.children, prefix + ("   " if last else "│  ")))
    return out


@rev_app.command("list")
def rev_list(loop: str = typer.Argument(..., help="Loop name."),
             as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """Show a loop's revisions as a lineage tree."""
    def body():
        with _open() as lg:
            if as_json:
                return _emit_json(lg.revisions(loop))
            tree = lg.lineage(loop)
        typer.echo(f"loop {loop}")
        for line in _tree_lines(tree):
            typer.echo(line)
    run(body)


@rev_app.command("show")
def rev_show(loop: str, label: Optional[str] = typer.Argument(None, help="Revision label (default: tip)."),
             as_json: bool = typer.Option(False, "--json", help="Print JSON.")):
    """Show one revision: controller, rationale, lineage."""
    def body():
        with _open() as lg:
            r = lg.revision(loop, label)
        if as_json:
            return _emit_json(r)
        typer.echo(f"revision {r.loop}/{r.label}  by {r.author}  {r.created_at:%Y-%m-%d %H:%M}")
        typer.echo(f"  parent      {r.parent or 'none (root)'}")
        if r.children:
            typer.echo(f"  children    {', '.join(r.children)}")
        typer.echo(f"  controller  {r.controller}")
        typer.echo(f"  hash        {r.content_hash[:16]}")
        typer.echo("  rationale")
        for line in r.rationale.splitlines():
            typer.echo(f"    {line}")
    run(body)


# the verdict word, failing ones in capitals (a cue that survives without colour)
_MARK = {"pass": "pass", "fail": "FAIL", "error": "ERROR", "stale": "stale", "n/a": "n/a"}


def _fmt(value, unit):
    from .units import format_value

    return format_value(value, unit)


def _print_results(results, title: str) -> None:
    if not results:
        typer.echo("  no applicable requirements with a metric")
        return
    from .display import headroom_text, value_text

    rows = []
    for r in results:
        head = headroom_text(r.value, r.headroom, r.headroom_fraction, r.unit, r.limit_text)
        head = head.replace(" of the limit)", ")")
        rows.append([r.requirement, _MARK.get(r.verdict, r.verdict),
                     value_text(r.value, r.unit, r.limit_text), r.limit_text,
                     head, r.worst_variant or "-",
                     "-" if r.pass_fraction is None else f"{r.pass_fraction:.0%}",
                     _short(r.reason, 50) or ""])
    _table(["ID", "verdict", "worst value", "limit", "headroom", "worst variant", "pass", "note"],
           rows, title=title, drop=("note", "pass", "worst variant"),
           shorten={"worst variant": short_variant}, quiet={"pass": lambda v: v == "100%"})
    counts = {}
    for r in results:
        counts[r.verdict] = counts.get(r.verdict, 0) + 1
    typer.echo("  " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())))


@app.command("verify")
def verify_cmd(loop: Optional[str] = typer.Option(None, "--loop", help="Only this loop."),
               tips: bool = typer.Option(False, "--tips", help="Only the latest revision of each loop."),
               workers: int = typer.Option(0, "--workers", help="Parallel processes (0 = one per core).")):
    """Bring verification up to date: compute every missing result (new requirement or plant
    versions, interrupted runs), reusing cached metric values."""
    def body():
        from rich.progress import Progress

        with _open() as lg, Progress(transient=True) as bar:
            task = bar.add_task("verifying", total=None)

            def progress(i, n, what):
                bar.update(task, total=n, completed=i, description=f"verifying {what}")

            rep = lg.verify(loop, tips_only=tips, progress=progress, workers=workers)
        n_res = sum(r["results"] for r in rep)
        n_cmp = sum(r["computed"] for r in rep)
        typer.echo(f"verified {len(rep)} revision(s): {n_res} result(s) written, "
                   f"{n_cmp} metric request(s) computed, the rest from the cache")
    run(body)


@app.command("results")
def results_cmd(loop: str = typer.Argument(..., help="Loop name."),
                label: Optional[str] = typer.Argument(None, help="Revision label (default: tip)."),
                as_json: bool = typer.Option(False, "--json", help="Print JSON."),
                wide: bool = typer.Option(False, "--wide", help=WIDE_HELP)):
    """Show the verdicts of one revision: worst value over the plant family, headroom,
    the variant that produced it and the fraction of variants that pass."""
    _state["wide"] = _state["wide"] or wide

    def body():
        with _open() as lg:
            res = lg.results(loop, label)
            rev = lg.revision(loop, label)
        if as_json:
            return _emit_json(res)
        _print_results(res, f"verdicts for {rev.loop}/{rev.label}")
        _say(CAUTION)
    run(body)


class _Tools:
    """Shared helpers handed to the area modules that register their own commands."""

    caution = CAUTION
    open = staticmethod(_open)
    run = staticmethod(run)
    emit_json = staticmethod(_emit_json)
    table = staticmethod(_table)
    say = staticmethod(_say)
    set_wide = staticmethod(_set_wide)
    wide_help = WIDE_HELP
    print_results = staticmethod(_print_results)
    short = staticmethod(_short)
    short_variant = staticmethod(short_variant)
    fail = staticmethod(_fail)


def _register_areas() -> None:
    from . import cli_exports, cli_history, cli_signoff, cli_ui

    for mod in (cli_history, cli_exports, cli_signoff, cli_ui):
        mod.register(app, _Tools)


_register_areas()


def main() -> None:  # console-script entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
