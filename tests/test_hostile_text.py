"""Control characters: refused on input by every entry path (API, CLI, spec import), and every
export stays readable by an independent reader when hostile text is already stored (written
with plain SQL, behind the ledger's back).

The character classes come from published rules: XML 1.0 (Fifth Edition) section 2.2, the
Char production (#x9 | #xA | #xD | [#x20-#xD7FF] | [#xE000-#xFFFD] | [#x10000-#x10FFFF]);
Unicode's noncharacters U+FFFE/U+FFFF (The Unicode Standard, section 23.7); openpyxl's own
``ILLEGAL_CHARACTERS_RE`` for what a worksheet cell refuses."""

from __future__ import annotations

import csv
import io
import json
import re
import tomllib
import zipfile

import pytest
from sqlalchemy import create_engine, text
from typer.testing import CliRunner

from ledger.api import open_ledger
from ledger.cli import app
from ledger.errors import LedgerError

# XML 1.0 Char production, negated (the reference the exports are checked against)
XML_FORBIDDEN = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")


def _cli(*args):
    return CliRunner().invoke(app, list(args), env={"LOOPLEDGER_AUTHOR": "tester",
                                                    "COLUMNS": "200"})


def _base(lg):
    lg.add_plant("p", "1/(s+1)")
    lg.add_loop("lp", "p", kind="speed")


# -- input: one rule, every entry path ---------------------------------------------------
BAD = [("\x0c", "form feed"), ("\x00", "NUL"), ("\x1b[31m", "escape sequence"),
       ("\ufffe", "noncharacter"), ("\x85", "C1 control"), ("\x7f", "delete")]


@pytest.mark.parametrize("bad,_name", BAD)
def test_api_refuses_control_characters(lg, bad, _name):
    _base(lg)
    before = lg.counts()
    attempts = [
        lambda: lg.add_requirement("R-1", title="t", statement=f"PM{bad}45 deg."),
        lambda: lg.add_requirement("R-1", title=f"t{bad}x", statement="s"),
        lambda: lg.add_requirement("R-1", title="t", statement="s", rationale=f"why{bad}not"),
        lambda: lg.add_plant("q", "1/(s+1)", description=f"d{bad}e"),
        lambda: lg.add_plant("q", "K/(s+1)", params={"K": 1.0, f"X{bad}": 2.0}),
        lambda: lg.add_plant("q", "1/(s+1)", input_unit=f"V{bad}A"),
        lambda: lg.add_loop("l2", "p", description=f"d{bad}e"),
        lambda: lg.add_revision("lp", "pi(1, 1)", rationale=f"first{bad}try"),
    ]
    for attempt in attempts:
        with pytest.raises(LedgerError, match="U\\+00|U\\+FFFE"):
            attempt()
    assert lg.counts() == before


def test_multiline_fields_take_tab_and_newlines_one_line_fields_none(lg):
    _base(lg)
    r = lg.add_requirement("R-1", title="PM", statement="Line one.\n\tLine two.\r\nThree.",
                           rationale="a\tb")
    assert r.statement == "Line one.\n\tLine two.\r\nThree."
    for title in ("two\nlines", "tab\there", "sep\u2028arator"):
        with pytest.raises(LedgerError, match="one line"):
            lg.add_requirement("R-2", title=title, statement="s")
    with pytest.raises(LedgerError, match="statement"):
        lg.edit_requirement("R-1", statement="edited\x0cpage")
    assert lg.requirement("R-1").version == 1


def test_cli_refuses_a_form_feed_in_a_statement(tmp_path):
    db = tmp_path / "c.db"
    assert _cli("init", str(db)).exit_code == 0
    res = _cli(f"--db={db}", "requirement", "add", "R-1", "--title", "PM",
               "--statement", "PM at least\x0c45 deg.")
    assert res.exit_code == 1, res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "U+000C (form feed)" in lines[0], res.output
    with open_ledger(db) as lg:
        assert lg.requirements() == []


