"""Exports of the verification matrix: CSV/JSON parsed back equal to the ledger's results, XLSX
re-read with openpyxl, JUnit XML validated against tests/junit-10-rules.xsd and counted
with junitparser, ReqIF parsed
back with its IDs and relations, the HTML report's figures and caution, a headless-browser
screenshot that is not blank, and the evidence curves against python-control."""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from ledger.api import open_ledger
from ledger.errors import LedgerError
from ledger.exports import SCHEMA_VERSION, export_matrix
from ledger.exports.reqif import REQIF_NS, reqif_identifier
from ledger.exports.rows import COLUMNS, write_atomic
from ledger.exports.workbook import VERDICT_FILLS
from ledger.history.matrix import CAUTION, build_matrix

HERE = Path(__file__).resolve().parent
PLANT = "K/(s*(tau_m*s+1))"
PARAMS = {"K": {"nominal": 180.0, "tol": "10 %"}, "tau_m": {"nominal": 0.03, "tol": "20 %"}}
REQS = [  # key, metric, limit
    ("PZ-1", "phase_margin", ">= 45 deg"),
    ("PZ-2", "settling_time", "<= 60 ms"),
    ("PZ-3", "overshoot", "<= 25 %"),
    ("PZ-4", "peak_sensitivity", "<= 1.6"),
    ("PZ-5", "gain_margin", ">= 6 dB"),      # no phase crossover: inf on this loop
]


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    """A ledger with two loops; revisions r1, r2 on pz; a stale and an unverified entry."""
    d = tmp_path_factory.mktemp("exp")
    lg = open_ledger(d / "x.db", create=True, author="tester")
    lg.add_plant("pz", PLANT, params=PARAMS, output_unit="mm", input_unit="A")
    lg.add_plant("sh", "K/(tau*s+1)", params={"K": 4.0, "tau": 0.2}, output_unit="rad/s",
                 input_unit="V")
    lg.add_loop("pz", "pz", kind="position")
    lg.add_loop("sh", "sh", kind="speed")
    lg.add_requirement("SYS-1", title="Moves <settle> & stay", statement="Moves settle.")
    for key, metric, limit in REQS:
        lg.add_requirement(key, title=f"{metric} bound", statement=f"{metric} {limit}.",
                           metric=metric, limit=limit, parents=["SYS-1"], loops=["pz"],
                           status="approved")
    lg.add_requirement("SH-1", title="Shaker margin", statement="PM >= 60 deg.",
                       metric="phase_margin", limit=">= 60 deg", parents=["SYS-1", "PZ-1"],
                       loops=["sh"], status="approved")
    lg.add_revision("pz", "pid(kp=0.4, ki=4, kd=0.006, tf=0.0008)", rationale="first tuning")
    lg.add_revision("pz", "pid(kp=0.6, ki=4, kd=0.004, tf=0.0008)", rationale="more gain")
    lg.add_revision("sh", "pi(0.5, 5)", rationale="speed PI", verify=False)
    # a tighter PZ-3 verified on the tip r2 only (automatic verification off: a limit edit
    # would re-judge r1 from the cache too), so r1's PZ-3 result turns stale
    lg.auto_verify = False
    lg.edit_requirement("PZ-3", limit="<= 20 %", note="tighter")
    lg.verify("pz", tips_only=True)
    lg.auto_verify = True
    yield lg
    lg.close()


def _data_lines(path: Path) -> str:
    """Everything after the one-line preamble (docs/exports.md, CSV)."""
    return "".join(path.read_text(encoding="utf-8").splitlines(True)[1:])


def _results(lg, loop, label):
    return {r.requirement: r for r in lg.results(loop, label)}


