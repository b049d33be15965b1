"""Terminal UI: Pilot tests on a small closed-form ledger, snapshots, and the import boundary.

The ledger: plant G = 1/(s (s+1)), unity feedback, proportional controllers K.
Closed forms used below (textbook second-order results, e.g. Ogata, Modern Control
Engineering, ch. 5 (step response of s^2 + 2 zeta wn s + wn^2) and ch. 7 (phase margin)):

* closed loop s^2 + s + K: wn = sqrt(K), zeta = 1/(2 sqrt(K)),
  overshoot = 100 exp(-pi zeta / sqrt(1 - zeta^2)) %;
* |L(j wc)| = 1 gives wc^4 + wc^2 - K^2 = 0, wc = sqrt((-1 + sqrt(1 + 4 K^2)) / 2),
  phase margin = 90 deg - atan(wc) (in deg);
* arg L never reaches -180 deg, so there is no phase crossover: gain margin = inf.

K = 1: PM 51.83 deg (pass >= 45), wc 0.786 rad/s (fail >= 1), overshoot 16.3 % (pass <= 25).
K = 4: PM 28.02 deg (fail), wc 1.879 rad/s (pass), overshoot 44.4 % (fail).
So r1 -> r2 breaks PM-1 and OS-1, fixes WC-1, leaves GM-1 unchanged.
"""

from __future__ import annotations

import math
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from ledger.api import open_ledger
from tuihelp import press, settle

SNAPSHOTS = Path(__file__).parent / "snapshots"


def wc_of(k: float) -> float:
    # Source: closed form |K/(jw (jw+1))| = 1 (see module docstring)
    return math.sqrt((-1 + math.sqrt(1 + 4 * k * k)) / 2)


def pm_of(k: float) -> float:
    # Source: closed form PM = 180 - 90 - atan(wc) deg
    return 90.0 - math.degrees(math.atan(wc_of(k)))