def test_spec_import_refuses_a_form_feed_and_writes_nothing(tmp_path):
    db = tmp_path / "s.db"
    open_ledger(db, create=True).close()
    spec = tmp_path / "s.toml"
    spec.write_text('[[plant]]\nname = "p"\nmodel = "1/(s+1)"\n'
                    '[[requirement]]\nid = "R-1"\ntitle = "PM"\nstatement = "PM\\f45 deg"\n',
                    encoding="utf-8")
    res = _cli(f"--db={db}", "import", str(spec))
    assert res.exit_code == 1 and "U+000C" in res.output and "R-1" in res.output, res.output
    with open_ledger(db) as lg:
        assert lg.plants() == [] and lg.requirements() == []


def test_sign_off_refuses_control_characters(lg):
    from ledger.signoff import create_baseline, sign_baseline

    _base(lg)
    lg.add_requirement("R-1", title="PM", statement="PM", metric="phase_margin",
                       limit=">= 30 deg", loops=["lp"])
    lg.add_revision("lp", "pi(1, 1)", rationale="first")
    with pytest.raises(LedgerError, match="baseline note"):
        create_baseline(lg, "B1", note="n\x00")
    create_baseline(lg, "B1")
    with pytest.raises(LedgerError, match="sign-off name"):
        sign_baseline(lg, "B1", signer="A\x1b[2J", role="lead", statement="ok")


# -- exports of hostile stored text ------------------------------------------------------
def _hostile(db_url: str) -> str:
    # PostgreSQL text cannot hold NUL at all; every other character is stored as given
    nul = "\x00" if not db_url.startswith("postgresql") else ""
    return (f"T{nul}\x01\x0c\x1b[31m\x7f\x85\ufffe\uffff<b>&amp;\"'\u2028]]>--"
            f"\x1b]0;x\x07\ud7ff\U0010fffd")


@pytest.fixture
def hostile(db_url, tmp_path):
    h = _hostile(db_url)
    with open_ledger(db_url, create=True, author="tester") as lg:
        _base(lg)
        lg.add_requirement("R-1", title="PM", statement="PM", metric="phase_margin",
                           limit=">= 30 deg", loops=["lp"])
        lg.add_requirement("R-2", title="OS", statement="OS", metric="overshoot",
                           limit="<= 1 %", loops=["lp"], parents=["R-1"])
        lg.add_revision("lp", "pi(1, 1)", rationale="first")
    url = db_url if "://" in db_url else f"sqlite:///{db_url}"
    eng = create_engine(url)
    with eng.begin() as c:
        for table, cols in {"requirement_version": ["title", "statement", "rationale", "note"],
                            "requirement": ["key"], "loop": ["name", "description"],
                            "revision": ["label", "rationale", "author"],
                            "plant": ["name", "description"],
                            "plant_version": ["note", "input_unit"],
                            "result": ["reason", "worst_variant"]}.items():
            for col in cols:
                c.execute(text(f"UPDATE {table} SET {col} = {col} || :h"), {"h": h})
    eng.dispose()
    return db_url, h


def _matrix(db_url):
    from ledger.history.matrix import build_matrix

    lg = open_ledger(db_url)
    return lg, build_matrix(lg, "all", title="Matrix \x0c title")


def _no_forbidden(raw: str, what: str) -> None:
    m = XML_FORBIDDEN.search(raw)
    assert m is None, f"{what}: U+{ord(m.group()):04X} at {m.start()}"


def test_csv_export_of_hostile_text(hostile, tmp_path):
    from ledger.exports import export_matrix

    db_url, h = hostile
    lg, m = _matrix(db_url)
    with lg:
        path = export_matrix(m, tmp_path / "m.csv")
    raw = path.read_text(encoding="utf-8")
    _no_forbidden(raw, "csv")
    # the documented recipe (docs/exports.md): the first CSV record is the preamble
    records = list(csv.reader(io.StringIO(raw, newline="")))
    rows = [dict(zip(records[1], r)) for r in records[2:]]
    assert len(rows) == 2
    assert rows[0]["title"].startswith("PMT") and "\\u000c" in rows[0]["title"]
    assert "<b>&amp;" in rows[0]["statement"]  # CSV carries it as text, unchanged