def test_csv_round_trip(book, tmp_path):
    m = build_matrix(book, "all")
    p = export_matrix(m, tmp_path / "m.csv")
    text = p.read_text(encoding="utf-8")
    preamble = next(csv.reader(io.StringIO(text.splitlines()[0])))
    assert preamble[0] == SCHEMA_VERSION and preamble[2] == " ".join(CAUTION.split())
    rows = list(csv.DictReader(io.StringIO(_data_lines(p))))
    assert tuple(rows[0].keys()) == COLUMNS
    assert len(rows) == len(m.entries) == 2 * len(REQS) + 1
    seen_inf = seen_stale = seen_unverified = 0
    for row in rows:
        if row["verdict"] == "unverified":
            seen_unverified += 1
            assert row["value"] == "" and row["loop"] == "sh"
            continue
        # Source: the ledger's own results (lg.results), the record the export must carry
        r = _results(book, row["loop"], row["revision"])[row["requirement"]]
        assert row["verdict"] == r.verdict
        assert row["worst_variant"] == r.worst_variant and row["unit"] == r.unit
        assert int(row["plant_version"]) == r.plant_version
        if math.isinf(r.value):
            seen_inf += 1
            assert row["value"] == ("inf" if r.value > 0 else "-inf")
        assert_allclose(float(row["value"]), r.value, rtol=0)       # exact round trip (repr)
        assert_allclose(float(row["headroom"]), r.headroom, rtol=0)
        seen_stale += row["verdict"] == "stale"
    assert seen_inf == 2 and seen_stale == 1 and seen_unverified == 1


def test_json_schema_and_values(book, tmp_path):
    m = build_matrix(book, "all")
    p = export_matrix(m, tmp_path / "m.json")

    def no_nan(name):
        raise AssertionError(f"JSON holds {name}")

    doc = json.loads(p.read_text(encoding="utf-8"), parse_constant=no_nan)
    assert doc["schema"] == SCHEMA_VERSION and doc["caution"] == CAUTION
    assert doc["counts"] == {k: m.counts().get(k, 0) for k in doc["counts"]}
    assert sum(doc["counts"].values()) == len(m.entries)
    for row in doc["rows"]:
        if row["verdict"] == "unverified":
            assert row["value"] is None
            continue
        r = _results(book, row["loop"], row["revision"])[row["requirement"]]
        # Source: the ledger's own results; infinities are the strings "inf"/"-inf"
        if math.isinf(r.value):
            assert row["value"] == "inf" and row["headroom"] == "inf"
        else:
            assert_allclose(row["value"], r.value, rtol=0)
            assert_allclose(row["headroom"], r.headroom, rtol=0)
            assert_allclose(row["headroom_fraction"], r.headroom_fraction, rtol=0)
        assert row["verdict"] == r.verdict and row["engine_version"] == r.engine_version


def test_xlsx_values_fills_panes_filters(book, tmp_path):
    import datetime

    from openpyxl import load_workbook
    from openpyxl.utils import get_column_letter

    m = build_matrix(book, "all")
    p = export_matrix(m, tmp_path / "m.xlsx")
    wb = load_workbook(p)
    assert wb.sheetnames == ["Summary", "pz", "sh"]
    summary = wb["Summary"]
    assert summary["B3"].value == CAUTION
    head = [c.value for c in summary[5]]
    pz_row = [c.value for c in summary[6]]
    counts = {h.lower(): v for h, v in zip(head[2:], pz_row[2:])}
    pz_entries = [e for e in m.entries if e.loop == "pz"]
    for word in ("pass", "fail", "stale"):
        assert counts[word] == sum(e.verdict == word for e in pz_entries)
    ws = wb["pz"]
    assert ws.freeze_panes == "A2"
    last = get_column_letter(len(COLUMNS))
    assert ws.auto_filter.ref == f"A1:{last}{1 + len(pz_entries)}"
    cols = [c.value for c in ws[1]]
    assert tuple(cols) == COLUMNS  # the documented column names (docs/exports.md)
    # print set-up, read back through openpyxl (ECMA-376 pageSetup / definedName Print_Titles)
    assert ws.page_setup.orientation == "landscape"
    assert ws.page_setup.fitToWidth == 1 and ws.sheet_properties.pageSetUpPr.fitToPage
    assert ws.print_title_rows.replace("$", "") == "1:1"
    assert str(ws.print_area).replace("$", "").endswith(f"A1:{last}{1 + len(pz_entries)}")
    ti = cols.index("verified_at")
    for row in ws.iter_rows(min_row=2):
        if row[ti].value is not None:
            assert isinstance(row[ti].value, datetime.datetime)
            assert row[ti].is_date
    vi, ki, ri, vali = (cols.index(n) for n in ("verdict", "requirement", "revision", "value"))
    for row in ws.iter_rows(min_row=2):
        word = row[vi].value
        assert row[vi].fill.fgColor.rgb.endswith(VERDICT_FILLS[word])   # colour ...
        assert word in VERDICT_FILLS                                       # ... and the word
        r = _results(book, "pz", row[ri].value)[row[ki].value]
        # Source: the ledger's results; openpyxl writes numbers with 16 significant digits
        if math.isinf(r.value):
            assert row[vali].value == "inf"
        else:
            assert_allclose(row[vali].value, r.value, rtol=1e-15)
    assert ws.column_dimensions["E"].width > 8