def os_of(k: float) -> float:
    # Source: second-order overshoot 100 exp(-pi zeta / sqrt(1 - zeta^2)), zeta = 1/(2 sqrt K)
    z = 1 / (2 * math.sqrt(k))
    return 100 * math.exp(-math.pi * z / math.sqrt(1 - z * z))


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    path = tmp_path_factory.mktemp("tui") / "base.db"
    lg = open_ledger(path, create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("pos", "servo")
    lg.add_requirement("SYS-1", title="Robust move", statement="The axis moves robustly.")
    lg.add_requirement("PM-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", parents=["SYS-1"],
                       loops=["pos"], status="approved")
    lg.add_requirement("WC-1", title="Crossover", statement="Gain crossover at least 1 rad/s.",
                       metric="gain_crossover", limit=">= 1 rad/s", parents=["SYS-1"],
                       loops=["pos"])
    lg.add_requirement("GM-1", title="Gain margin", statement="GM at least 6 dB.",
                       metric="gain_margin", limit=">= 6 dB", loops=["pos"])
    lg.add_requirement("OS-1", title="Overshoot", statement="Step overshoot at most 25 %.",
                       metric="overshoot", limit="<= 25 %", parents=["SYS-1"], loops=["pos"])
    lg.add_revision("pos", "1", rationale="unity gain: first closed loop", label="r1")
    lg.add_revision("pos", "4", rationale="raise the gain to 4 for a faster crossover",
                    label="r2")
    lg.close()
    return path


@pytest.fixture
def ledger(built, tmp_path):
    path = tmp_path / "t.db"
    shutil.copy(built, path)
    lg = open_ledger(path, author="tester")
    yield lg
    lg.close()


def make_app(lg):
    from ledger.tui.app import LedgerApp

    return LedgerApp(ledger=lg)


def test_core_imports_without_textual():
    code = ("import sys, ledger, ledger.api, ledger.engine, ledger.cli; "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in "
            "('textual', 'textual_plotext') or m.startswith('ledger.tui')); print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, env={**os.environ, "PYTHONPATH": str(Path(__file__).parents[1])})
    assert out.stdout.strip() == "[]", out.stdout + out.stderr


async def test_lineage_view_tree_counts_and_navigation(ledger):
    from textual.widgets import Static, Tree

    app = make_app(ledger)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        tree = app.screen.query_one(Tree)
        loop_node = tree.root.children[0]
        assert loop_node.data == ("pos", None)
        r1 = loop_node.children[0]
        r2 = r1.children[0]
        assert (r1.data, r2.data) == (("pos", "r1"), ("pos", "r2"))
        # verdict counts from lg.results: r1 passes PM, GM, OS and fails WC (closed forms above)
        assert "✓3 ✗1 !0 ~0" in str(r1.label)
        assert "✓2 ✗2 !0 ~0" in str(r2.label)
        assert tree.cursor_node is loop_node
        await press(pilot, "down")
        assert tree.cursor_node is r1
        await press(pilot, "down")
        assert tree.cursor_node is r2
        assert (app.current_loop, app.current_label) == ("pos", "r2")
        detail = str(app.screen.query_one("#lineage-detail", Static).render())
        assert "raise the gain to 4" in detail and "controller" in detail


async def test_matrix_view_cells_navigation_and_filters(ledger):
    from textual.widgets import DataTable

    app = make_app(ledger)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "2")
        scr = app.screen
        assert type(scr).__name__ == "MatrixScreen"
        table = scr.query_one(DataTable)
        assert table.row_count == 4 and len(table.columns) == 3
        keys = [r.key for r in scr.visible_rows()]
        assert keys == ["GM-1", "OS-1", "PM-1", "WC-1"]  # no parent first, then under SYS-1
        pm_r2 = str(table.get_cell_at((2, 2)))
        assert pm_r2.startswith("✗ ") and "BROKE" in pm_r2  # a symbol, not colour alone
        assert str(table.get_cell_at((2, 1))).startswith("✓ ")
        # narrow cells hold symbol + value in the limit's unit; the detail line under the table
        # names the verdict, limit and headroom of the cell under the cursor
        assert "28.02" in pm_r2 and "%" not in pm_r2  # the unit is in the row's limit
        table.move_cursor(row=2, column=2)
        await pilot.pause()
        detail = str(scr.query_one("#matrix-detail").render())
        assert "PM-1 on pos/r2" in detail and "fail" in detail and "limit >= " in detail
        assert "headroom -" in detail and " deg" in detail
        row0 = table.cursor_row
        await press(pilot, "down")
        assert table.cursor_row == row0 + 1
        assert app.current_req == keys[row0 + 1]
        col0 = table.cursor_column
        await press(pilot, "left")
        assert table.cursor_column == col0 - 1
        # status filter cycles: first "fail" keeps rows with any failing cell
        await press(pilot, "s")
        assert scr.status_filter == "fail"
        assert [r.key for r in scr.visible_rows()] == ["OS-1", "PM-1", "WC-1"]
        # text filter
        await press(pilot, "s", "s", "s", "s", "s")
        assert scr.status_filter is None
        await press(pilot, "slash", "c", "r", "o", "s", "s", "enter")
        assert [r.key for r in scr.visible_rows()] == ["WC-1"]
        assert table.row_count == 1
        assert scr.status_filter is None  # the "s" typed into the filter stayed text
        # loop filter cycles to the only loop
        await press(pilot, "l")
        assert scr.loop_filter == "pos"
        await press(pilot, "t")  # tips only: one column (r2) beside the requirement column
        assert scr.tips_only and len(table.columns) == 2
        assert [c.label for c in scr._data.columns] == ["r2"]


async def test_requirement_view_detail_and_trend(ledger):
    from textual.widgets import Static

    app = make_app(ledger)
    app.current_req = "PM-1"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "3")
        scr = app.screen
        d = scr._data
        assert d.requirement.key == "PM-1"
        assert [p.key for p in d.parents] == ["SYS-1"]
        vals = [res.value for _, _, res in d.trend]
        # Source: closed-form phase margins of K=1 and K=4 (module docstring)
        np.testing.assert_allclose(vals, [pm_of(1), pm_of(4)], rtol=1e-6)
        text = str(scr.query_one("#req-detail", Static).render())
        assert "PM at least 45 deg." in text and "derives from" in text
        await press(pilot, "n")
        assert scr._data.requirement.key != "PM-1"
        # SYS-1 lists its children with verdicts
        app.current_req = "SYS-1"
        scr.reload()
        await settle(pilot)
        assert {c.key for c in scr._data.children} == {"PM-1", "WC-1", "OS-1"}


