"""``loopledger revision add/list/show`` (controller revisions: lineage, rationale),
``loopledger verify`` (bring verification up to date) and ``loopledger results`` (the verdicts
of one revision)."""

from __future__ import annotations

from typing import Optional

import typer

from ..errors import UsageError
from .common import (CAUTION, JSON_OPTION, WIDE_OPTION, emit_json, errors_to_exit, open_ledger,
                     set_wide)
from .history import ExitOn, exit_status, print_regressions
from .output import say, short, short_variant, table

__all__ = ["group", "commands", "rev_add", "rev_list", "rev_show", "verify_cmd", "results_cmd",
           "print_results"]

#: mounted as ``loopledger revision`` by ``ledger/cli/__init__.py``
group = typer.Typer(help="Controller revisions: lineage, rationale.", no_args_is_help=True)
#: top-level commands (``verify``, ``results``), added to the root by ``ledger/cli/__init__.py``
commands = typer.Typer()

# the verdict word, failing ones in capitals (a cue that survives without colour)
_MARK = {"pass": "pass", "fail": "FAIL", "error": "ERROR", "stale": "stale", "n/a": "n/a"}


def print_results(results, title: str) -> None:
    """The verdict table of one revision's results, then the verdict counts."""
    if not results:
        typer.echo("  no applicable requirements with a metric")
        return
    from ..display import headroom_text, value_text
    from ..yieldbound import bound_text

    rows = []
    for r in results:
        head = headroom_text(r.value, r.headroom, r.headroom_fraction, r.unit, r.limit_text)
        head = head.replace(" of the limit)", ")")
        rows.append([r.requirement, _MARK.get(r.verdict, r.verdict),
                     value_text(r.value, r.unit, r.limit_text), r.limit_text,
                     head, r.worst_variant or "-",
                     "-" if r.pass_fraction is None else f"{r.pass_fraction:.0%}",
                     "" if bound_text(r) == "no samples" else bound_text(r),
                     short(r.reason, 50) or ""])
    table(["ID", "verdict", "worst value", "limit", "headroom", "worst variant", "pass",
           "yield bound", "note"],
          rows, title=title, drop=("note", "yield bound", "pass", "worst variant"),
          shorten={"worst variant": short_variant},
          quiet={"pass": lambda v: v == "100%"})
    if any(bound_text(r) == "no samples" for r in results):
        typer.echo("  yield bound: none, the plant family has no random samples (corners and "
                   "models are no random draws)")
    counts = {}
    for r in results:
        counts[r.verdict] = counts.get(r.verdict, 0) + 1
    typer.echo("  " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items())))