def _junit_counts(path):
    from lxml import etree

    tree = etree.parse(str(path))
    cases = tree.findall(".//testcase")
    return tree, {"tests": len(cases), "failures": len(tree.findall(".//testcase/failure")),
                  "errors": len(tree.findall(".//testcase/error")),
                  "skipped": len(tree.findall(".//testcase/skipped"))}


def _junit_schema():
    from lxml import etree

    # Source: tests/junit-10-rules.xsd, written from the published rules of junit-10.xsd, the
    # JUnit schema CI servers commonly validate against (origin named in that file)
    return etree.XMLSchema(etree.parse(str(HERE / "junit-10-rules.xsd")))


def _independent_counts(path):
    """Counts read by junitparser, an independent JUnit reader: from the test cases' outcomes
    and from the attributes it reads on every level."""
    from junitparser import Error, Failure, JUnitXml, Skipped

    doc = JUnitXml.fromfile(str(path))
    suites = list(doc)
    outcomes = [type(r) for s in suites for c in s for r in c.result]
    per_case = {"tests": sum(1 for s in suites for _ in s),
                "failures": outcomes.count(Failure), "errors": outcomes.count(Error),
                "skipped": outcomes.count(Skipped)}
    suite_attrs = {k: sum(getattr(s, k) for s in suites)
                   for k in ("tests", "failures", "errors", "skipped")}
    top = {"tests": doc.tests, "failures": doc.failures, "errors": doc.errors}
    return doc, per_case, suite_attrs, top


def _with_error(m):
    """The matrix with one passing entry turned into an error, as a result that could not be
    computed reads."""
    i = next(k for k, e in enumerate(m.entries) if e.verdict == "pass")
    e = m.entries[i]
    bad = dataclasses.replace(e.result, verdict="error", value=None, headroom=None,
                              reason="cannot compute on nominal: test")
    return dataclasses.replace(m, entries=m.entries[:i] + (dataclasses.replace(e, result=bad),)
                               + m.entries[i + 1:])


def test_junit_valid_and_counted(book, tmp_path):
    """Default: stale and unverified entries are failures ('stale, run verify'), so a CI gate
    turns red; the file passes the published schema rules and an independent reader agrees
    with the ledger's counts."""
    m = _with_error(build_matrix(book, "all"))
    p = export_matrix(m, tmp_path / "m.xml")
    tree, n = _junit_counts(p)
    _junit_schema().assertValid(tree)
    c = m.counts()
    # the book has a stale entry (pz/r1 PZ-3 after the edit) and an unverified column (sh/r1)
    assert c.get("stale", 0) >= 1 and c.get("unverified", 0) >= 1
    assert c.get("error") == 1 and c.get("fail", 0) >= 1
    want = {"tests": len(m.entries),
            "failures": c.get("fail", 0) + c.get("stale", 0) + c.get("unverified", 0),
            "errors": c.get("error", 0), "skipped": 0}
    assert n == want
    root = tree.getroot()
    assert "skipped" not in root.attrib      # not an attribute of <testsuites> in the schema
    assert {k: int(root.get(k)) for k in ("tests", "failures", "errors")} == {
        k: want[k] for k in ("tests", "failures", "errors")}
    doc, per_case, suite_attrs, top = _independent_counts(p)
    assert per_case == want and suite_attrs == want
    assert top == {k: want[k] for k in ("tests", "failures", "errors")}
    # messages: value and limit for a fail, "stale/unverified, run verify" for the others
    for case in tree.findall(".//testcase"):
        f = case.find("failure")
        col = case.getparent().get("name").split("/")[1]
        r = _results(book, case.get("classname"), col).get(case.get("name"))
        if f is None:
            continue
        if f.get("type") == "fail":
            assert r.verdict == "fail"
            assert f"limit {r.limit_text}" in f.get("message")
            # the value reads in the limit's unit, 4 significant digits; reference: pint
            unit_written = r.limit_text.split(None, 2)[2] if r.limit_text.count(" ") >= 2 else ""
            if unit_written in ("ms", "s", "deg", "us"):
                import pint

                q = pint.UnitRegistry().Quantity(r.value, r.unit).to(unit_written).magnitude
                assert f"value {q:.4g} {unit_written} does not meet" in f.get("message")
            assert f"{r.value!r}" in f.text  # the raw value in the details
        elif f.get("type") == "stale":
            assert r.verdict == "stale" and f.get("message") == "stale, run verify"
        else:
            assert f.get("type") == "unverified" and r is None
            assert f.get("message") == "unverified, run verify"
    # property names never repeat across suites (a reader that merges every suite's properties
    # into one table, xunitparser 1.3, asserts on a repeated name)
    names = [p_.get("name") for p_ in tree.findall(".//property")]
    assert len(names) == len(set(names)) and "caution" in names


