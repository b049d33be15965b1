"""``loopledger baseline create/list/show`` (frozen sets of revisions with their verdicts),
``loopledger sign`` and ``loopledger audit``."""

from __future__ import annotations

from typing import List, Optional

import typer

from ..errors import LedgerError, UsageError
from .common import CAUTION, JSON_OPTION, emit_json, errors_to_exit, open_ledger
from .output import say, table

__all__ = ["group", "commands", "baseline_create", "baseline_list", "baseline_show", "sign_cmd",
           "audit_cmd", "parse_revision_arg", "cell_units", "covered_lines"]

#: mounted as ``loopledger baseline`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Baselines: frozen sets of revisions, requirement versions "
                    "and plant versions with their verdicts.", no_args_is_help=True)
#: top-level commands (``sign``, ``audit``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()


def parse_revision_arg(items: list[str]) -> list[tuple[str, str]] | None:
    """``LOOP:LABEL`` strings to pairs; an empty list means the default (tips)."""
    out = []
    for item in items or []:
        loop, sep, label = item.partition(":")
        if not sep or not loop or not label:
            raise UsageError(f"--revision {item!r} must look like LOOP:LABEL, e.g. pz:r3")
        out.append((loop, label))
    return out or None


def cell_units(lg, cells) -> dict:
    """``(requirement, version, plant, plant version) -> unit`` of each frozen cell's metric,
    with the plant's declared units (``ledger.units.resolve_unit``)."""
    from ..catalogue import metric_unit
    from ..units import resolve_unit

    out: dict = {}
    for c in cells:
        k = (c.requirement, c.requirement_version, c.plant, c.plant_version)
        if k in out:
            continue
        try:
            q = lg.requirement(c.requirement, version=c.requirement_version)
            p = lg.plant(c.plant, version=c.plant_version)
            out[k] = resolve_unit(q.metric, metric_unit(q.metric), p.input_unit, p.output_unit) \
                if q.metric else ""
        except LedgerError:
            out[k] = ""
    return out


def _cell_row(c, units) -> list:
    from ..display import headroom_text, value_text

    unit = units.get((c.requirement, c.requirement_version, c.plant, c.plant_version), "")
    return [c.requirement, c.requirement_version, f"{c.loop}/{c.revision}", c.verdict,
            value_text(c.value, unit, c.limit), c.limit,
            headroom_text(c.value, c.headroom, None, unit, c.limit)]


def _show(b, units=None) -> None:
    typer.echo(f"baseline {b.name}  frozen {b.created_at:%Y-%m-%d %H:%M} UTC by {b.author}")
    typer.echo(f"  matrix SHA-256 {b.matrix_hash}")
    if b.supersedes:
        typer.echo(f"  supersedes {b.supersedes}")
    if b.superseded_by:
        typer.echo(f"  superseded by {b.superseded_by}")
    if b.note:
        typer.echo(f"  note: {b.note}")
    table(["loop", "revision", "plant", "revision hash"],
          [[c.loop, c.revision, f"{c.plant} v{c.plant_version}", c.revision_hash[:12]]
           for c in b.columns], title="revisions")
    table(["ID", "ver", "loop/revision", "verdict", "value", "limit", "headroom"],
          [_cell_row(c, units or {}) for c in b.cells], title="cells")
    for so in b.signoffs:
        typer.echo(f"  signed {so.signed_at:%Y-%m-%d %H:%M} UTC by {so.name} ({so.role}): "
                   f"{so.statement}")
        for line in covered_lines(so):
            typer.echo(f"    {line}")
    if not b.signoffs:
        typer.echo("  not signed")
    say(CAUTION)


@group.command("create")
@errors_to_exit
def baseline_create(
    name: str = typer.Argument(..., help="Name of the new baseline."),
    revision: List[str] = typer.Option([], "--revision", metavar="LOOP:LABEL",
                                       help="A revision to freeze (repeatable); default: "
                                       "the tip of every loop."),
    note: str = typer.Option("", "--note", help="Free text kept with the baseline."),
    supersedes: Optional[str] = typer.Option(None, "--supersedes",
                                             help="Name of the baseline this one replaces."),
    replace: bool = typer.Option(False, "--replace",
                                 help="Refreeze an existing unsigned baseline of that name."),
):
    """Freeze a baseline: revisions with the requirement versions, plant versions and
    verdicts the ledger holds for them now."""
    from ..signoff import create_baseline

    with open_ledger() as lg:
        b = create_baseline(lg, name, revisions=parse_revision_arg(revision), note=note,
                            supersedes=supersedes, replace=replace)
    counts = ", ".join(f"{v} {k}" for k, v in sorted(b.counts().items())) or "no cells"
    typer.echo(f"baseline {b.name}: {len(b.columns)} revision(s), {counts}")
    typer.echo(f"  matrix SHA-256 {b.matrix_hash}")