async def test_diff_view_broke_fixed_sets(ledger):
    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "4")
        cmp_ = app.screen.comparison
        assert (cmp_.old.label, cmp_.new.label) == ("r1", "r2")
        # Source: closed forms in the module docstring (PM 51.8 -> 28.0 deg, OS 16.3 -> 44.4 %,
        # wc 0.786 -> 1.879 rad/s, GM inf -> inf)
        assert {c.requirement for c in cmp_.of("broke")} == {"PM-1", "OS-1"}
        assert {c.requirement for c in cmp_.of("fixed")} == {"WC-1"}
        assert {c.requirement for c in cmp_.of("unchanged")} == {"GM-1"}
        pm = next(c for c in cmp_.of("broke") if c.requirement == "PM-1")
        np.testing.assert_allclose(pm.value_delta, pm_of(4) - pm_of(1), rtol=1e-6)
        body = str(app.screen.query_one("#diff-body").render())
        assert "BROKE (pass -> fail): 2" in body and "FIXED (fail -> pass): 1" in body


async def test_plots_view_margins(ledger):
    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "5")
        d = app.screen.plot_data
        assert d is not None and d.label == "r2" and d.variant == "nominal"
        # Source: closed forms (module docstring); final value 1 for a type-1 unity loop
        np.testing.assert_allclose(d.phase_margin_deg, pm_of(4), rtol=1e-6)
        np.testing.assert_allclose(d.gain_crossover, wc_of(4), rtol=1e-6)
        assert math.isinf(d.gain_margin_db)
        np.testing.assert_allclose(d.final, 1.0, rtol=1e-9)
        np.testing.assert_allclose(d.y.max(), 1 + os_of(4) / 100, rtol=2e-2)  # sampled peak
        assert {b.key for b in d.bounds} == {"OS-1"}
        np.testing.assert_allclose(d.bounds[0].value, 1.25, rtol=1e-12)  # 25 % above final 1
        await press(pilot, "w")
        assert app.screen.use_worst and app.screen.plot_data.variant == "nominal"  # one variant


@pytest.mark.parametrize("size, first", [((120, 40), "both"), ((80, 24), "time")])
async def test_plots_view_rows_follow_the_terminal_and_cycle(ledger, size, first):
    # The step/Bode row and the Nyquist/Nichols row share the screen from 36 rows up; below
    # one row shows at a time; n cycles both -> time -> family (the ledger's own rule).
    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=size) as pilot:
        await settle(pilot)
        await press(pilot, "5")
        scr = app.screen

        def shown():
            return (scr.query_one("#plots-time").display,
                    scr.query_one("#plots-family").display)

        want = {"both": (True, True), "time": (True, False), "family": (False, True)}
        assert scr.layout_mode == first and shown() == want[first]
        order = ["both", "time", "family"]
        for k in range(1, 4):
            await press(pilot, "n")
            mode = order[(order.index(first) + k) % 3]
            assert scr.layout_mode == mode and shown() == want[mode]


async def test_add_revision_form_records_and_shows_verdicts(ledger):
    from textual.widgets import DataTable

    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "a")
        assert type(app.screen).__name__ == "RevisionForm"
        assert app.screen.query_one("#form-parent").value == "r2"
        await press(pilot, "2", "tab", "tab")  # digits go into the field, not to the views
        for ch in "halve the gain":
            await pilot.press("space" if ch == " " else ch)
        await press(pilot, "ctrl+s")
        await settle(pilot, rounds=6)
        assert type(app.screen).__name__ == "MatrixScreen"
        revs = ledger.revisions("pos")
        assert [r.label for r in revs] == ["r1", "r2", "r3"]
        assert revs[-1].parent == "r2" and revs[-1].rationale == "halve the gain"
        res = {r.requirement: r for r in ledger.results("pos", "r3")}
        # Source: closed forms with K = 2: PM 38.67 deg, wc 1.25 rad/s, OS 30.5 %
        np.testing.assert_allclose(res["PM-1"].value, pm_of(2), rtol=1e-6)
        np.testing.assert_allclose(res["OS-1"].value, os_of(2), rtol=1e-6)
        assert {k: r.verdict for k, r in res.items()} == {
            "PM-1": "fail", "OS-1": "fail", "WC-1": "pass", "GM-1": "pass"}
        scr = app.screen
        table = scr.query_one(DataTable)
        assert len(scr._data.columns) == 3
        assert scr.shown[1] == 3  # the window of whole columns reaches the new column ...
        assert scr.selected()[1:] == ("pos", "r3")  # ... and the cursor is on it
        col = table.cursor_column
        assert str(table.get_cell_at((2, col))).startswith("✗ ")  # fail symbol
        assert "BROKE" not in str(table.get_cell_at((2, col)))  # r2 already failed PM-1


