"""Spectra recorded on a loop through the CLI and spec files: stored, hashed into the metric
key, verified by the rms metrics, shown per source and band, exported in the HTML evidence.
Numbers are checked against the first-order closed form sigma^2 = q/(2a) (common textbook
result) where a value is asserted; the rest checks the records and refusals."""

from __future__ import annotations

import json
import math

import pytest
from typer.testing import CliRunner

from ledger.cli import app


@pytest.fixture
def cli(db_url, monkeypatch):
    monkeypatch.setenv("LOOPLEDGER_DB", db_url)
    monkeypatch.setenv("LOOPLEDGER_AUTHOR", "tester")
    monkeypatch.setenv("COLUMNS", "200")
    runner = CliRunner()

    def call(*args, ok=True):
        res = runner.invoke(app, [str(a) for a in args])
        if ok:
            assert res.exit_code == 0, (args, res.output)
        return res

    call("init")
    return call


def _first_order(cli):
    # plant 1/(s + 2) in A -> m, proportional gain 3: input disturbance -> y is 1/(s + 5)
    cli("plant", "add", "p1", "1/(s+a)", "--param", "a=2", "--input-unit", "A",
        "--output-unit", "m")
    cli("loop", "add", "l1", "--plant", "p1")


def test_rational_spectrum_verifies_against_the_closed_form(cli):
    _first_order(cli)
    q = 0.7  # E[w w] = q delta; one-sided PSD 2 q in A^2/Hz
    cli("loop", "spectrum", "l1", "input_disturbance", "--intensity", 2 * q)
    cli("requirement", "add", "N-1", "--title", "noise", "--statement", "3-sigma output",
        "--metric", "rms_error", "--limit", "<= 2 m", "--setting", "sigmas=3", "--loop", "l1")
    cli("revision", "add", "l1", "3", "--why", "proportional")
    res = json.loads(cli("results", "l1", "--json").output)
    row = next(r for r in res if r["requirement"] == "N-1")
    # sigma^2 = q / (2 a), a = 2 + 3 (common textbook result)
    assert row["verdict"] == "pass"
    assert math.isclose(row["value"], 3 * math.sqrt(q / 10), rel_tol=1e-9)
    out = cli("loop", "rms", "l1", "--json").output
    view = json.loads(out)
    assert math.isclose(view["total_rms"], math.sqrt(q / 10), rel_tol=1e-9)
    assert view["sources"][0]["source"] == "input_disturbance"
    # the bands add up to the total (powers add)
    assert math.isclose(sum(b * b for b in view["sources"][0]["band_rms"]), q / 10,
                        rel_tol=1e-9)
    text = cli("loop", "rms", "l1", "--curve").output
    assert "input_disturbance" in text and "up to" in text
    assert "input_disturbance" in cli("loop", "show", "l1").output


def test_bad_table_is_refused_naming_the_row_and_writes_nothing(cli, tmp_path):
    _first_order(cli)
    bad = tmp_path / "psd.csv"
    bad.write_text("frequency, psd\n1, 1e-6\n10, -2e-6\n")
    res = cli("loop", "spectrum", "l1", "sensor_noise", "--table", bad, ok=False)
    assert res.exit_code == 1
    assert "row 3: negative psd" in res.output and len(res.output.strip().splitlines()) == 1
    assert "spectrum" not in cli("loop", "show", "l1").output
    res = cli("loop", "spectrum", "l1", "sensor_noise", "--table", bad, "--unit", "V^2/Hz",
              ok=False)
    assert res.exit_code == 1


def test_table_units_and_a_changed_spectrum_is_refused(cli, tmp_path):
    _first_order(cli)
    good = tmp_path / "psd.csv"
    good.write_text("# sensor\nf, asd\n1, 2\n1000, 2\n")
    # amplitude density 2 um/sqrt(Hz): PSD 4e-12 m^2/Hz (unit definition)
    out = json.loads(cli("loop", "spectrum", "l1", "sensor_noise", "--table", good, "--unit",
                         "um/Hz^0.5", "--json").output)
    assert [r[1] for r in out["table"]] == pytest.approx([4e-12, 4e-12], rel=1e-12)
    # the same again changes nothing; another one is refused
    cli("loop", "spectrum", "l1", "sensor_noise", "--table", good, "--unit", "um/Hz^0.5")
    res = cli("loop", "spectrum", "l1", "sensor_noise", "--intensity", 1, ok=False)
    assert res.exit_code == 1 and "fixed once" in res.output


def test_spectra_after_rms_results_are_refused(cli):
    _first_order(cli)
    cli("loop", "spectrum", "l1", "input_disturbance", "--intensity", 1)
    cli("requirement", "add", "N-1", "--title", "noise", "--statement", "rms effort",
        "--metric", "rms_effort", "--limit", "<= 10 A", "--loop", "l1")
    cli("revision", "add", "l1", "3", "--why", "proportional")
    res = cli("loop", "spectrum", "l1", "sensor_noise", "--intensity", 1, ok=False)
    assert res.exit_code == 1 and "before its rms requirements" in res.output


def test_spec_file_spectra_round_trip_and_html_evidence(cli, tmp_path):
    (tmp_path / "vib.csv").write_text("1, 1e-6\n100, 1e-8\n")
    spec = tmp_path / "s.toml"
    spec.write_text('''format = 1
[[plant]]
name = "p1"
model = "1/(s+a)"
input_unit = "A"
output_unit = "m"
params = { a = 2.0 }

[[loop]]
name = "l1"
plant = "p1"
spectra = [
  { source = "sensor_noise", intensity = 1e-12, shaping = "1/(s/600+1)" },
  { source = "input_disturbance", file = "vib.csv", unit = "A^2/Hz" },
]

[[requirement]]
id = "N-1"
title = "noise"
statement = "rms output"
metric = "rms_error"
limit = "<= 1 m"
loops = ["l1"]

[[revision]]
loop = "l1"
controller = "3"
rationale = "proportional"
''')
    cli("import", spec)
    out = tmp_path / "back.toml"
    cli("export", out)
    text = out.read_text()
    assert "sensor_noise" in text and "input_disturbance" in text
    # importing the export again changes nothing (same spectra, same hashes)
    res = cli("import", out)
    # plant, loop, its two spectra, requirement, revision
    assert "unchanged 6 record(s)" in res.output
    html = tmp_path / "r.html"
    cli("export-matrix", html)
    page = html.read_text()
    assert "rms budget of the output error" in page and "cumulative rms" in page


def test_spectra_enter_the_metric_key_only_when_present(tmp_path):
    # The key of a loop without spectra is what it was (no 'spectra' entry); two loops that
    # differ only in a spectrum get different keys, so no cached value is reused across them.
    from ledger.api import open_ledger
    from ledger.store.loops import loop_form, loop_row

    with open_ledger(tmp_path / "k.db", create=True) as lg:
        lg.add_plant("p1", "1/(s+2)")
        for name in ("a", "b", "c"):
            lg.add_loop(name, "p1")
        lg.add_spectrum("a", "sensor_noise", intensity=1e-6, shaping="1/(s+100)")
        lg.add_spectrum("b", "sensor_noise", intensity=2e-6, shaping="1/(s+100)")
        with lg.reading() as s:
            fa, fb, fc = (loop_form(loop_row(s, n)) for n in ("a", "b", "c"))
    assert "spectra" not in fc
    assert fa["spectra"] != fb["spectra"]
    assert {k: v for k, v in fa.items() if k != "spectra"} == fc
