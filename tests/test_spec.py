"""Spec files: round trip, idempotent import, new versions on change, errors that name the
file, the record and the field, and nothing written on error."""

from __future__ import annotations

import textwrap

import pytest

from ledger.api import open_ledger
from ledger.errors import LedgerError, SpecError
from ledger.spec import dump_spec, export_spec, import_spec

SPEC = textwrap.dedent('''
    format = 1

    [[plant]]
    name = "shaker"
    model = "Km/(tau*s+1)"
    description = "plate shaker motor, speed in rad/s per volt"
    input_unit = "V"
    output_unit = "rad/s"
    samples = 8
    seed = 3
    params = { Km = 9.5, tau = { nominal = 0.12, tol = "15 %" } }

    [[loop]]
    name = "shaker-speed"
    plant = "shaker"
    kind = "speed"
    input_delay = "3 ms"
    actuator_limit = 24.0

    [[requirement]]
    id = "SH-2"
    title = "Speed loop phase margin"
    statement = "The shaker speed loop shall keep a phase margin of at least 45 deg."
    derives_from = ["SYS-3"]
    metric = "phase_margin"
    limit = ">= 45 deg"
    loops = ["shaker-speed"]
    status = "approved"

    [[requirement]]
    id = "SYS-3"
    title = "Mixing speed holds"
    statement = "The plate speed shall stay within 2 % of the set speed while mixing."
    method = "test"

    [[revision]]
    loop = "shaker-speed"
    label = "r1"
    author = "d.okafor"
    rationale = """First PI tuning.
    Crossover near 40 rad/s."""
    controller = "pi(kp=0.08, ki=0.9)"

    [[revision]]
    loop = "shaker-speed"
    label = "r2"
    parent = "r1"
    rationale = "More integral action for load steps."
    controller = "pi(kp=0.08, ki=1.4)"
''')


@pytest.fixture
def spec_file(tmp_path):
    p = tmp_path / "spec.toml"
    p.write_text(SPEC)
    return p


def test_import_then_export_round_trips(tmp_path, spec_file):
    with open_ledger(tmp_path / "a.db", create=True) as a:
        rep = import_spec(a, spec_file)
        assert sorted(rep.created) == ["loop shaker-speed", "plant shaker",
                                       "requirement SH-2", "requirement SYS-3"]
        assert rep.revisions_added == [("shaker-speed", "r1"), ("shaker-speed", "r2")]
        assert a.loop("shaker-speed").input_delay == pytest.approx(0.003)
        out = export_spec(a, tmp_path / "out.toml")
        first = dump_spec(a)
    with open_ledger(tmp_path / "b.db", create=True) as b:
        import_spec(b, out)
        second = dump_spec(b)
        export_spec(b, tmp_path / "out2.toml")
    assert first == second
    assert (tmp_path / "out.toml").read_text() == (tmp_path / "out2.toml").read_text()


def test_import_is_idempotent(lg, spec_file):
    import_spec(lg, spec_file)
    before = lg.counts()
    rep = import_spec(lg, spec_file)
    assert not rep.changed
    assert lg.counts() == before


def test_changed_requirement_gets_a_new_version(lg, spec_file, tmp_path):
    import_spec(lg, spec_file)
    changed = tmp_path / "changed.toml"
    changed.write_text(SPEC.replace('limit = ">= 45 deg"', 'limit = ">= 50 deg"'))
    rep = import_spec(lg, changed)
    assert rep.new_versions == ["requirement SH-2 v2"]
    assert lg.requirement("SH-2").limit_value == 50.0
    assert lg.requirement("SH-2", version=1).limit_value == 45.0


def test_changed_revision_is_refused(lg, spec_file, tmp_path):
    import_spec(lg, spec_file)
    bad = tmp_path / "bad.toml"
    bad.write_text(SPEC.replace("pi(kp=0.08, ki=1.4)", "pi(kp=0.09, ki=1.4)"))
    before = lg.counts()
    with pytest.raises(LedgerError, match=r"bad.toml: revision 'r2'.*immutable"):
        import_spec(lg, bad)
    assert lg.counts() == before


