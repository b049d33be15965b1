"""``loopledger requirement add/edit/retire/list/show`` (IDs, limits, traces, versions) and
``loopledger metrics`` (what a requirement can measure)."""

from __future__ import annotations

import json
from typing import List, Optional

import typer

from ..errors import UsageError
from .common import JSON_OPTION, emit_json, errors_to_exit, key_values, open_ledger
from .output import short, table

__all__ = ["group", "commands", "metrics_cmd", "req_add", "req_edit", "req_retire",
           "req_list", "req_show", "settings_arg"]

#: mounted as ``loopledger requirement`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Requirements: IDs, limits, traces, versions.", no_args_is_help=True)
#: top-level commands (``loopledger metrics``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()


@commands.command("metrics")
@errors_to_exit
def metrics_cmd(as_json: bool = JSON_OPTION):
    """List the metrics a requirement can use, with units and settings."""
    from ..catalogue import metric_def, metric_names
    from ..units import PLANT_UNIT_METRICS

    defs = [metric_def(n) for n in metric_names()]
    if as_json:
        emit_json([{"name": d.name, "unit": d.unit, "better": d.better,
                    "unit_from_plant": PLANT_UNIT_METRICS.get(d.name),
                    "settings": dict(d.settings), "doc": d.doc} for d in defs])
        return
    words = {"in": "plant input", "out": "plant output", "in/out": "input/output",
             "out/s": "plant output per second"}

    def unit(d):
        own = words.get(PLANT_UNIT_METRICS.get(d.name, ""))
        return f"{own} ({d.unit or '-'} if none)" if own else (d.unit or "-")
    table(["metric", "unit", "better", "settings"],
          [[d.name, unit(d), d.better, ", ".join(f"{k}={v}" for k, v in dict(d.settings).items())]
           for d in defs], drop=("settings",))


def settings_arg(items: list[str]) -> dict:
    """``--setting NAME=VALUE`` items; a value is read as JSON when it parses, else text."""
    out = {}
    for k, v in key_values(items, "--setting").items():
        try:
            out[k] = json.loads(v)
        except json.JSONDecodeError:
            out[k] = v
    return out


def _changes(title, statement, rationale, metric, limit, setting, derives_from, loop,
             method, status, yield_claim=None, confidence=None) -> dict:
    ch = {}
    for k, v in (("title", title), ("statement", statement), ("rationale", rationale),
                 ("metric", metric), ("limit", limit), ("method", method), ("status", status),
                 ("yield_claim", yield_claim), ("confidence", confidence)):
        if v is not None:
            ch[k] = v
    if setting:
        ch["settings"] = settings_arg(setting)
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
_OPT_YIELD = typer.Option(None, "--yield", help="Yield target judged on the lower confidence "
                          "bound of the random samples: '99 % at 95 %' ('none' removes it).")
_OPT_CONF = typer.Option(None, "--confidence", help="Confidence of the yield bound shown "
                         "beside the pass fraction: '90 %' (default 95 %).")


@group.command("add")
@errors_to_exit
def req_add(key: str = typer.Argument(..., help="Requirement ID, e.g. PZ-07."),
            title: Optional[str] = _OPT_TITLE, statement: Optional[str] = _OPT_STMT,
            rationale: Optional[str] = _OPT_WHY, metric: Optional[str] = _OPT_METRIC,
            limit: Optional[str] = _OPT_LIMIT, setting: List[str] = _OPT_SET,
            derives_from: List[str] = _OPT_PARENT, loop: List[str] = _OPT_LOOP,
            method: Optional[str] = _OPT_METHOD, status: Optional[str] = _OPT_STATUS,
            yield_claim: Optional[str] = _OPT_YIELD, confidence: Optional[str] = _OPT_CONF):
    """Add a requirement."""
    ch = _changes(title, statement, rationale, metric, limit, setting, derives_from,
                  loop, method, status, yield_claim, confidence)
    ch.setdefault("title", "")
    ch.setdefault("statement", "")
    with open_ledger() as lg:
        r = lg.add_requirement(key, **ch)
        typer.echo(f"requirement {r.key} version {r.version} ({r.status})")