def test_json_export_of_hostile_text(hostile, tmp_path):
    from ledger.exports import export_matrix

    db_url, h = hostile
    lg, m = _matrix(db_url)
    with lg:
        path = export_matrix(m, tmp_path / "m.json")
    doc = json.loads(path.read_text(encoding="utf-8"))  # the standard library's reader
    # JSON can carry every stored character (RFC 8259 escapes): the text is kept exactly
    assert {r["title"] for r in doc["rows"]} == {"PM" + h, "OS" + h}


def test_xlsx_export_of_hostile_text(hostile, tmp_path):
    openpyxl = pytest.importorskip("openpyxl")
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

    from ledger.exports import export_matrix

    db_url, _ = hostile
    lg, m = _matrix(db_url)
    with lg:
        path = export_matrix(m, tmp_path / "m.xlsx")
    wb = openpyxl.load_workbook(path)
    cells = [str(c.value) for ws in wb.worksheets for row in ws.iter_rows() for c in row
             if c.value is not None]
    assert not any(ILLEGAL_CHARACTERS_RE.search(v) for v in cells)
    assert any(v.startswith("PMT") and "\\u000c" in v for v in cells)
    with zipfile.ZipFile(path) as z:  # every part is well-formed XML 1.0
        from lxml import etree

        for name in z.namelist():
            if name.endswith(".xml"):
                etree.fromstring(z.read(name))


@pytest.mark.parametrize("fmt,suffix", [("junit", "xml"), ("reqif", "reqif")])
def test_xml_exports_of_hostile_text(hostile, tmp_path, fmt, suffix):
    from lxml import etree

    from ledger.exports import export_matrix

    db_url, _ = hostile
    lg, m = _matrix(db_url)
    with lg:
        path = export_matrix(m, tmp_path / f"m.{suffix}", fmt)
    raw = path.read_bytes()
    _no_forbidden(raw.decode("utf-8"), fmt)
    root = etree.fromstring(raw)  # lxml (libxml2) parses it as XML 1.0
    texts = " ".join(root.itertext()) + " ".join(v for e in root.iter() for v in e.attrib.values())
    assert "<b>&amp;" in texts and "\\u000c" in texts


def test_html_export_of_hostile_text(hostile, tmp_path):
    import lxml.html
    from lxml import etree

    from ledger.exports import export_matrix

    db_url, _ = hostile
    lg, m = _matrix(db_url)
    with lg:
        path = export_matrix(m, tmp_path / "m.html", ledger=lg)
    raw = path.read_text(encoding="utf-8")
    # HTML (WHATWG, "control" and "noncharacter" parse errors): none of them raw, nor DEL/C1
    assert not re.search("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f\ufffe\uffff]", raw)
    doc = lxml.html.fromstring(raw)
    # the report bolds IDs itself; a stored '<b>' must stay text, never open an element
    assert not any((b.text or "").startswith("&amp;") for b in doc.iter("b"))
    assert "<b>&amp;" in doc.text_content()
    for svg in re.findall(r"<svg.*?</svg>", raw, flags=re.S):  # inline figures stay XML
        etree.fromstring(svg.encode("utf-8"))


def test_spec_export_of_hostile_text(hostile, tmp_path):
    from ledger.spec import export_spec

    db_url, h = hostile
    with open_ledger(db_url) as lg:
        path = export_spec(lg, tmp_path / "s.toml")
    data = tomllib.loads(path.read_text(encoding="utf-8"))  # TOML 1.0 escapes every control
    assert {r["title"] for r in data["requirement"]} == {"PM" + h, "OS" + h}


def test_sign_off_document_of_hostile_text(hostile, tmp_path):
    """The baseline document (`baseline show --json`, what a sign-off approves) of hostile
    stored text is valid JSON and keeps the text."""
    from ledger.signoff import create_baseline

    db_url, h = hostile
    with open_ledger(db_url, author="tester") as lg:
        create_baseline(lg, "B1")
    res = _cli(f"--db={db_url}", "baseline", "show", "B1", "--json")
    assert res.exit_code == 0, res.output
    doc = json.loads(res.output)
    assert {c["requirement"] for c in doc["cells"]} == {"R-1" + h, "R-2" + h}