async def test_bad_model_text_shows_error_and_writes_nothing(ledger):
    from textual.widgets import Static

    before = ledger.counts()
    app = make_app(ledger)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "a")
        for ch in "2*(s+":
            await pilot.press({"*": "asterisk", "(": "left_parenthesis", "+": "plus"}.get(ch, ch))
        await press(pilot, "tab", "tab", "x", "ctrl+s")
        assert type(app.screen).__name__ == "RevisionForm"
        msg = str(app.screen.query_one("#form-error", Static).render())
        assert "column" in msg
        await press(pilot, "escape")
        assert type(app.screen).__name__ != "RevisionForm"
    assert ledger.counts() == before


async def test_help_lists_every_key_and_quit(ledger):
    from ledger.tui import bindings
    from ledger.tui.screens.help import help_text

    text = help_text().plain
    for _, table in bindings.ALL:
        for b in table:
            for key in b.key.split(","):
                disp = re.escape(bindings.key_display(key))
                assert re.search(rf"^  (.+, )?{disp}(, .+)? +{re.escape(b.description)}$",
                                 text, re.M), (key, b.description)
    app = make_app(ledger)
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        await press(pilot, "question_mark")
        assert type(app.screen).__name__ == "HelpScreen"
        await press(pilot, "escape")
        assert type(app.screen).__name__ == "LineageScreen"
        await press(pilot, "a")
        await pilot.press("ctrl+q")  # priority: quits even with a text field focused
        await pilot.pause()
    assert app.return_code == 0


def _screen_text(svg: str) -> str:
    """The characters on screen, row by row, from an exported SVG (styles left out: colour
    detection differs between terminals and CI, the words and symbols must not)."""
    import html

    rows: dict[str, list[tuple[float, str]]] = {}
    for m in re.finditer(r'<text [^>]*?x="([\d.]+)" y="([\d.]+)"[^>]*>([^<]*)</text>', svg):
        rows.setdefault(m.group(2), []).append((float(m.group(1)), html.unescape(m.group(3))))
    text = "\n".join("".join(t for _, t in sorted(r)).rstrip()
                     for _, r in sorted(rows.items(), key=lambda kv: float(kv[0])))
    # scrollbar thumbs are drawn with eighth blocks whose exact width follows sub-cell scroll
    # offsets (animation timing); the words and symbols are what the snapshot is about
    return text.translate(str.maketrans("▏▎▍▌▋▊▉", "▌▌▌▌▌▌▌"))


def _check_snapshot(svg: str, name: str) -> None:
    path = SNAPSHOTS / name
    if os.environ.get("LOOPLEDGER_UPDATE_SNAPSHOTS") == "1" or not path.exists():
        if not path.exists() and os.environ.get("LOOPLEDGER_UPDATE_SNAPSHOTS") != "1":
            pytest.fail(f"missing snapshot {name}; run with LOOPLEDGER_UPDATE_SNAPSHOTS=1")
        path.write_text(svg)
        return
    got, want = _screen_text(svg), _screen_text(path.read_text())
    assert want.strip(), f"stored snapshot {name} has no text"
    if got != want:
        import difflib

        delta = "\n".join(difflib.unified_diff(want.splitlines(), got.splitlines(), "stored",
                                                "now", lineterm="", n=0))
        pytest.fail(f"screen text differs from {path}; inspect and update if intended:\n{delta}")


async def _scroll_at_rest(pilot, checks: int = 60) -> None:
    """Wait until no widget's scroll position moves any more (scrolling is animated)."""
    def positions():
        out = []
        for w in pilot.app.screen.query("*"):
            if hasattr(w, "scroll_x"):
                out.append((w.scroll_x, w.scroll_y, tuple(w.virtual_size)))
            cols = getattr(w, "columns", None)
            if isinstance(cols, dict):  # a DataTable's column widths settle after layout
                out.append(tuple(c.get_render_width(w) for c in cols.values()))
        return out

    last, still = positions(), 0
    for _ in range(checks):
        await pilot.pause(0.05)
        now = positions()
        still = still + 1 if now == last else 0
        if still >= 5:
            return
        last = now


async def test_snapshots(ledger):
    """Matrix, diff and help at 80x24 (no clocks or times on these screens)."""
    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    shots = {}
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        for keys, name in ((("2",), "matrix_80x24.svg"), (("4",), "diff_80x24.svg"),
                           (("question_mark",), "help_80x24.svg")):
            await press(pilot, *keys)
            await settle(pilot, rounds=4)  # let every worker's result reach the screen
            await _scroll_at_rest(pilot)   # the cursor's column scrolls into view
            shots[name] = app.export_screenshot(title="loopledger")
    for name, svg in shots.items():
        _check_snapshot(svg, name)


