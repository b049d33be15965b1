"""Conventions users expect of a CLI and its files.

Sources: the Click/Typer convention that a usage error exits with status 2 (Click's
``UsageError.exit_code``; common practice, no other source); RFC 4180 for CSV quoting, read back
by pandas (an independent reader); JSON Schema draft 2020-12, checked by the ``jsonschema``
package (an independent validator).
"""

from __future__ import annotations

import copy
import json

import pytest
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.cli import app
from ledger.exports import JSON_SCHEMA_NAME, SCHEMA_VERSION, export_matrix, json_schema_path
from ledger.history.matrix import build_matrix

HOSTILE = ['Plate #3 settle', 'gain, "fast" corner', "it's #1, really", 'semi;colon # and "q"',
           '#starts with hash']


@pytest.fixture
def hostile(tmp_path):
    lg = open_ledger(tmp_path / "h.db", create=True, author="tester")
    lg.add_plant("p", "K/(s*(tau*s+1))", params={"K": 180.0, "tau": 0.03})
    lg.add_loop("p", "p", kind="position")
    for i, title in enumerate(HOSTILE):
        lg.add_requirement(f"H-{i}", title=title, statement=f"line one, #{i}\n\"line\" two",
                           metric="phase_margin", limit=">= 45 deg", loops=["p"])
    lg.add_revision("p", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", rationale="first")
    yield lg
    lg.close()


def test_csv_recipe_round_trips_hostile_text_with_pandas(hostile, tmp_path):
    pd = pytest.importorskip("pandas")
    m = build_matrix(hostile, "all")
    p = export_matrix(m, tmp_path / "m.csv")
    # the documented recipe (docs/exports.md, CSV)
    df = pd.read_csv(p, skiprows=1, keep_default_na=False, na_values=[""])
    want = {q.key: q for q in hostile.requirements()}
    assert sorted(df["requirement"]) == sorted(want)
    for _, row in df.iterrows():
        q = want[row["requirement"]]
        assert row["title"] == q.title and row["statement"] == q.statement
        assert row["limit"] == ">= 45 deg"
    # the former recipe, comment="#", cuts these titles (why the layout changed)
    cut = pd.read_csv(p, skiprows=1, comment="#", keep_default_na=False)
    assert "Plate #3 settle" not in set(cut.get("title", []))


def test_json_export_validates_against_the_shipped_schema(hostile, tmp_path):
    jsonschema = pytest.importorskip("jsonschema")
    m = build_matrix(hostile, "all")
    doc = json.loads(export_matrix(m, tmp_path / "m.json").read_text(encoding="utf-8"))
    assert doc["schema"] == SCHEMA_VERSION and doc["json_schema"] == JSON_SCHEMA_NAME
    path = json_schema_path()
    assert path.name == doc["json_schema"] and path.is_file()
    schema = json.loads(path.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    errors = list(validator.iter_errors(doc))
    assert not errors, [e.message for e in errors[:3]]
    # the schema does refuse a broken document (so the check can fail)
    bad = copy.deepcopy(doc)
    bad["rows"][0]["value"] = "fast"
    del bad["rows"][0]["verdict"]
    assert len(list(validator.iter_errors(bad))) >= 2


def test_schema_file_ships_in_the_package():
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    assert json_schema_path().is_relative_to(root / "ledger")
    cfg = tomllib.loads((root / "pyproject.toml").read_text())
    assert cfg["tool"]["hatch"]["build"]["targets"]["wheel"]["packages"] == ["ledger"]


@pytest.mark.parametrize("args, hint", [
    (["plant", "add"], "loopledger plant add --help"),
    (["results"], "loopledger results --help"),
    (["no-such-command"], "loopledger --help"),
    (["plant", "add", "x", "1/s", "--bogus"], "loopledger plant add --help"),
    (["--digits", "many", "metrics"], "loopledger --help"),
])
def test_usage_errors_are_one_line_with_a_hint_and_exit_2(tmp_path, args, hint):
    db = tmp_path / "u.db"
    res = CliRunner().invoke(app, ["--db", str(db), *args], prog_name="loopledger",
                             env={"LOOPLEDGER_AUTHOR": "tester", "COLUMNS": "80"})
    assert res.exit_code == 2, res.output
    lines = [line for line in res.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    assert f"(see '{hint}')" in lines[0]
    assert not db.exists()  # nothing written


def test_shell_completion_is_installable():
    runner = CliRunner()
    res = runner.invoke(app, ["--help"], prog_name="loopledger", env={"COLUMNS": "200"})
    assert "--install-completion" in res.output and "--show-completion" in res.output
    # the script --show-completion prints (Typer's own; the shell is detected from the process
    # tree, so it is asked for by name here)
    from typer.completion import get_completion_script

    script = get_completion_script(prog_name="loopledger", complete_var="_LOOPLEDGER_COMPLETE",
                                   shell="bash")
    assert "_LOOPLEDGER_COMPLETE=complete_bash" in script
    # a completion request, as the installed bash function makes it
    got = runner.invoke(app, [], prog_name="loopledger",
                        env={"_LOOPLEDGER_COMPLETE": "complete_bash",
                             "COMP_WORDS": "loopledger pla", "COMP_CWORD": "1"})
    assert "plant" in got.output.split()


def test_jinja2_is_not_a_dependency():
    # the HTML report is built with explicit escaping (ledger/exports/html.py); jinja2 is
    # neither imported nor declared
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    cfg = tomllib.loads((root / "pyproject.toml").read_text())
    deps = cfg["project"]["dependencies"] + sum(cfg["project"]["optional-dependencies"].values(), [])
    assert not any(d.lower().startswith("jinja2") for d in deps)
    assert not any("jinja2" in p.read_text() for p in (root / "ledger").rglob("*.py"))