@group.command("add")
@errors_to_exit
def rev_add(loop: str = typer.Argument(..., help="Loop name."),
            controller: str = typer.Argument(..., help="Controller model text."),
            why: str = typer.Option(..., "--why", help="Rationale: why this change (required)."),
            parent: Optional[str] = typer.Option(None, "--parent", help="Parent revision label (default: the loop's tip)."),
            root: bool = typer.Option(False, "--root", help="Start a new root (no parent)."),
            label: Optional[str] = typer.Option(None, "--label", help="Label (default r<N>)."),
            no_verify: bool = typer.Option(False, "--no-verify", help="Record only; verify later with 'loopledger verify'."),
            discretize: Optional[str] = typer.Option(None, "--discretize", help="Digital loops: how a controller in s becomes the one that runs: zoh, tustin, tustin@FREQ (rad/s, or e.g. 30Hz) or matched."),
            number_format: Optional[str] = typer.Option(None, "--number-format", help="Digital loops: number format of the stored coefficients, fixed:W/F or single; verification uses the quantised coefficients."),
            prefilter: str = typer.Option("", "--prefilter", help="The revision's own reference prefilter / feedforward shaping F (model text; takes precedence over the loop's)."),
            anti_windup: str = typer.Option("none", "--anti-windup", help="none, clamping or back-calculation (large moves)."),
            anti_windup_gain: Optional[float] = typer.Option(None, "--anti-windup-gain", help="Back-calculation gain, 1/s."),
            exit_on: Optional[str] = typer.Option(None, "--exit-on", help="Exit with status 3 (the revision is still recorded) when a requirement broke against the parent ('broke'), an approved one broke ('approved-broke'), or anything broke or eroded ('any')."),
):
    """Record a controller revision and verify every applicable requirement on it at once."""
    try:
        exit_choice = ExitOn(exit_on) if exit_on else None
    except ValueError as e:
        raise UsageError(f"--exit-on must be one of {', '.join(c.value for c in ExitOn)}") from e
    code = 0
    with open_ledger() as lg:
        r = lg.add_revision(loop, controller, rationale=why,
                            parent=None if root else (parent or "tip"), label=label,
                            verify=not no_verify, discretization=discretize,
                            number_format=number_format, prefilter=prefilter,
                            anti_windup=anti_windup, anti_windup_gain=anti_windup_gain)
        typer.echo(f"revision {r.loop}/{r.label} recorded (parent {r.parent or 'none'})")
        if r.verified:
            typer.echo(f"  verified as {short(r.verified, 100)}")
        if not no_verify:
            d = print_regressions(lg, r.loop, r.label)
            print_results(lg.results(r.loop, r.label), f"verdicts for {r.loop}/{r.label}")
            say(CAUTION)
            code = exit_status(d, exit_choice) if d.old is not None else 0
    if code:
        raise typer.Exit(code)


def _tree_lines(nodes, prefix: str = "") -> list[str]:
    out = []
    for i, n in enumerate(nodes):
        last = i == len(nodes) - 1
        r = n.revision
        out.append(f"{prefix}{'└─ ' if last else '├─ '}{r.label}  {r.created_at:%Y-%m-%d %H:%M}  "
                   f"{r.author}  {short(r.rationale, 60)}")
        out.extend(_tree_lines(n.children, prefix + ("   " if last else "│  ")))
    return out


@group.command("list")
@errors_to_exit
def rev_list(loop: str = typer.Argument(..., help="Loop name."), as_json: bool = JSON_OPTION):
    """Show a loop's revisions as a lineage tree."""
    with open_ledger() as lg:
        if as_json:
            return emit_json(lg.revisions(loop))
        tree = lg.lineage(loop)
    typer.echo(f"loop {loop}")
    for line in _tree_lines(tree):
        typer.echo(line)


@group.command("show")
@errors_to_exit
def rev_show(loop: str, label: Optional[str] = typer.Argument(None, help="Revision label (default: tip)."),
             as_json: bool = JSON_OPTION):
    """Show one revision: controller, rationale, lineage."""
    with open_ledger() as lg:
        r = lg.revision(loop, label)
        lg_sample_time = lg.loop(r.loop).sample_time
    if as_json:
        return emit_json(r)
    typer.echo(f"revision {r.loop}/{r.label}  by {r.author}  {r.created_at:%Y-%m-%d %H:%M}")
    typer.echo(f"  parent      {r.parent or 'none (root)'}")
    if r.children:
        typer.echo(f"  children    {', '.join(r.children)}")
    typer.echo(f"  controller  {r.controller}")
    if r.discretization or r.number_format:
        from ..digital import continuous_review, method_description

        if r.discretization:
            typer.echo(f"  method      {r.discretization} ({method_description(r.discretization)})")
        if r.number_format:
            typer.echo(f"  format      {r.number_format} (coefficients as stored)")
        typer.echo(f"  verified    {r.verified or r.controller}")
        ts = lg_sample_time
        review = continuous_review(r.verified or r.controller, ts, r.discretization)
        if review:
            typer.echo(f"  in s        {review}  (inverse of the method, for review)")
    if r.prefilter:
        typer.echo(f"  prefilter   {r.prefilter}  (the revision's own, in place of the loop's)")
    if r.anti_windup != "none":
        gain = f", gain {r.anti_windup_gain:g} 1/s" if r.anti_windup_gain is not None else ""
        typer.echo(f"  anti-windup {r.anti_windup}{gain}")
    typer.echo(f"  hash        {r.content_hash[:16]}")
    typer.echo("  rationale")
    for line in r.rationale.splitlines():
        typer.echo(f"    {line}")