def test_junit_stale_as_skipped(book, tmp_path):
    """The option keeps the older mapping: stale and unverified as <skipped>."""
    m = build_matrix(book, "all")
    p = export_matrix(m, tmp_path / "m.xml", stale_as_skipped=True)
    tree, n = _junit_counts(p)
    _junit_schema().assertValid(tree)
    c = m.counts()
    want = {"tests": len(m.entries), "failures": c.get("fail", 0), "errors": c.get("error", 0),
            "skipped": c.get("stale", 0) + c.get("unverified", 0)}
    assert n == want and want["skipped"] >= 2
    assert {s.get("message") for s in tree.findall(".//skipped")} == {
        "stale, run verify", "unverified, run verify"}
    _, per_case, suite_attrs, _ = _independent_counts(p)
    assert per_case == want and suite_attrs == want
    with pytest.raises(LedgerError, match="JUnit export only"):
        export_matrix(m, tmp_path / "m.csv", stale_as_skipped=True)
    assert not (tmp_path / "m.csv").exists()


def test_junit_schema_catches_what_ci_servers_refuse(book, tmp_path):
    """The schema must be able to fail: a suite without its required counts, and the older
    export's ``skipped`` attribute on <testsuites>."""
    from lxml import etree

    schema = _junit_schema()
    doc = etree.fromstring(b"<testsuites><testsuite name='x'><testcase name='a' classname='b'/>"
                           b"</testsuite></testsuites>")
    assert not schema.validate(doc)
    p = export_matrix(build_matrix(book, "tips"), tmp_path / "t.xml")
    ok = etree.parse(str(p))
    assert schema.validate(ok)
    ok.getroot().set("skipped", "0")
    assert not schema.validate(ok)


def test_cli_export_junit_stale_option(book, tmp_path, monkeypatch):
    from typer.testing import CliRunner

    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", book.url)
    c = build_matrix(book, "all").counts()
    late = c.get("stale", 0) + c.get("unverified", 0)
    assert late >= 2
    for extra, want in (([], {"failures": c.get("fail", 0) + late, "skipped": 0}),
                        (["--stale-as-skipped"], {"failures": c.get("fail", 0), "skipped": late})):
        out = tmp_path / f"gate{len(extra)}.xml"
        res = CliRunner().invoke(app, ["export-matrix", str(out), "--all", *extra])
        assert res.exit_code == 0, res.output
        _, n = _junit_counts(out)
        assert {k: n[k] for k in want} == want
    res = CliRunner().invoke(app, ["export-matrix", str(tmp_path / "x.csv"),
                                   "--stale-as-skipped"])
    assert res.exit_code == 1 and "JUnit export only" in res.output
    assert not (tmp_path / "x.csv").exists()