def test_lineage_data_shows_the_latest_revisions_only(ledger, monkeypatch):
    """Huge histories: the view keeps the newest revisions and says how many it left out."""
    from ledger.tui import data

    monkeypatch.setattr(data, "MAX_SHOWN", 1)
    d = data.load_lineage(ledger)
    assert [r.revision.label for r in d.loops["pos"]] == ["r2"]
    assert d.hidden["pos"] == 1
    assert d.loops["pos"][0].counts == ledger.verdict_counts("pos")["r2"]


# -- the selection follows the cursor across loops (issue 10, item 3) --------------------------
@pytest.fixture
def two_loops(tmp_path):
    """Loops ``pos`` (r1 K=1, r2 K=4) and ``vel`` (r1 K=1, r2 K=2, r3 K=4) on the plant of the
    module docstring; PM-1 and OS-1 apply to both, so every value has a closed form."""
    lg = open_ledger(tmp_path / "two.db", create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("pos", "servo")
    lg.add_loop("vel", "servo")
    lg.add_requirement("PM-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["pos", "vel"])
    lg.add_requirement("OS-1", title="Overshoot", statement="Step overshoot at most 25 %.",
                       metric="overshoot", limit="<= 25 %", loops=["pos", "vel"])
    for loop, gains in (("pos", (1, 4)), ("vel", (1, 2, 4))):
        for i, k in enumerate(gains, 1):
            lg.add_revision(loop, str(k), rationale=f"gain {k}", label=f"r{i}")
    yield lg
    lg.close()


def _tree_rows(tree):
    """The tree's node data in display order (every node is expanded)."""
    out, stack = [], list(reversed(tree.root.children))
    while stack:
        n = stack.pop()
        out.append(n.data)
        stack.extend(reversed(n.children))
    return out


async def _cursor_to(pilot, tree, data):
    rows = _tree_rows(tree)
    now = rows.index(tree.cursor_node.data)
    want = rows.index(data)
    await press(pilot, *(["down"] * (want - now) if want > now else ["up"] * (now - want)))
    assert tree.cursor_node.data == data


async def test_selection_follows_cursor_across_loops(two_loops):
    """Cursor on a revision of loop pos, then on loop vel's header: the plots, the diff and the
    add-revision form all take vel and its tip r3 (not pos's r1, which vel also has)."""
    from textual.widgets import Static, Tree

    lg = two_loops
    app = make_app(lg)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        tree = app.screen.query_one(Tree)
        await _cursor_to(pilot, tree, ("pos", "r1"))
        assert app.selection == ("pos", "r1")
        await _cursor_to(pilot, tree, ("vel", None))
        assert app.selection == ("vel", "r3")  # the header selects the loop and its tip
        detail = str(app.screen.query_one("#lineage-detail", Static).render())
        assert "loop vel" in detail and "tip r3" in detail
        # plots follow: vel/r3 has K = 4 (closed form of the module docstring)
        await press(pilot, "5")
        d = app.screen.plot_data
        assert (d.loop, d.label) == ("vel", "r3")
        np.testing.assert_allclose(d.phase_margin_deg, pm_of(4), rtol=1e-6)
        # diff follows: vel r2 -> r3 (K 2 -> 4), PM 38.7 -> 28.0 deg by the closed forms
        await press(pilot, "4")
        cmp_ = app.screen.comparison
        assert (app.screen._loop, cmp_.old.label, cmp_.new.label) == ("vel", "r2", "r3")
        pm = next(c for c in cmp_.changes if c.requirement == "PM-1")
        np.testing.assert_allclose(pm.value_delta, pm_of(4) - pm_of(2), rtol=1e-6)
        # back on the lineage, the header again; `a` offers vel's tip, and saving records under it
        await press(pilot, "1")
        tree = app.screen.query_one(Tree)
        await _cursor_to(pilot, tree, ("pos", "r1"))
        await _cursor_to(pilot, tree, ("vel", None))
        await press(pilot, "a")
        form = app.screen
        assert type(form).__name__ == "RevisionForm"
        assert form.loop == "vel"
        assert form.query_one("#form-parent").value == "r3"
        assert "loop: vel" in str(form.query_one("#form-loop").render())
        assert "tip of loop vel" in str(form.query_one("#form-parent-note").render())
        await press(pilot, "2", "tab", "tab", "x", "ctrl+s")
        await settle(pilot, rounds=6)
        assert type(app.screen).__name__ == "MatrixScreen"
    vel = lg.revisions("vel")
    assert [r.label for r in vel] == ["r1", "r2", "r3", "r4"]
    assert vel[-1].parent == "r3"                      # B's tip, not the r1 selected in A
    assert [r.label for r in lg.revisions("pos")] == ["r1", "r2"]


async def test_selection_revision_row_and_back_to_other_loop(two_loops):
    """A revision row selects that revision (the form then says it starts a branch, the plots and
    diff show it); moving to another loop's header selects that loop's tip."""
    from textual.widgets import Tree

    lg = two_loops
    before = lg.counts()
    app = make_app(lg)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        tree = app.screen.query_one(Tree)
        await _cursor_to(pilot, tree, ("vel", "r2"))
        assert app.selection == ("vel", "r2")
        await press(pilot, "5")
        d = app.screen.plot_data
        assert (d.loop, d.label) == ("vel", "r2")
        np.testing.assert_allclose(d.phase_margin_deg, pm_of(2), rtol=1e-6)  # K = 2
        await press(pilot, "4")
        cmp_ = app.screen.comparison
        assert (cmp_.old.label, cmp_.new.label) == ("r1", "r2")
        await press(pilot, "a")
        assert app.screen.query_one("#form-parent").value == "r2"
        note = str(app.screen.query_one("#form-parent-note").render())
        assert "not the tip (r3)" in note and "branch" in note
        await press(pilot, "escape")
        # to pos's header: pos and its tip r2 -- even though vel/r2 was selected before
        await press(pilot, "1")
        tree = app.screen.query_one(Tree)
        await _cursor_to(pilot, tree, ("pos", None))
        assert app.selection == ("pos", "r2")
        await press(pilot, "4")
        cmp_ = app.screen.comparison
        assert (app.screen._loop, cmp_.old.label, cmp_.new.label) == ("pos", "r1", "r2")
        await press(pilot, "5")
        d = app.screen.plot_data
        assert (d.loop, d.label) == ("pos", "r2")
        np.testing.assert_allclose(d.phase_margin_deg, pm_of(4), rtol=1e-6)  # pos r2: K = 4
    assert lg.counts() == before  # the cancelled form recorded nothing


# -- the matrix never shows a fragment of a cell (issue 10, item 3) ---------------------------
#: gains of the revisions: K = 0.002222 gives the tiny crossover 0.00222 rad/s (closed form
#: wc ~ K for K << 1), the value that used to show as "2222 [--]" when cut
WIDE_GAINS = (1, 4, 0.002222, 2, 0.5, 3, 1.5, 0.8)


@pytest.fixture
def wide(tmp_path):
    lg = open_ledger(tmp_path / "wide.db", create=True, author="tester")
    lg.add_plant("servo", "1/(s*(s+1))")
    lg.add_loop("remote-shaker", "servo")
    lg.add_requirement("PM-1", title="Phase margin", statement="PM at least 45 deg.",
                       metric="phase_margin", limit=">= 45 deg", loops=["remote-shaker"])
    lg.add_requirement("WC-1", title="Crossover", statement="Crossover at least 1 rad/s.",
                       metric="gain_crossover", limit=">= 1 rad/s", loops=["remote-shaker"])
    lg.add_requirement("OS-1", title="Overshoot", statement="Overshoot at most 25 %.",
                       metric="overshoot", limit="<= 25 %", loops=["remote-shaker"])
    for i, k in enumerate(WIDE_GAINS, 1):
        lg.add_revision("remote-shaker", repr(k), rationale=f"gain {k}", label=f"r{i}")
    yield lg
    lg.close()


_GLYPHS = " ▌▐█▁▔▏▎▍▋▊▉━╸╺"


def _check_whole_cells(screen: str, scr) -> set:
    """Every table line on screen holds whole cells (or blanks) only; returns the column labels
    seen.  Whole cell texts come from the data the view shows; a line with those (and the
    requirement label) removed must be empty apart from blanks and scrollbar glyphs."""
    from ledger.tui.widgets.verdict import cell_text

    d = scr._data
    first = scr.shown[0]
    # a header names its loop on the first column shown and where the loop changes
    headers = [f"{c.loop}/{c.label}" if j == first or j == 0 or c.loop != d.columns[j - 1].loop
               else c.label for j, c in enumerate(d.columns)]
    lines = screen.replace("\xa0", " ").splitlines()  # the SVG writes blanks as no-break spaces
    head = next(l for l in lines if l.strip().startswith("requirement"))
    rest = head.replace("requirement", "", 1)
    seen = set()
    for j in range(*scr.shown):
        h = headers[j]
        pattern = rf"(?<![\w/-]){re.escape(h)}(?![\w/-])"
        if re.search(pattern, rest):
            seen.add(f"{d.columns[j].loop}/{d.columns[j].label}")
            rest = re.sub(pattern, " ", rest, count=1)
    assert not rest.strip(_GLYPHS), f"header fragment {rest.strip()!r} in {head!r}"
    assert seen, head
    headers = [f"{c.loop}/{c.label}" for c in d.columns]
    for r in scr.visible_rows():
        parent = f" ({r.parents[0]})" if r.parents else ""
        label = f"{r.key}{parent} {r.limit_text}"
        line = next(l for l in lines if l.strip().startswith(label))
        rest = line.replace(label, "", 1)
        cells = [cell_text(d.cells.get((r.key, c.loop, c.label)),
                           applies=(r.key, c.loop, c.label) in d.cells,
                           broke=(r.key, c.loop, c.label) in d.broke).plain for c in d.columns]
        shown = [t for h, t in zip(headers, cells) if h in seen]
        for t in shown:
            assert t in rest, f"cell {t!r} of a shown column missing from {line!r}"
            rest = rest.replace(t, " ", 1)
        assert not rest.strip(_GLYPHS), f"fragment {rest.strip()!r} in {line!r}"
    return seen


@pytest.mark.parametrize("size", [(80, 24), (120, 40)])
async def test_matrix_scrolls_sideways_by_whole_cells(wide, size):
    from textual.widgets import DataTable

    app = make_app(wide)
    async with app.run_test(size=size) as pilot:
        await settle(pilot)
        await press(pilot, "2")
        scr = app.screen
        table = scr.query_one(DataTable)
        # Source: closed form wc ~ K for K << 1 (|K/(jw(jw+1))| = 1): r3's tiny crossover
        res3 = {r.requirement: r for r in wide.results("remote-shaker", "r3")}
        np.testing.assert_allclose(res3["WC-1"].value, wc_of(0.002222), rtol=1e-6)
        await press(pilot, "home")
        seen_all, n = set(), len(WIDE_GAINS)
        # right to the last column, then back to the first: every screen shows whole cells
        for key in ["right"] * (n + 2) + ["left"] * (n + 2):
            await press(pilot, key)
            await _scroll_at_rest(pilot)
            screen = _screen_text(app.export_screenshot())
            seen = _check_whole_cells(screen, scr)
            assert len(seen) == scr.shown[1] - scr.shown[0]
            assert table.scroll_x == 0  # never scrolled by characters
            seen_all |= seen
            sel = scr.selected()
            assert f"{sel[1]}/{sel[2]}" in seen  # the cursor's column is on screen
        assert seen_all == {f"remote-shaker/r{i}" for i in range(1, n + 1)}
        assert scr.shown[0] == 0 and scr.selected()[2] == "r1"
        assert scr.shown[1] - scr.shown[0] < n  # the window really was narrower than the data


async def test_plots_frequency_unit_remembered_and_step_horizon(ledger):
    from ledger import prefs
    from ledger.tui.plotdata import settle_time

    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "5")
        scr = app.screen
        assert scr.freq_unit == "Hz"  # the default for display
        cap = str(scr.query_one("#plots-caption").render())
        # Source: closed form wc (module docstring), shown in Hz: f = w / (2 pi)
        assert f"{wc_of(4) / (2 * math.pi):.4g} Hz" in cap
        await press(pilot, "f")
        assert scr.freq_unit == "rad/s" and prefs.frequency_unit(ledger.url) == "rad/s"
        cap = str(scr.query_one("#plots-caption").render())
        assert f"{wc_of(4):.4g} rad/s" in cap
        d = scr.plot_data
        # the step plot ends at a few (3) settling times of the plotted variant, not at the
        # simulation's end; within the sampling of the thinned curve
        ts = settle_time(d.t, d.y, d.final)
        assert d.t[-1] == pytest.approx(3 * ts, rel=0.05)
    app2 = make_app(ledger)
    async with app2.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "5")
        assert app2.screen.freq_unit == "rad/s"  # remembered for this ledger