@commands.command("verify")
@errors_to_exit
def verify_cmd(loop: Optional[str] = typer.Option(None, "--loop", help="Only this loop."),
               tips: bool = typer.Option(False, "--tips", help="Only the latest revision of each loop."),
               workers: Optional[int] = typer.Option(None, "--workers", help="Parallel processes on this machine (0 = one per core, the default without a cluster)."),
               cluster: Optional[str] = typer.Option(None, "--cluster", metavar="ADDRESS", help="Compute on a Dask cluster: a scheduler address (tcp://host:8786) or local:N for N worker processes here (default $LOOPLEDGER_CLUSTER; needs loopledger[cluster]).")):
    """Bring verification up to date: compute every missing result (new requirement or plant
    versions, interrupted runs), reusing cached metric values.  Progress (tasks done, tasks
    per second, time left) goes to standard error."""
    from ..config import cluster_address
    from .progress import TaskProgress

    if cluster is None and workers is None:
        cluster = cluster_address() or None
    if cluster is not None and not cluster.strip():
        raise UsageError("--cluster needs an address (tcp://host:8786) or local:N")
    if cluster is not None and workers not in (None, 0, 1):
        raise UsageError("give --workers or --cluster, not both: a cluster's workers are its "
                         "own processes")
    with open_ledger() as lg, TaskProgress("verifying") as bar:
        rep = lg.verify(loop, tips_only=tips, progress=bar.update,
                        workers=1 if cluster is not None else (0 if workers is None else workers),
                        cluster=cluster)
    n_res = sum(r["results"] for r in rep)
    n_cmp = sum(r["computed"] for r in rep)
    typer.echo(f"verified {len(rep)} revision(s): {n_res} result(s) written, "
               f"{n_cmp} metric request(s) computed, the rest from the cache")


@commands.command("results")
@errors_to_exit
def results_cmd(loop: str = typer.Argument(..., help="Loop name."),
                label: Optional[str] = typer.Argument(None, help="Revision label (default: tip)."),
                why: Optional[str] = typer.Option(None, "--why", metavar="REQ", help="What drives requirement REQ's worst value: the slope of the worst value in each toleranced plant parameter at the worst variant, per tolerance width, ranked (computed now, stored nowhere); 'all' for every requirement."),
                as_json: bool = JSON_OPTION, wide: bool = WIDE_OPTION):
    """Show the verdicts of one revision: worst value over the plant family, headroom,
    the variant that produced it and the fraction of variants that pass."""
    set_wide(wide)
    if why is not None and not why.strip():
        raise UsageError("--why needs a requirement ID (or 'all')")
    with open_ledger() as lg:
        if why is not None:
            from ..verification.drivers import worst_case_drivers

            keys = None if why.strip() == "all" else [why.strip()]
            drivers = worst_case_drivers(lg, loop, label, keys)
        else:
            res = lg.results(loop, label)
        rev = lg.revision(loop, label)
        members = []
        if why is None:
            from ..history.matrix import measured_members

            members = sorted({m for ms in measured_members(lg, res).values() for m in ms})
    if why is not None:
        if as_json:
            return emit_json(drivers)
        from .drivers import print_drivers

        for d in drivers:
            print_drivers(d)
        return say(CAUTION)
    if as_json:
        return emit_json(res)
    print_results(res, f"verdicts for {rev.loop}/{rev.label}")
    if members:
        worst = [r.requirement for r in res if r.worst_variant in members]
        typer.echo(f"  measured members: {', '.join(members)}")
        if worst:
            typer.echo(f"  worst on a measured member: {', '.join(worst)}")
    say(CAUTION)
