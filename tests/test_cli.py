"""The CLI end to end on a temporary ledger: every command, --json listings, one-line errors
with a non-zero exit and nothing written, and the docs covering every command."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ledger.cli import app

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def cli(db_url, monkeypatch):
    monkeypatch.setenv("LOOPLEDGER_DB", db_url)
    monkeypatch.setenv("LOOPLEDGER_AUTHOR", "tester")
    monkeypatch.setenv("COLUMNS", "200")
    runner = CliRunner()

    def call(*args, ok=True):
        res = runner.invoke(app, list(args))
        if ok:
            assert res.exit_code == 0, (args, res.output)
        return res

    call("init")
    return call


def _build(cli):
    cli("plant", "add", "pz", "K/(s*(tau_m*s+1))", "--param", "K=180:10%",
        "--param", "tau_m=0.03:20%", "--param", "tau_e=0.0004",
        "--fidelity", "full=K/(s*(tau_m*s+1)*(tau_e*s+1))", "--input-unit", "A",
        "--output-unit", "mm")
    cli("loop", "add", "pz", "--plant", "pz", "--actuator-limit", "3")
    cli("requirement", "add", "SYS-1", "--title", "Move settles", "--statement", "Moves settle.")
    cli("requirement", "add", "PZ-1", "--title", "PM", "--statement", "PM >= 45 deg.",
        "--metric", "phase_margin", "--limit", ">= 45 deg", "--loop", "pz",
        "--derives-from", "SYS-1", "--status", "approved")
    cli("revision", "add", "pz", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", "--why", "first")


def test_end_to_end(cli):
    _build(cli)
    out = cli("requirement", "edit", "PZ-1", "--limit", ">= 50 deg", "--note", "tighter").output
    assert "version 2" in out
    out = cli("revision", "add", "pz", "pid(kp=0.5, ki=4, kd=0.006, tf=0.0008)", "--why", "more gain").output
    assert "pz/r2" in out
    cli("revision", "add", "pz", "pid(kp=0.45, ki=5, kd=0.006, tf=0.0008)", "--why", "branch", "--parent", "r1")
    tree = cli("revision", "list", "pz").output
    assert re.search(r"r1 .*\n.*├─ r2.*\n.*└─ r3", tree), tree
    shown = cli("revision", "show", "pz", "r2").output
    assert "more gain" in shown and "parent      r1" in shown
    hist = cli("requirement", "show", "PZ-1", "--history").output
    assert ">= 45 deg" in hist and ">= 50 deg" in hist
    assert "pz" in cli("loop", "show", "pz").output
    assert "tau_m" in cli("plant", "show", "pz").output
    assert "phase_margin" in cli("metrics").output


def test_json_listings(cli):
    _build(cli)
    plants = json.loads(cli("plant", "list", "--json").output)
    assert plants[0]["name"] == "pz" and plants[0]["params"]["K"]["nominal"] == 180.0
    loops = json.loads(cli("loop", "list", "--json").output)
    assert loops[0]["tip"] == "r1" and loops[0]["actuator_limit"] == 3.0
    reqs = json.loads(cli("requirement", "list", "--json").output)
    assert {r["key"] for r in reqs} == {"PZ-1", "SYS-1"}
    revs = json.loads(cli("revision", "list", "pz", "--json").output)
    assert revs[0]["rationale"] == "first"
    assert json.loads(cli("requirement", "show", "PZ-1", "--json").output)["limit_value"] == 45.0
    assert json.loads(cli("metrics", "--json").output)


def test_import_export_commands(cli, tmp_path):
    _build(cli)
    out = tmp_path / "e.toml"
    cli("export", str(out))
    assert 'id = "PZ-1"' in out.read_text()
    res = cli("import", str(out))
    assert "unchanged" in res.output


@pytest.mark.parametrize(
    "args, match",
    [
        (("revision", "add", "pz", "pid(kp=1, ki=2", "--why", "x"), "column"),
        (("revision", "add", "pz", "pid(kp=1, ki=2)", "--why", " "), "rationale is required"),
        (("revision", "add", "pz", "pid(kp=1, ki=2)", "--why", "x", "--parent", "r42"), "no revision 'r42'"),
        (("requirement", "add", "PZ-2", "--title", "t", "--statement", "s", "--metric",
          "settling_time", "--limit", "<= 3 parsecs"), "unit"),
        (("requirement", "add", "PZ-2", "--title", "t", "--statement", "s", "--derives-from", "NOPE"), "NOPE"),
        (("requirement", "edit", "SYS-1", "--derives-from", "PZ-1"), "cycle"),
        (("plant", "add", "q", "1/(s+"), "column"),
        (("import", "/nonexistent/spec.toml"), "cannot read spec file"),
    ],
)
def test_errors_are_one_line_nonzero_and_write_nothing(cli, args, match, tmp_path):
    _build(cli)
    from ledger.api import open_ledger

    with open_ledger(os.environ["LOOPLEDGER_DB"]) as lg:
        before = lg.counts()
    res = cli(*args, ok=False)
    assert res.exit_code == 1
    lines = [l for l in res.output.splitlines() if l.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: ") and re.search(match, lines[0]), res.output
    with open_ledger(os.environ["LOOPLEDGER_DB"]) as lg:
        assert lg.counts() == before


def test_corrupt_toml_and_missing_ledger(cli, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[[plant]\nname = 1")
    res = cli("import", str(bad), ok=False)
    assert res.exit_code == 1 and "not valid TOML" in res.output
    res = cli("--db", str(tmp_path / "none.db"), "loop", "list", ok=False)
    assert res.exit_code == 1 and "no ledger at" in res.output
    assert not (tmp_path / "none.db").exists()


def test_console_script_runs(tmp_path):
    """The installed entry point works as a user would run it."""
    env = dict(os.environ, LOOPLEDGER_DB=str(tmp_path / "s.db"))
    exe = Path(sys.executable).with_name("loopledger")
    res = subprocess.run([str(exe), "--help"], capture_output=True, text=True, env=env, timeout=60)
    assert res.returncode == 0 and "revision" in res.stdout and "Caution" in res.stdout
    res = subprocess.run([str(exe), "loop", "list"], capture_output=True, text=True, env=env, timeout=60)
    assert res.returncode == 1 and res.stderr.strip().startswith("error: no ledger at")


def _all_commands():
    import typer.main

    cmd = typer.main.get_command(app)
    out = []

    def walk(group, prefix):
        for name, sub in group.commands.items():
            if hasattr(sub, "commands"):
                walk(sub, prefix + [name])
            else:
                out.append((" ".join(prefix + [name]), sub))

    walk(cmd, [])
    return out


def test_every_command_has_help_and_is_documented():
    doc = (ROOT / "docs" / "cli.md").read_text()
    for name, cmd in _all_commands():
        assert cmd.help and cmd.help.strip(), f"{name} has no help text"
        assert f"loopledger {name}" in doc, f"docs/cli.md does not cover 'loopledger {name}'"
        for p in cmd.params:
            if p.param_type_name == "option" and p.name != "help":
                assert p.help, f"{name} option {p.opts} has no help"


def _doc_sections(doc: str) -> dict:
    """docs/cli.md sections by command: heading line (inside the backticks) and body text."""
    out = {}
    for m in re.finditer(r"^### `loopledger ([^`]*)`\n(.*?)(?=^#{2,3} |\Z)", doc, re.M | re.S):
        head = m.group(1)
        name = re.match(r"[a-z][a-z-]*(?: [a-z][a-z-]*)?", head).group(0)
        out.setdefault(name, []).append((head, m.group(2)))
    return out


#: options the command line parser leaves optional but the command refuses to run without
#: (checked below by running the command without each)
REFUSED_WITHOUT = {"requirement add": (("--title", "t"), ("--statement", "s"))}


def test_commands_refuse_to_run_without_these_options(tmp_path, monkeypatch):
    monkeypatch.setenv("LOOPLEDGER_DB", str(tmp_path / "r.db"))
    runner = CliRunner()
    assert runner.invoke(app, ["init"]).exit_code == 0
    for name, opts in REFUSED_WITHOUT.items():
        for i, (opt, _) in enumerate(opts):
            rest = [a for j, o in enumerate(opts) if j != i for a in o]
            res = runner.invoke(app, [*name.split(), "X-1", *rest])
            word = opt.lstrip("-")
            assert res.exit_code == 1 and f"{word} is required" in res.output, (name, opt)


def test_docs_name_every_required_option():
    """Each required option is in the command's heading outside [...] or in a sentence of its
    section that says "required" and names no optional option (`requirement add` needed
    --title while the docs read "`--title`, `--statement` (required), `--rationale`, ...")."""
    sections = _doc_sections((ROOT / "docs" / "cli.md").read_text())
    for name, cmd in _all_commands():
        extra = {o for o, _ in REFUSED_WITHOUT.get(name, ())}
        required = [p for p in cmd.params if p.param_type_name == "option"
                    and (p.required or set(p.opts) & extra)]
        if not required:
            continue
        # the longest heading prefix that is this command ('requirement add', not 'requirement')
        secs = [sec for key, v in sections.items() for sec in v
                if sec[0] == name or sec[0].startswith(name + " ")]
        assert secs, f"docs/cli.md has no section for 'loopledger {name}'"
        must = {o for p in required for o in p.opts}
        for p in required:
            ok = False
            for head, body in secs:
                bare = re.sub(r"\[[^\]]*\]", "", head)
                sentences = re.split(r"(?<=\.)\s+", " ".join(body.split()))
                for t in sentences:
                    named = set(re.findall(r"`(--[a-z][a-z-]*)", t))
                    if "required" in t and named & set(p.opts) and named <= must:
                        ok = True
                if any(o in bare.split() for o in p.opts):
                    ok = True
            assert ok, f"docs/cli.md: 'loopledger {name}' does not say {p.opts[0]} is required"


def test_revision_add_exit_on_broke(cli):
    # L = k/(s(s+1)): pm(1) = 51.8 deg, pm(2) = 38.7 deg (closed form, see test_verify.py)
    cli("plant", "add", "p", "1/(s*(s+1))")
    cli("loop", "add", "p", "--plant", "p")
    cli("requirement", "add", "P-1", "--title", "pm", "--statement", "pm >= 45 deg",
        "--metric", "phase_margin", "--limit", ">= 45 deg", "--loop", "p", "--status", "approved")
    cli("revision", "add", "p", "gain(1)", "--why", "first", "--exit-on", "approved-broke")
    res = cli("revision", "add", "p", "gain(2)", "--why", "more gain", "--exit-on",
              "approved-broke", ok=False)
    assert res.exit_code == 3 and "BROKE" in res.output and "p/r2 recorded" in res.output
    res = cli("revision", "add", "p", "gain(0.9)", "--why", "less", "--exit-on", "broke")
    assert res.exit_code == 0


def test_output_closed_by_its_reader_stops_quietly(tmp_path):
    """``loopledger ... | head``: when the reader closes the pipe the command stops quietly
    (no 'internal error', no traceback) with a non-zero status (common practice, no source).
    Both the output of a small table (written at exit) and of a long one (written while the
    command runs) are covered."""
    import os
    import subprocess
    import sys

    from ledger.api import open_ledger

    db = tmp_path / "p.db"
    with open_ledger(db, create=True, author="tester") as lg:
        lg.add_plant("p", "1/(s*(s+1))")
    for args in (["plant", "list"], ["metrics", "--json"]):
        read_end, write_end = os.pipe()
        os.close(read_end)  # the reader is gone before anything is written
        proc = subprocess.run([sys.executable, "-m", "ledger", "--db", str(db), *args],
                              stdout=write_end, stderr=subprocess.PIPE, text=True, timeout=120)
        os.close(write_end)
        assert proc.returncode == 1, (args, proc.stderr)
        assert proc.stderr.strip() == "", (args, proc.stderr)