async def test_add_revision_form_previews_the_regression_table_before_saving(ledger):
    """The preview key runs a dry run against the parent (r2, K = 4): K = 1 fixes PM-1 and
    OS-1 and breaks WC-1 (closed forms of the module docstring: PM 28.02 -> 51.83 deg,
    overshoot 44.4 -> 16.3 %, wc 1.879 -> 0.786 rad/s); nothing is recorded until ctrl+s,
    and recording then computes nothing."""
    from textual.widgets import Static

    before = ledger.counts()
    app = make_app(ledger)
    app.current_loop, app.current_label = "pos", "r2"
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "a", "1", "ctrl+t")
        await settle(pilot, rounds=6)
        text = str(app.screen.query_one("#form-preview", Static).render())
        assert "preview against r2" in text, text
        assert re.search(r"PM-1\s+fixed", text) and re.search(r"WC-1\s+BROKE", text), text
        assert "breaks WC-1" in text
        assert ledger.counts() == before
        assert type(app.screen).__name__ == "RevisionForm"
        n = ledger.kernel_requests
        await press(pilot, "tab", "tab", "x", "ctrl+s")
        await settle(pilot, rounds=6)
        assert type(app.screen).__name__ == "MatrixScreen"
        assert ledger.kernel_requests == n
        res = {r.requirement: r for r in ledger.results("pos", "r3")}
        np.testing.assert_allclose(res["PM-1"].value, pm_of(1), rtol=1e-6)


