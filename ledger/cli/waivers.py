"""``loopledger waiver add/list/show/withdraw``: recorded, approved deviations (a failing or
error verdict accepted on a revision or a baseline, with reason, approver, role and until
when); append-only and chained, a withdrawal is a record of its own."""

from __future__ import annotations

from typing import Optional

import typer

from ..errors import UsageError
from .common import CAUTION, JSON_OPTION, emit_json, errors_to_exit, open_ledger
from .output import say, table

__all__ = ["group", "waiver_add", "waiver_list", "waiver_show", "waiver_withdraw"]

#: mounted as ``loopledger waiver`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Waivers: a failing or error verdict accepted on a revision or a "
                    "baseline, with reason, approver, role and expiry or condition.",
                    no_args_is_help=True)

AS_OF = typer.Option(None, "--as-of", metavar="YYYY-MM-DD",
                     help="Judge expiry on this day (default: today, UTC).")


def _dict(w, day) -> dict:
    from ..records import to_jsonable

    return {**to_jsonable(w), "scope": w.scope, "status": w.status(day)}


def _show(w, day) -> None:
    typer.echo(f"waiver {w.id}: {w.requirement} on {w.scope}  ({w.status(day)} as of "
               f"{day.isoformat()})")
    typer.echo(f"  reason: {w.reason}")
    typer.echo(f"  approved by {w.approver} ({w.role}), recorded "
               f"{w.created_at:%Y-%m-%d %H:%M} UTC by {w.author}")
    typer.echo(f"  expires: {w.expires_on or 'no date'}")
    if w.condition:
        typer.echo(f"  condition: {w.condition}")
    if w.withdrawn_at is not None:
        typer.echo(f"  withdrawn {w.withdrawn_at:%Y-%m-%d %H:%M} UTC by {w.withdrawn_by} "
                   f"({w.withdrawn_role}): {w.withdrawal_reason}")
    typer.echo(f"  record SHA-256 {w.record_hash}")


@group.command("add")
@errors_to_exit
def waiver_add(
    requirement: str = typer.Argument(..., metavar="ID", help="Requirement ID."),
    loop: Optional[str] = typer.Option(None, "--loop", help="Loop of the revision waived."),
    revision: Optional[str] = typer.Option(None, "--revision", metavar="LABEL",
                                           help="Revision label (default: the loop's tip)."),
    baseline: Optional[str] = typer.Option(None, "--baseline", help="Waive it on every "
                                           "revision this baseline freezes instead."),
    reason: str = typer.Option(..., "--reason", help="Why the deviation is acceptable."),
    approver: str = typer.Option(..., "--approver", help="Who approves it."),
    role: str = typer.Option(..., "--role", help="The approver's role."),
    expires: Optional[str] = typer.Option(None, "--expires", metavar="YYYY-MM-DD",
                                          help="Last day the waiver counts."),
    condition: str = typer.Option("", "--condition", help="Free-text condition, e.g. "
                                  "'until the next hardware build'."),
    as_of: Optional[str] = AS_OF,
):
    """Record a waiver of a requirement's failing (or error) verdict on a revision or a
    baseline.  The cell then shows 'waived' (never pass), the gate holds on it and sign-off
    accepts it, until it expires or is withdrawn."""
    if revision is not None and loop is None:
        raise UsageError("--revision needs --loop")
    with open_ledger() as lg:
        w = lg.add_waiver(requirement, loop=loop, revision=revision, baseline=baseline,
                          reason=reason, approver=approver, role=role, expires=expires,
                          condition=condition, as_of=as_of)
    typer.echo(f"waiver {w.id}: {w.requirement} on {w.scope}, approved by {w.approver} "
               f"({w.role}), {w.until()}")


@group.command("list")
@errors_to_exit
def waiver_list(
    requirement: Optional[str] = typer.Option(None, "--requirement", metavar="ID",
                                              help="Only this requirement's waivers."),
    live: bool = typer.Option(False, "--live", help="Only waivers that count (neither "
                              "expired nor withdrawn)."),
    as_of: Optional[str] = AS_OF,
    as_json: bool = JSON_OPTION,
):
    """List waivers with their state on the day (live, expired, withdrawn)."""
    from ..waivers import as_date

    day = as_date(as_of)
    with open_ledger() as lg:
        ws = lg.waivers(requirement)
    if live:
        ws = [w for w in ws if w.live(day)]
    if as_json:
        return emit_json([_dict(w, day) for w in ws])
    table(["waiver", "ID", "on", "state", "approver", "until", "reason"],
          [[w.id, w.requirement, w.scope, w.status(day), f"{w.approver} ({w.role})",
            w.until(), w.reason] for w in ws])
    say(CAUTION)


@group.command("show")
@errors_to_exit
def waiver_show(waiver: int = typer.Argument(..., metavar="WAIVER", help="Waiver number."),
                as_of: Optional[str] = AS_OF, as_json: bool = JSON_OPTION):
    """Show one waiver: scope, reason, approver, expiry, condition, withdrawal, hash."""
    from ..errors import NotFoundError
    from ..waivers import as_date

    day = as_date(as_of)
    with open_ledger() as lg:
        found = [w for w in lg.waivers() if w.id == waiver]
    if not found:
        raise NotFoundError(f"no waiver {waiver}; see 'loopledger waiver list'")
    if as_json:
        return emit_json(_dict(found[0], day))
    _show(found[0], day)


@group.command("withdraw")
@errors_to_exit
def waiver_withdraw(
    waiver: int = typer.Argument(..., metavar="WAIVER", help="Waiver number."),
    reason: str = typer.Option(..., "--reason", help="Why it is withdrawn."),
    approver: str = typer.Option(..., "--approver", help="Who withdraws it."),
    role: str = typer.Option(..., "--role", help="Their role."),
):
    """Withdraw a waiver (a new, chained record; the waiver itself is never edited)."""
    with open_ledger() as lg:
        w = lg.withdraw_waiver(waiver, reason=reason, approver=approver, role=role)
    typer.echo(f"waiver {w.id} withdrawn by {w.withdrawn_by} ({w.withdrawn_role})")