@group.command("list")
@errors_to_exit
def baseline_list(as_json: bool = JSON_OPTION):
    """List baselines with their state (signed, superseded) and matrix hash."""
    from ..signoff import baselines

    with open_ledger() as lg:
        bs = baselines(lg)
    if as_json:
        return emit_json(bs)
    table(["baseline", "frozen", "revisions", "cells", "signed by", "superseded by",
           "matrix hash"],
          [[b.name, f"{b.created_at:%Y-%m-%d %H:%M}", len(b.columns), len(b.cells),
            ", ".join(f"{s.name} ({s.role})" for s in b.signoffs) or "-",
            b.superseded_by or "-", b.matrix_hash[:16]] for b in bs])


@group.command("show")
@errors_to_exit
def baseline_show(name: str = typer.Argument(..., help="Baseline name."),
                  as_json: bool = JSON_OPTION):
    """Show one baseline: frozen revisions, cells and sign-offs."""
    from ..signoff import baseline

    with open_ledger() as lg:
        b = baseline(lg, name)
        units = None if as_json else cell_units(lg, b.cells)
    if as_json:
        return emit_json(b)
    _show(b, units)


@commands.command("sign")
@errors_to_exit
def sign_cmd(
    baseline_name: str = typer.Argument(..., metavar="BASELINE", help="Baseline to sign."),
    name: str = typer.Option(..., "--name", help="Who approves."),
    role: str = typer.Option(..., "--role", help="In what role (e.g. controls lead)."),
    statement: str = typer.Option(..., "--statement", help="What is approved, in words."),
    accept: List[str] = typer.Option(
        [], "--accept", metavar="ID@LOOP:LABEL", help="Accept this failing, error, stale or "
        "unverified cell explicitly (repeatable); listed in the sign-off record."),
    as_of: Optional[str] = typer.Option(
        None, "--as-of", metavar="YYYY-MM-DD", help="Judge waiver expiry on this day (today "
        "or later; default: today, UTC)."),
):
    """Sign a baseline: record an approval bound to the SHA-256 of its matrix.  Refused when
    the ledger's results no longer match the frozen ones, or when a failing, error, stale or
    unverified cell is neither covered by a live waiver nor named with --accept."""
    from ..signoff import sign_baseline

    with open_ledger() as lg:
        so = sign_baseline(lg, baseline_name, signer=name, role=role, statement=statement,
                           accept=accept, as_of=as_of)
    typer.echo(f"signed {so.baseline} by {so.name} ({so.role})")
    typer.echo(f"  matrix SHA-256 {so.matrix_hash}")
    typer.echo(f"  chain head before signing {so.chain_head}")
    for line in covered_lines(so):
        typer.echo(f"  {line}")


def covered_lines(so) -> list[str]:
    """One line per cell a sign-off accepted explicitly or through a waiver."""
    out = [f"accepted {c['requirement']} on {c['loop']}/{c['revision']} ({c['verdict']})"
           for c in so.accepted]
    for w in so.waivers:
        until = "; ".join(x for x in (f"until {w['expires_on']}" if w.get("expires_on") else "",
                                      w.get("condition", "")) if x) or "no expiry"
        out.append(f"waived {w['requirement']} on {w['loop']}/{w['revision']} ({w['verdict']}) "
                   f"by waiver {w['waiver']}, {w['approver']} ({w['role']}): {w['reason']} "
                   f"[{until}]")
    return out


@commands.command("audit")
@errors_to_exit
def audit_cmd(as_json: bool = JSON_OPTION):
    """Recompute every record hash, the hash chain (time stamps included), every result's
    and cached metric value's row hash and every sign-off's matrix; print what was covered
    and name each finding; exit 1 when anything is wrong."""
    from ..audit import audit

    with open_ledger() as lg:
        rep = audit(lg)
    if as_json:
        emit_json({"ok": rep.ok, "links": rep.links, "records": rep.records,
                   "signoffs": rep.signoffs, "head": rep.head,
                   "checked_at": rep.checked_at, "findings": list(rep.findings)})
    else:
        typer.echo(f"audit covers: {rep.coverage()}")
        typer.echo(f"  chain head {rep.head}")
        for f in rep.findings:
            typer.echo(f"  {f}")
        typer.echo("  ledger intact" if rep.ok else f"  {len(rep.findings)} problem(s) found")
    if not rep.ok:
        raise typer.Exit(1)