def test_reqif_ids_and_relations(book, tmp_path):
    from lxml import etree

    m = build_matrix(book)
    p = export_matrix(m, tmp_path / "m.reqif")
    ns = {"r": REQIF_NS}
    tree = etree.parse(str(p))
    assert tree.getroot().tag == f"{{{REQIF_NS}}}REQ-IF"
    objs = tree.findall(".//r:SPEC-OBJECTS/r:SPEC-OBJECT", ns)
    by_id = {o.get("IDENTIFIER"): o.get("LONG-NAME") for o in objs}
    assert sorted(by_id.values()) == sorted(q.key for q in m.requirements)
    attr_name = {a.get("IDENTIFIER"): a.get("LONG-NAME")
                 for a in tree.findall(".//r:ATTRIBUTE-DEFINITION-STRING", ns)}
    for o in objs:
        vals = {attr_name[v.find(".//r:ATTRIBUTE-DEFINITION-STRING-REF", ns).text]:
                v.get("THE-VALUE") for v in o.findall(".//r:ATTRIBUTE-VALUE-STRING", ns)}
        q = next(q for q in m.requirements if q.key == vals["ID"])
        assert vals["Statement"] == q.statement and vals["Limit"] == q.limit_text
        assert o.get("IDENTIFIER") == reqif_identifier("req", q.key)
    rels = {(by_id[r.find("r:SOURCE/r:SPEC-OBJECT-REF", ns).text],
             by_id[r.find("r:TARGET/r:SPEC-OBJECT-REF", ns).text])
            for r in tree.findall(".//r:SPEC-RELATION", ns)}
    expect = {(q.key, p_) for q in m.requirements for p_ in q.parents}
    assert rels == expect and ("SH-1", "PZ-1") in rels
    refs = [h.text for h in tree.findall(".//r:SPECIFICATION//r:SPEC-HIERARCHY/r:OBJECT/"
                                         "r:SPEC-OBJECT-REF", ns)]
    assert sorted(refs) == sorted(by_id)                 # each requirement once in the hierarchy
    ids = [e.get("IDENTIFIER") for e in tree.iter() if e.get("IDENTIFIER")]
    assert len(ids) == len(set(ids))
    p2 = export_matrix(build_matrix(book), tmp_path / "again.reqif")
    ids2 = [e.get("IDENTIFIER") for e in etree.parse(str(p2)).iter() if e.get("IDENTIFIER")]
    assert ids2 == ids                                    # deterministic identifiers


@pytest.fixture(scope="module")
def report(book, tmp_path_factory):
    m = build_matrix(book, "tips")
    p = export_matrix(m, tmp_path_factory.mktemp("html") / "report.html", ledger=book)
    return m, p


def test_html_figures_caution_escaping(report):
    m, p = report
    text = p.read_text(encoding="utf-8")
    with_metric = [e for e in m.entries if e.requirement.metric]
    assert len(with_metric) == len(REQS) + 1
    # one evidence figure per entry, plus the family's Nyquist and Nichols figure once per
    # revision and highlighted member of the entries on the loop gain (ledger/exports/html.py)
    n_family = text.count("class='figure family-views'")
    assert n_family >= 1
    assert text.count("<svg") == len(with_metric) + n_family
    assert text.count("class='evidence'") == len(with_metric)
    assert CAUTION in text and "class='caution'" in text
    assert "<settle>" not in text                      # the need's title, escaped or absent
    for bad in ("<script", "<link", " src=\"http", "@import", "url(http"):
        assert bad not in text
    assert "break-before: page" in text and "@media print" in text
    # the evidence heading starts a printed page and the first section follows it directly
    assert ".evidence-head + .evidence { break-before: auto;" in text
    for e in with_metric:
        assert f"{e.requirement.key} v{e.requirement.version}" in text


def test_html_needs_the_ledger(book, tmp_path):
    with pytest.raises(LedgerError, match="needs the ledger"):
        export_matrix(build_matrix(book), tmp_path / "r.html")


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (Debian: apt-get install "
                    "-y chromium); needed to screenshot the HTML report")
def test_html_screenshot_not_blank(report, tmp_path):
    from PIL import Image

    _, p = report
    shot = tmp_path / "shot.png"
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                        "--no-first-run", "--disable-background-networking",
                        "--disable-component-update", "--disable-sync",
                        f"--user-data-dir={profile}", f"--screenshot={shot}",
                        "--window-size=1280,2000", p.as_uri()],
                       check=True, capture_output=True, timeout=120)
    img = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert img.shape == (2000, 1280)
    dark = (img < 128).mean()
    # common practice, no source: a rendered text page has a few percent dark pixels
    assert 0.005 < dark < 0.5, dark
    assert img.std() > 10.0


