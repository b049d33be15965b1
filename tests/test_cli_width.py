"""Tables that fit: ``results``, ``diff`` and ``trace`` on a copy of the demo ledger at 80 and
120 columns, no line longer than the terminal; ``--wide`` keeps every column in one table.
(Readability at 80 columns is a fact of the trade, common practice, no source.)"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ledger.cli import app

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "sample_db" / "demo.db"

COMMANDS = [
    ("results", "gantry-x"), ("results", "pipette-z"), ("results", "plate-shaker"),
    ("diff", "gantry-x", "r6"), ("diff", "pipette-z"), ("diff", "gantry-x", "r3"),
    ("trace",),
]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    assert DEMO.exists(), "sample_db/demo.db is missing; run sample_db/build_demo.py"
    copy = tmp_path_factory.mktemp("width") / "demo.db"
    shutil.copy(DEMO, copy)
    return copy


def _run(demo, width, *args):
    res = CliRunner().invoke(app, ["--db", str(demo), *args],
                             env={"COLUMNS": str(width), "LOOPLEDGER_AUTHOR": "tester"})
    assert res.exit_code == 0, res.output
    return res.output


@pytest.mark.parametrize("width", [80, 120])
@pytest.mark.parametrize("args", COMMANDS, ids=lambda a: " ".join(a))
def test_no_line_longer_than_the_terminal(demo, width, args):
    out = _run(demo, width, *args)
    long = [line for line in out.splitlines() if len(line) > width]
    assert not long, f"{len(long)} line(s) over {width} columns:\n" + "\n".join(long)
    assert "does not replace hardware testing" in out.replace("\n  ", " ")


def test_narrow_table_keeps_every_value_and_wide_keeps_one_table(demo):
    narrow = _run(demo, 80, "diff", "gantry-x", "r6")
    wide = _run(demo, 80, "--wide", "diff", "gantry-x", "r6")
    # --wide: the worst-variant column in the table, with full names
    assert "worst variant" in wide.splitlines()[2] or "worst variant" in wide
    assert any(len(line) > 80 for line in wide.splitlines())
    # narrow: the worst variants move to detail lines with their full names
    for line in wide.splitlines():
        if "corner:mp- -> corner:mp+" in line:
            assert "corner:mp- -> corner:mp+" in narrow
    for key in ("GX-02", "GX-03", "GX-04"):
        assert key in narrow


def test_values_read_in_the_limits_unit(demo):
    out = _run(demo, 120, "results", "gantry-x")
    row = next(line for line in out.splitlines() if line.startswith("GX-01"))
    assert " ms " in row and "<= 200 ms" in row   # a settling time beside a limit in ms


def test_wide_after_the_command(demo):
    for args in (("diff", "gantry-x", "r6", "--wide"), ("results", "gantry-x", "--wide"),
                 ("trace", "--wide")):
        out = _run(demo, 80, *args)
        assert "not in the table" not in out
    assert any(len(line) > 80 for line in _run(demo, 80, "diff", "gantry-x", "r6",
                                               "--wide").splitlines())


def test_a_value_every_row_shares_is_said_once(capsys, monkeypatch):
    # A column left out of a narrow table whose value is the same in every row gets one
    # "every row:" line, not one detail line per row; other values keep their rows.
    from ledger.cli import output
    from ledger.cli.common import state

    monkeypatch.setattr(state, "wide", False)       # an earlier command may have left --wide
    monkeypatch.setenv("COLUMNS", "40")
    rows = [[f"R-{i}", "pass", "a long text that does not fit", "77.9 % at 95 %"]
            for i in range(4)]
    rows[2][2] = "another long text, this row only"
    output.table(["ID", "verdict", "note", "yield bound"], rows,
                 drop=("yield bound", "note"))
    out = " ".join(capsys.readouterr().out.split())     # wrapped lines joined
    assert out.count("77.9 % at 95 %") == 1 and "every row: yield bound 77.9 % at 95 %" in out
    assert "R-2: note another long text, this row only" in out
    assert out.count("a long text that does not fit") == 3
    # with fewer than three rows each row keeps its own line
    output.table(["ID", "verdict", "note", "yield bound"], rows[:2],
                 drop=("yield bound", "note"))
    assert capsys.readouterr().out.count("77.9 % at 95 %") == 2