@group.command("edit")
@errors_to_exit
def req_edit(key: str = typer.Argument(..., help="Requirement ID."),
             title: Optional[str] = _OPT_TITLE, statement: Optional[str] = _OPT_STMT,
             rationale: Optional[str] = _OPT_WHY, metric: Optional[str] = _OPT_METRIC,
             limit: Optional[str] = _OPT_LIMIT, setting: List[str] = _OPT_SET,
             derives_from: List[str] = typer.Option([], "--derives-from", help="Replace the parents (give '-' alone for none). Repeatable."),
             loop: List[str] = typer.Option([], "--loop", help="Replace the loops (give '-' alone for none). Repeatable."),
             method: Optional[str] = _OPT_METHOD, status: Optional[str] = _OPT_STATUS,
             yield_claim: Optional[str] = _OPT_YIELD, confidence: Optional[str] = _OPT_CONF,
             note: str = typer.Option("", "--note", help="Why this change.")):
    """Change a requirement: records a new version; the old one stays readable."""
    ch = _changes(title, statement, rationale, metric, limit, setting, derives_from,
                  loop, method, status, yield_claim, confidence)
    if not ch:
        raise UsageError("nothing to change; give at least one option")
    with open_ledger() as lg:
        before = lg.requirement(key).version
        r = lg.edit_requirement(key, note=note, **ch)
        if r.version == before:
            typer.echo(f"requirement {r.key}: no change (still version {r.version})")
        else:
            typer.echo(f"requirement {r.key} version {r.version} ({r.status})")


@group.command("retire")
@errors_to_exit
def req_retire(key: str, note: str = typer.Option(..., "--note", help="Why it is retired.")):
    """Retire a requirement (a new version with status 'retired')."""
    with open_ledger() as lg:
        r = lg.retire_requirement(key, note=note)
        typer.echo(f"requirement {r.key} version {r.version} retired")


@group.command("list")
@errors_to_exit
def req_list(status: Optional[str] = typer.Option(None, "--status", help="Only this status."),
             loop: Optional[str] = typer.Option(None, "--loop", help="Only those applying to this loop."),
             as_json: bool = JSON_OPTION):
    """List requirements at their latest versions."""
    with open_ledger() as lg:
        rs = lg.requirements(status=status, loop=loop)
    if as_json:
        return emit_json(rs)
    table(["ID", "v", "status", "title", "metric", "limit", "derives from", "loops"],
          [[r.key, r.version, r.status, short(r.title, 40), r.metric or "-",
            r.limit_text or "-", ", ".join(r.parents) or "-", ", ".join(r.loops) or "-"]
           for r in rs])


@group.command("show")
@errors_to_exit
def req_show(key: str, version: Optional[int] = typer.Option(None, "--version", help="Version number."),
             history: bool = typer.Option(False, "--history", help="Show every version."),
             as_json: bool = JSON_OPTION):
    """Show a requirement (or its whole history)."""
    with open_ledger() as lg:
        rs = lg.requirement_history(key) if history else [lg.requirement(key, version)]
    if as_json:
        return emit_json(rs if history else rs[0])
    for r in rs:
        typer.echo(f"{r.key} version {r.version} of {r.latest_version}  [{r.status}]  {r.title}")
        typer.echo(f"  statement  {r.statement}")
        if r.rationale:
            typer.echo(f"  rationale  {r.rationale}")
        typer.echo(f"  method     {r.method}")
        if r.metric:
            typer.echo(f"  check      {r.metric} {r.limit_text}"
                       + (f"  settings {r.settings}" if r.settings else ""))
        if r.yield_target is not None or r.confidence is not None:
            from ..yieldbound import percent_text, samples_needed, yield_text

            if r.yield_target is not None:
                typer.echo(f"  yield      >= {yield_text(r.yield_target, r.confidence)} "
                           f"(judged on the bound; {samples_needed(r.yield_target, r.confidence)}"
                           " passing samples with none failing support it)")
            else:
                typer.echo(f"  yield      bound shown at {percent_text(r.confidence)} confidence")
        typer.echo(f"  derives    {', '.join(r.parents) or '-'}")
        typer.echo(f"  loops      {', '.join(r.loops) or '-'}")
        typer.echo(f"  recorded   {r.created_at:%Y-%m-%d %H:%M} by {r.author}"
                   + (f"; note: {r.note}" if r.note else ""))