def test_evidence_curves_match_python_control(book):
    """The curves drawn are the engine's; check them against python-control on the nominal."""
    import control

    from ledger.exports.evidence import column_curves

    cc = column_curves(book, "pz", "r2", worst=set())
    assert cc.variants == ("nominal",)
    s = control.tf("s")
    G = 180.0 / (s * (0.03 * s + 1))
    C = 0.6 + 4 / s + 0.004 * s / (0.0008 * s + 1)
    T = control.feedback(C * G, 1)
    st = cc.step("r->y")
    t, y = st.t["nominal"], st.y["nominal"]
    pick = np.unique(np.linspace(1, t.size - 1, 12).astype(int))
    # Source: python-control 0.10 step_response (reference library); a step input is held
    # constant, so its exact discretisation on [0, t_i] gives y(t_i) exactly
    ref = np.array([control.step_response(T, T=np.linspace(0.0, t[i], 3)).outputs[-1]
                    for i in pick])
    assert_allclose(y[pick], ref, rtol=1e-6, atol=1e-9)
    fc = cc.freq()
    gm, pm, _, _, wp, _ = control.stability_margins(C * G)
    # Source: python-control stability_margins (pm in deg; gm is a ratio: inf here, as the
    # phase of this type-2 loop never reaches -180 deg)
    assert_allclose(fc.phase_margin["nominal"], pm, rtol=1e-6)
    assert_allclose(fc.gain_crossover["nominal"], wp, rtol=1e-6)
    assert math.isinf(fc.gain_margin["nominal"]) and math.isinf(gm)
    w = fc.w["nominal"][::97]
    L_ref = (C * G)(1j * w)
    assert_allclose(fc.L["nominal"][::97], L_ref, rtol=1e-9)
    assert_allclose(fc.S["nominal"][::97], 1 / (1 + L_ref), rtol=1e-9)


def test_suffix_and_atomic_write(book, tmp_path):
    m = build_matrix(book)
    with pytest.raises(LedgerError, match="cannot tell the format"):
        export_matrix(m, tmp_path / "m.zip")
    with pytest.raises(LedgerError, match="unknown export format"):
        export_matrix(m, tmp_path / "m.csv", "pdf")
    target = tmp_path / "keep.csv"
    target.write_text("old")

    def broken(tmp):
        tmp.write_text("half")
        raise OSError(28, "No space left on device")

    with pytest.raises(LedgerError, match="cannot write"):
        write_atomic(target, broken)
    assert target.read_text() == "old"
    assert [x.name for x in tmp_path.iterdir() if x.name.endswith(".part")] == []
    export_matrix(m, target, "json")                 # explicit format wins over the suffix
    assert json.loads(target.read_text())["schema"] == SCHEMA_VERSION


def test_cli_export_matrix(book, tmp_path, monkeypatch):
    from typer.testing import CliRunner

    from ledger.cli import app

    monkeypatch.setenv("LOOPLEDGER_DB", book.url)
    out = tmp_path / "cols.json"
    res = CliRunner().invoke(app, ["export-matrix", str(out), "--revision", "pz:r1",
                                   "--revision", "pz:r2"])
    assert res.exit_code == 0, res.output
    assert "wrote" in res.output and "pz/r1, pz/r2" in res.output and "Caution" in res.output
    doc = json.loads(out.read_text())
    assert [(c["loop"], c["revision"]) for c in doc["revisions"]] == [("pz", "r1"), ("pz", "r2")]
    res = CliRunner().invoke(app, ["export-matrix", str(tmp_path / "x.csv"), "--revision", "pz"])
    assert res.exit_code == 1 and "LOOP:LABEL" in res.output