async def _type(pilot, text: str) -> None:
    names = {" ": "space", "-": "minus", ".": "full_stop", "(": "left_parenthesis",
             ")": "right_parenthesis"}
    for ch in text:
        await pilot.press(names.get(ch, ch))


async def test_waiver_form_waives_the_cell_under_the_cursor(ledger):
    """PM-1 fails on r2 (28.02 deg < 45 deg, closed form in the module docstring): 'w' on
    that cell opens the waiver form; an empty reason is refused in the form and writes
    nothing; a full one records the waiver, the cell then shows W (its own state, not the
    pass symbol) and the requirement view lists the waiver."""
    from textual.widgets import DataTable, Static

    app = make_app(ledger)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await press(pilot, "2")
        scr = app.screen
        table = scr.query_one(DataTable)
        table.move_cursor(row=2, column=2)  # PM-1 on pos/r2
        await pilot.pause()
        assert scr.selected() == ("PM-1", "pos", "r2")
        before = ledger.counts()
        await press(pilot, "w")
        form = app.screen
        assert type(form).__name__ == "WaiverForm"
        assert "PM-1 on pos/r2 (fail)" in str(form.query_one("#form-title").render())
        await press(pilot, "ctrl+s")  # nothing typed: refused, one line in the form
        assert type(app.screen).__name__ == "WaiverForm"
        assert "a waiver needs a reason" in str(form.query_one("#form-error", Static).render())
        assert ledger.counts() == before
        await _type(pilot, "bench rig only")
        await press(pilot, "tab")
        await _type(pilot, "R. Chen")
        await press(pilot, "tab")
        await _type(pilot, "controls lead")
        await press(pilot, "tab")
        await _type(pilot, "2999-12-31")
        await press(pilot, "ctrl+s")
        await settle(pilot, rounds=4)
        assert type(app.screen).__name__ == "MatrixScreen"
        (w,) = ledger.waivers("PM-1")
        assert (w.reason, w.approver, w.role, w.expires_on, w.scope) == \
            ("bench rig only", "R. Chen", "controls lead", "2999-12-31", "pos/r2")
        table.move_cursor(row=2, column=2)
        await pilot.pause()
        cell = str(table.get_cell_at((2, 2)))
        assert cell.startswith("W ") and "28.02" in cell, cell
        assert str(table.get_cell_at((2, 1))).startswith("✓ ")  # r1 passes, untouched
        detail = str(scr.query_one("#matrix-detail").render())
        assert "waived (fail, waiver 1 by R. Chen (controls lead)" in detail, detail
        app.current_req = "PM-1"
        await press(pilot, "3")
        text = str(app.screen.query_one("#req-detail", Static).render())
        assert "pos/r2" in text and "live" in text and "bench rig only" in text
        # the requirement view opens the same form for the selected revision
        before = ledger.counts()
        await press(pilot, "w")
        assert type(app.screen).__name__ == "WaiverForm"
        assert "PM-1 on pos/r2" in str(app.screen.query_one("#form-title").render())
        await press(pilot, "escape")
        assert type(app.screen).__name__ == "RequirementScreen"
        assert ledger.counts() == before