def test_terminal_tables_escape_control_characters(hostile):
    db_url, _ = hostile
    res = _cli(f"--db={db_url}", "requirement", "list")
    assert res.exit_code == 0, res.output
    assert "\x1b" not in res.output and "\\u001b" in res.output


#: what may drive a terminal: C0 controls but tab and line breaks, DEL, C1 controls
TERMINAL_CONTROL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]")


@pytest.fixture
def hostile_free_text(db_url):
    """A ledger whose free-text fields (not its names and keys) were edited by SQL to hold
    control characters and ESC sequences."""
    h = _hostile(db_url)
    with open_ledger(db_url, create=True, author="tester") as lg:
        _base(lg)
        lg.add_requirement("R-1", title="PM", statement="PM", metric="phase_margin",
                           limit=">= 30 deg", loops=["lp"])
        lg.add_revision("lp", "pi(1, 1)", rationale="first")
    url = db_url if "://" in db_url else f"sqlite:///{db_url}"
    eng = create_engine(url)
    with eng.begin() as c:
        for table, cols in {"requirement_version": ["title", "statement", "rationale", "note"],
                            "loop": ["description"], "revision": ["rationale", "author"],
                            "plant": ["description"], "plant_version": ["note", "author"]
                            }.items():
            for col in cols:
                c.execute(text(f"UPDATE {table} SET {col} = {col} || :h"), {"h": h})
    eng.dispose()
    return db_url


@pytest.mark.parametrize("args", [("plant", "show", "p"), ("loop", "show", "lp"),
                                  ("requirement", "show", "R-1"), ("revision", "show", "lp"),
                                  ("revision", "list", "lp"), ("trace",)],
                         ids=lambda a: " ".join(a))
def test_single_record_views_escape_control_characters(hostile_free_text, args):
    # stored text echoed line by line (not through a table) is escaped the same way
    res = _cli(f"--db={hostile_free_text}", *args)
    assert res.exit_code == 0, res.output
    m = TERMINAL_CONTROL.search(res.output)
    assert m is None, f"U+{ord(m.group()):04X} reached the terminal: {res.output!r}"
    assert "\\u001b" in res.output, res.output


@pytest.mark.parametrize("args", [("plant", "show", "p", "--json"),
                                  ("requirement", "show", "R-1", "--json")],
                         ids=lambda a: " ".join(a))
def test_json_views_keep_the_stored_text(hostile_free_text, args):
    # the escaping keeps JSON's meaning: the parsed text is the stored text (NUL aside,
    # which PostgreSQL cannot store)
    res = _cli(f"--db={hostile_free_text}", *args)
    assert res.exit_code == 0, res.output
    assert TERMINAL_CONTROL.search(res.output) is None
    stored = [v for v in json.loads(res.output).values() if isinstance(v, str)]
    assert any("\x1b[31m\x7f\x85\ufffe" in v for v in stored), res.output


# -- the escaping helpers against the readers themselves ---------------------------------
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

ANY_TEXT = st.text(alphabet=st.characters(min_codepoint=0, max_codepoint=0x10FFFF), max_size=60)


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT)
def test_xml_safe_text_is_accepted_by_libxml2(s):
    from lxml import etree

    from ledger.text import xml_safe

    el = etree.Element("e", a=xml_safe(s))  # lxml refuses non-XML text with ValueError
    el.text = xml_safe(s)
    assert etree.fromstring(etree.tostring(el)).text == (xml_safe(s) or None)


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT)
def test_cell_safe_text_is_accepted_by_openpyxl(s):
    openpyxl = pytest.importorskip("openpyxl")

    from ledger.text import cell_safe

    ws = openpyxl.Workbook().active
    ws["A1"] = cell_safe(s)  # raises IllegalCharacterError on what a cell cannot hold


@settings(max_examples=300, deadline=None)
@given(ANY_TEXT)
def test_input_rule_accepts_exactly_what_the_exports_keep(s):
    """Text the input rule accepts for a multi-line field passes every export unchanged."""
    from ledger.text import cell_safe, first_bad, printable, xml_safe

    if first_bad(s, multiline=True) is None:
        assert xml_safe(s) == s and cell_safe(s) == s and printable(s) == s