def _req(metric, limit_value, limit_text, settings=None):
    """A requirement record for drawing only (not stored)."""
    from datetime import datetime, timezone

    from ledger.records import RequirementInfo

    return RequirementInfo(key="T-1", version=1, title="t", statement="s", rationale="",
                           method="analysis", status="approved", metric=metric,
                           settings=settings or {}, comparator="<=", limit_value=limit_value,
                           limit_text=limit_text, unit="", parents=(), loops=("pz",),
                           author="t", note="", content_hash="", created_at=datetime.now(timezone.utc))


def test_every_metric_gets_a_labelled_figure(book):
    """Each metric of the catalogue draws without error, with axis labels, units and a legend."""
    from ledger.engine.metrics import METRICS
    from ledger.exports.evidence import column_curves
    from ledger.exports.plots import entry_plot

    cc = column_curves(book, "pz", "r2", worst={"corner:K-,tau_m+"})
    assert cc.variants == ("nominal", "corner:K-,tau_m+")
    res = {r.requirement: r for r in book.results("pz", "r2")}["PZ-1"]
    for name, d in METRICS.items():
        settings = {"frequency": 20.0} if dict(d.settings).get("frequency", 0) is None else {}
        fig = entry_plot(cc, _req(name, 0.5, "<= 0.5", settings), res)
        for ax in fig.axes:
            assert "(" in ax.get_xlabel() and ")" in ax.get_xlabel(), (name, ax.get_xlabel())
            assert ax.get_ylabel(), name
            texts = [t.get_text() for t in ax.get_legend().get_texts()]
            assert any("nominal" in t for t in texts), (name, texts)


def test_limits_drawn_where_the_definitions_put_them(book):
    """Overshoot line at y_final (1 + limit/100), settling band at y_final (1 +- band), Ms line
    at the limit, disk-margin bound 2/alpha."""
    import control

    from ledger.exports.evidence import column_curves
    from ledger.exports.plots import entry_plot

    cc = column_curves(book, "pz", "r2", worst=set())
    res = {r.requirement: r for r in book.results("pz", "r2")}
    s = control.tf("s")
    L = (0.6 + 4 / s + 0.004 * s / (0.0008 * s + 1)) * 180.0 / (s * (0.03 * s + 1))
    # Source: final-value theorem, evaluated by python-control dcgain of T = L/(1+L) (= 1 for
    # an integrating loop)
    yf = float(control.dcgain(control.feedback(L, 1)))

    def line(fig, start):
        for ax in fig.axes:
            for ln in ax.get_lines():
                if ln.get_label().startswith(start):
                    return ln
        raise AssertionError(f"no line labelled {start!r}")

    fig = entry_plot(cc, _req("overshoot", 20.0, "<= 20 %"), res["PZ-3"])
    assert_allclose(line(fig, "overshoot limit").get_ydata(), [yf * 1.2] * 2, rtol=1e-9)
    fig = entry_plot(cc, _req("settling_time", 0.06, "<= 60 ms"), res["PZ-2"])
    assert_allclose(line(fig, "settling-time limit").get_xdata(), [0.06] * 2, rtol=1e-12)
    assert_allclose(line(fig, "settling time (ledger").get_xdata(), [res["PZ-2"].value] * 2,
                    rtol=1e-12)
    band = next(p for ax in fig.axes for p in ax.patches if "settling band" in p.get_label())
    ys = band.get_transform().transform(band.get_path().vertices)[:, 1]
    ys = fig.axes[0].transData.inverted().transform(
        np.column_stack([np.zeros_like(ys), ys]))[:, 1]
    assert_allclose([ys.min(), ys.max()], [yf * 0.98, yf * 1.02], rtol=1e-9)
    fig = entry_plot(cc, _req("peak_sensitivity", 1.6, "<= 1.6"), res["PZ-4"])
    assert_allclose(line(fig, "Ms limit").get_ydata(), [1.6] * 2, rtol=1e-12)
    # Source: the balanced disk margin alpha = 2 / max|S - T| and its phase interval
    # 2 atan(alpha/2) (Seiler, Packard and Gahinet, IEEE Control Systems Magazine 2020)
    fig = entry_plot(cc, _req("disk_phase_margin", 30.0, ">= 30 deg"), res["PZ-1"])
    alpha = 2 * math.tan(math.radians(30.0) / 2)
    assert_allclose(line(fig, "bound 2/alpha").get_ydata(), [2 / alpha] * 2, rtol=1e-12)
