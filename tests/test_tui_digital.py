"""The UI's revision form on a digital loop (issue 14): the discretisation method and the
number format are offered, and a design in s is recorded with its method (the ledger's own
rules; common practice, no source)."""

from __future__ import annotations

from ledger.api import open_ledger
from tuihelp import settle


async def test_digital_form_records_method_and_format(tmp_path):
    from textual.widgets import Input

    from ledger.tui.app import LedgerApp

    lg = open_ledger(tmp_path / "d.db", create=True, author="tester")
    lg.add_plant("g", "40/(s*(0.05*s+1))")
    lg.add_loop("ax", "g", sample_time=0.001)
    lg.add_loop("cont", "g")
    app = LedgerApp(ledger=lg)
    try:
        async with app.run_test(size=(120, 50)) as pilot:
            await settle(pilot, rounds=4)
            app.current_loop, app.current_label = "ax", None
            app.action_add_revision()
            await settle(pilot, rounds=4)
            form = app.screen
            assert type(form).__name__ == "RevisionForm"
            assert form.query_one("#form-digital").display
            form.query_one("#form-controller", Input).value = "lead(0.3, 2*pi*2, 2*pi*30)"
            form.query_one("#form-rationale", Input).value = "design in s"
            form.query_one("#form-discretize", Input).value = "tustin@30Hz"
            form.query_one("#form-format", Input).value = "single"
            form.action_submit()
            await settle(pilot, rounds=8)
            assert type(app.screen).__name__ != "RevisionForm"
        (r,) = lg.revisions("ax")
        assert r.discretization.startswith("tustin@188.4955")
        assert r.number_format == "single" and r.verified.startswith("diffeq(")
        app2 = LedgerApp(ledger=lg)
        async with app2.run_test(size=(120, 50)) as pilot:
            await settle(pilot, rounds=4)
            app2.current_loop, app2.current_label = "cont", None
            app2.action_add_revision()
            await settle(pilot, rounds=4)
            assert not app2.screen.query_one("#form-digital").display
    finally:
        lg.close()
