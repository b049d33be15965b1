"""``loopledger plant add/list/show``: plants (the things controlled) and their versions."""

from __future__ import annotations

from typing import List, Optional

import typer

from .common import JSON_OPTION, emit_json, errors_to_exit, key_values, number, open_ledger
from .output import short, table

__all__ = ["group", "plant_add", "plant_list", "plant_show", "param_arg"]

#: mounted as ``loopledger plant`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Plants (the things controlled) and their versions.", no_args_is_help=True)


def param_arg(items: list[str]) -> dict:
    """``NAME=VALUE`` or ``NAME=VALUE:TOL`` (TOL like ``20%`` or an absolute ``0.5``)."""
    out = {}
    for k, v in key_values(items, "--param").items():
        if ":" in v:
            nom, tol = v.split(":", 1)
            tol = tol.strip()
            out[k] = {"nominal": number(nom, f"parameter {k}"),
                      "tol": tol.replace("%", " %") if tol.endswith("%")
                      else number(tol, f"parameter {k} tolerance")}
        else:
            out[k] = number(v, f"parameter {k}")
    return out


@group.command("add")
@errors_to_exit
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
    with open_ledger() as lg:
        p = lg.add_plant(name, model, params=param_arg(param),
                         fidelity=key_values(fidelity, "--fidelity"),
                         samples=samples, seed=seed, sample_time=sample_time,
                         input_unit=input_unit, output_unit=output_unit,
                         description=description, note=note)
        typer.echo(f"plant {p.name} version {p.version}: {p.canonical}")


@group.command("list")
@errors_to_exit
def plant_list(as_json: bool = JSON_OPTION):
    """List plants at their latest versions."""
    with open_ledger() as lg:
        ps = lg.plants()
    if as_json:
        return emit_json(ps)
    table(["plant", "ver", "model", "params", "variants"],
          [[p.name, p.version, short(p.model, 50), ", ".join(p.params),
            f"{len(p.fidelity)} fidelity, {p.samples} samples"] for p in ps])


@group.command("show")
@errors_to_exit
def plant_show(name: str, version: Optional[int] = typer.Option(None, "--version", help="Version number."),
               as_json: bool = JSON_OPTION):
    """Show one plant version in full."""
    with open_ledger() as lg:
        p = lg.plant(name, version)
    if as_json:
        return emit_json(p)
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
    for k, m in p.measured.items():
        w = m["omega"]
        meta = m.get("meta", {})
        who = ", ".join(f"{f} {meta[f]}" for f in ("measured_by", "measured_at", "excitation")
                        if meta.get(f))
        typer.echo(f"  measured   {k}: {len(w)} points {w[0]:.4g}..{w[-1]:.4g} rad/s, "
                   f"{m['rhp_poles']} RHP pole(s), {m['integrators']} integrator(s)"
                   + (f"; {who}" if who else ""))
    if p.note:
        typer.echo(f"  note       {p.note}")


@group.command("measured")
@errors_to_exit
def plant_measured(
    name: str = typer.Argument(..., help="Plant name."),
    file: str = typer.Argument(..., help="Measurement file: CSV or whitespace columns with a header such as 'freq[Hz], mag[dB], phase[deg], coh' (docs/measured.md)."),
    label: str = typer.Option("", "--name", help="Measurement name (default: the file name without extension)."),
    rhp_poles: int = typer.Option(0, "--rhp-poles", help="Open-loop right-half-plane poles of the plant (data cannot show them)."),
    integrators: int = typer.Option(0, "--integrators", help="Poles of the plant at s = 0."),
    min_coherence: float = typer.Option(0.8, "--min-coherence", help="Points with lower coherence are excluded."),
    by: str = typer.Option("", "--by", help="Who measured."),
    at: str = typer.Option("", "--at", help="When it was measured (free text, e.g. 2026-11-30)."),
    excitation: str = typer.Option("", "--excitation", help="Excitation level, e.g. '0.2 A swept sine'."),
    note: str = typer.Option("", "--note", help="Free text kept with the measurement."),
    replace: bool = typer.Option(False, "--replace", help="Replace a measurement of the same name."),
):
    """Record a bench frequency response as a measured member of the plant's family."""
    import os

    import hashlib

    from ..errors import SpecError
    from ..systems.measfile import parse_measurement

    try:
        with open(file, encoding="utf-8") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as e:
        raise SpecError(f"cannot read {file}: {e.__class__.__name__}") from None
    label = label or os.path.splitext(os.path.basename(file))[0]
    meta = {k: v for k, v in (("measured_by", by), ("measured_at", at),
                              ("excitation", excitation), ("note", note)) if v}
    meas = parse_measurement(text, rhp_poles=rhp_poles, integrators=integrators,
                             min_coherence=min_coherence, where=os.path.basename(file),
                             source=os.path.basename(file), source_hash=hashlib.sha256(text.encode()).hexdigest(), **meta)
    with open_ledger() as lg:
        p = lg.add_measurement(name, label, meas, replace=replace)
    lo, hi = meas.band
    typer.echo(f"plant {p.name} version {p.version}: measured:{label}, {meas.omega.size} "
               f"points, {lo:.4g}..{hi:.4g} rad/s, {meas.excluded} excluded (coherence "
               f"< {meas.min_coherence:g})")
