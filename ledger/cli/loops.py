"""``loopledger loop add/list/show`` (how a controller and a plant are connected) and
``loopledger starter`` (the starter requirement set of a kind of loop)."""

from __future__ import annotations

from typing import Optional

import typer

from ..errors import UsageError
from .common import JSON_OPTION, emit_json, errors_to_exit, open_ledger
from .output import table

__all__ = ["group", "commands", "loop_add", "loop_list", "loop_show", "starter_cmd"]

#: mounted as ``loopledger loop`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Loops: how a controller and a plant are connected.", no_args_is_help=True)
#: top-level commands (``loopledger starter``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()


@group.command("add")
@errors_to_exit
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
    rate_limit: Optional[float] = typer.Option(None, "--rate-limit", help="Largest |du/dt| of the actuator, plant input unit per second (large moves)."),
    description: str = typer.Option("", "--description", help="Free text."),
    starter: bool = typer.Option(False, "--starter", help="Also record the starter requirement set for this kind of loop (common-practice limits, as drafts)."),
):
    """Add a loop (optionally with a starter set of common-practice requirements)."""
    with open_ledger() as lg:
        lp = lg.add_loop(name, plant, kind=kind, sensor=sensor, prefilter=prefilter,
                         input_delay=input_delay, output_delay=output_delay,
                         sample_time=sample_time, computation_delay=computation_delay,
                         actuator_limit=actuator_limit, description=description,
                         rate_limit=rate_limit)
        typer.echo(f"loop {lp.name} on plant {lp.plant}")
        if starter:
            for r in lg.add_starter_requirements(lp.name):
                typer.echo(f"  draft {r.key}: {r.metric} {r.limit_text}  ({r.title})")
        else:
            typer.echo(f"  tip: 'loopledger starter {lp.kind}' lists common-practice "
                       "requirements; add them with 'loop add --starter'")


@commands.command("starter")
@errors_to_exit
def starter_cmd(kind: str = typer.Argument("position", help="Loop kind: position, speed, temperature, process, other."),
                as_json: bool = JSON_OPTION):
    """List the starter requirement set for a kind of loop: limits customary in practice."""
    from ..starters import starter_set

    try:
        items = starter_set(kind)
    except KeyError as e:
        raise UsageError(f"unknown loop kind {kind!r}; use position, speed, temperature, "
                         "process or other") from e
    if as_json:
        return emit_json(items)
    table(["ID suffix", "metric", "limit", "title", "why (common practice)"],
          [[i.suffix, i.metric, i.limit, i.title, i.rationale] for i in items])


from .spectra import loop_rms, loop_spectrum  # noqa: E402 - registered on this group

group.command("spectrum")(loop_spectrum)
group.command("rms")(loop_rms)


@group.command("list")
@errors_to_exit
def loop_list(as_json: bool = JSON_OPTION):
    """List loops."""
    with open_ledger() as lg:
        ls = lg.loops()
    if as_json:
        return emit_json(ls)
    table(["loop", "kind", "plant", "sample time", "revisions", "tip"],
          [[lp.name, lp.kind, lp.plant, f"{lp.sample_time} s" if lp.sample_time else "continuous",
            lp.revisions, lp.tip or "-"] for lp in ls])


@group.command("show")
@errors_to_exit
def loop_show(name: str, as_json: bool = JSON_OPTION):
    """Show a loop's settings."""
    with open_ledger() as lg:
        lp = lg.loop(name)
        spectra = lg.spectra(name)
    if as_json:
        return emit_json(lp)
    typer.echo(f"loop {lp.name} ({lp.kind}) on plant {lp.plant}")
    if lp.description:
        typer.echo(f"  {lp.description}")
    typer.echo(f"  feedback       {lp.sensor or 'unity'}")
    typer.echo(f"  prefilter      {lp.prefilter or 'none'}")
    typer.echo(f"  delays         input {lp.input_delay} s, output {lp.output_delay} s")
    typer.echo("  controller     " + (f"digital, Ts = {lp.sample_time} s, computation delay "
                                     f"{lp.computation_delay} sample(s)" if lp.sample_time
                                     else "continuous"))
    typer.echo(f"  actuator limit {lp.actuator_limit if lp.actuator_limit is not None else 'none'}")
    if lp.rate_limit is not None:
        typer.echo(f"  rate limit     {lp.rate_limit} per s")
    typer.echo(f"  revisions      {lp.revisions} (tip {lp.tip or '-'})")
    for sp in spectra:
        what = (f"table of {len(sp['table'])} rows ({sp['label'] or 'file'})"
                if sp["kind"] == "table" else
                f"white {sp['intensity']:.4g} /Hz through {sp['shaping'] or '1'}")
        typer.echo(f"  spectrum       {sp['source']}: {what}")