@pytest.mark.parametrize(
    "mutate, match",
    [
        (lambda t: t.replace('format = 1', 'format = 7'), "format 7 is not supported"),
        (lambda t: t.replace('title = "Speed loop phase margin"', 'titel = "x"'),
         r"requirement 'SH-2', field 'title': is required"),
        (lambda t: t.replace('kind = "speed"', 'kind = "speed"\nspeed = 3'),
         r"loop 'shaker-speed', field 'speed': unknown field"),
        (lambda t: t.replace('seed = 3', 'seed = "three"'), r"plant 'shaker', field 'seed': expected an integer"),
        (lambda t: t.replace('input_delay = "3 ms"', 'input_delay = "3 parsecs"'),
         r"loop 'shaker-speed', field 'input_delay': not a time"),
        (lambda t: t.replace('limit = ">= 45 deg"', 'limit = ">= 45 furlongs"'),
         r"spec.toml: requirement 'SH-2': .*unit"),
        (lambda t: t.replace('derives_from = ["SYS-3"]', 'derives_from = ["SYS-9"]'),
         r"requirement 'SH-2', field 'derives_from': unknown requirement 'SYS-9'"),
        (lambda t: t.replace('method = "test"', 'method = "test"\nderives_from = ["SH-2"]'),
         r"field 'derives_from': trace cycle"),
        (lambda t: t.replace('controller = "pi(kp=0.08, ki=1.4)"', 'controller = "pi(kp=0.08, ki=1.4"'),
         r"spec.toml: revision 'r2'.*column"),
        (lambda t: t.replace('model = "Km/(tau*s+1)"', 'model = "Km/(tau*s+1)+"'),
         r"spec.toml: plant 'shaker'.*column"),
        (lambda t: t + "\n[[plant\n", "not valid TOML"),
        (lambda t: t.replace('rationale = "More integral action for load steps."', 'rationale = "  "'),
         r"revision 'r2', field 'rationale': must not be empty"),
    ],
)
def test_bad_spec_names_file_record_field_and_writes_nothing(lg, tmp_path, mutate, match):
    p = tmp_path / "spec.toml"
    p.write_text(mutate(SPEC))
    before = lg.counts()
    with pytest.raises(LedgerError, match=match):
        import_spec(lg, p)
    assert lg.counts() == before


def test_missing_and_binary_spec_files(lg, tmp_path):
    with pytest.raises(SpecError, match="cannot read spec file"):
        import_spec(lg, tmp_path / "absent.toml")
    p = tmp_path / "bin.toml"
    p.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(SpecError, match="not UTF-8"):
        import_spec(lg, p)


# a plant with a note and parameters given out of alphabetical order (tau before Km), so the
# round trip also checks that the order survives
NOTED = SPEC.replace('params = { Km = 9.5, tau = { nominal = 0.12, tol = "15 %" } }',
                     'note = "re-identified after the bearing change"\n'
                     'params = { tau = { nominal = 0.12, tol = "15 %" }, '
                     'Km = { nominal = 9.5, tol = "5 %" } }')


def _records(lg):
    """Every record's content (times left out: they are when the import ran)."""
    import dataclasses

    def strip(x):
        d = dataclasses.asdict(x)
        d.pop("created_at", None)
        return d

    plants = [strip(p) | {"param_order": list(p.params)} for p in lg.plants()]
    for p in plants:
        p.pop("author")  # plant versions carry the importing user (not part of a spec file)
    loops = [strip(lp) for lp in lg.loops()]
    reqs = [strip(r) for r in lg.requirements()]
    for r in reqs:
        r.pop("author")
    revs = [strip(r) for lp in lg.loops() for r in lg.revisions(lp.name)]
    for r in revs:
        r.pop("content_hash")  # covers the recording time (Ledger.add_revision), not content
    return plants, loops, reqs, revs


def test_round_trip_identical_records_with_plant_note(tmp_path):
    """import -> export -> import gives identical records, plant note and parameter order
    included (the export used to drop the note)."""
    src = tmp_path / "noted.toml"
    src.write_text(NOTED)
    assert 'note = "re-identified' in NOTED  # the replacement above took place
    with open_ledger(tmp_path / "a.db", create=True, author="a") as a:
        import_spec(a, src)
        assert a.plant("shaker").note == "re-identified after the bearing change"
        out = export_spec(a, tmp_path / "out.toml")
        first = _records(a)
    text = out.read_text()
    assert 'note = "re-identified after the bearing change"' in text
    import tomllib

    assert list(tomllib.loads(text)["plant"][0]["params"]) == ["tau", "Km"]  # order as given
    with open_ledger(tmp_path / "b.db", create=True, author="b") as b:
        rep = import_spec(b, out)
        assert "plant shaker" in rep.created
        second = _records(b)
    assert first == second
    assert first[0][0]["note"] == "re-identified after the bearing change"
    assert first[0][0]["param_order"] == ["tau", "Km"]
