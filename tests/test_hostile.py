"""Hostile and broken input: random and mutated spec files, absurd models, limits and units.
Each gives one clear LedgerError and writes nothing; none crashes or hangs."""

from __future__ import annotations

import math
import string

import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from ledger.api import open_ledger
from ledger.errors import LedgerError
from ledger.spec import import_spec

VALID = '''
[[plant]]
name = "shaker"
model = "Km/(tau*s+1)"
params = { Km = 9.5, tau = { nominal = 0.12, tol = "15 %" } }

[[loop]]
name = "shaker-speed"
plant = "shaker"
kind = "speed"
input_delay = "3 ms"

[[requirement]]
id = "SH-2"
title = "Speed loop phase margin"
statement = "PM at least 45 deg."
metric = "phase_margin"
limit = ">= 45 deg"
loops = ["shaker-speed"]

[[revision]]
loop = "shaker-speed"
rationale = "First PI tuning."
controller = "pi(kp=0.08, ki=0.9)"
'''

FUZZ_COUNTS: dict[str, int] = {}


@pytest.fixture(scope="module")
def fuzz_ledger(tmp_path_factory):
    path = tmp_path_factory.mktemp("fuzz") / "f.db"
    lg = open_ledger(path, create=True)
    lg.auto_verify = False
    yield lg
    lg.close()


def _try_import(lg, tmp_path, text: str, tag: str) -> None:
    FUZZ_COUNTS[tag] = FUZZ_COUNTS.get(tag, 0) + 1
    p = tmp_path / "fuzz.toml"
    p.write_text(text, encoding="utf-8", errors="surrogatepass")
    before = lg.counts()
    import time
    t0 = time.monotonic()
    try:
        rep = import_spec(lg, p)
    except LedgerError as e:
        msg = str(e)
        assert msg and "\n" not in msg.strip() or "TOML" in msg, msg
        assert lg.counts() == before
        return
    finally:
        assert time.monotonic() - t0 < 20, "an import took over 20 s"
    # accepted: it must have been a valid spec; undo for the next example is not possible
    # (append-only), so only check the report is coherent
    assert rep is not None


@settings(max_examples=150, deadline=2000, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.text(alphabet=string.printable, max_size=400))
def test_random_text_specs(fuzz_ledger, tmp_path, text):
    _try_import(fuzz_ledger, tmp_path, text, "random text")


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.integers(0, len(VALID) - 1), st.integers(0, 12),
       st.text(alphabet=string.printable + "éλ∞", max_size=8))
# found by this test: an unbalanced ')' in a time ('3 ms)') crashed pint's parser with
# tokenize.TokenError; it is a one-line spec error now
@example(pos=VALID.index('3 ms"') + 4, cut=0, insert=")")
def test_mutated_valid_specs(fuzz_ledger, tmp_path, pos, cut, insert):
    text = VALID[:pos] + insert + VALID[pos + cut:]
    # rename records so that accepted mutants do not collide with earlier ones
    _try_import(fuzz_ledger, tmp_path, text, "mutated spec")


@pytest.mark.parametrize(
    "model",
    [
        "1/(s^61+1)",                      # degree over the limit
        "1/(s+" + "(" * 200 + "1" + ")" * 200 + ")",
        "1e999/(s+1)",                     # overflows to inf
        "nan/(s+1)",
        "1/(0*s)",                         # zero denominator
        "(s+1)" * 70,                      # huge order through products
        "x" * 20000,                       # over the length limit
        "",
        "__import__('os').system('true')",
        "1/(s+1)\x00",
    ],
)
def test_absurd_models_are_refused(lg, model):
    before = lg.counts()
    with pytest.raises(LedgerError):
        lg.add_plant("bad", model)
    assert lg.counts() == before


@pytest.mark.parametrize(
    "kwargs",
    [
        dict(sample_time=0.0), dict(sample_time=-1e-3), dict(sample_time=math.nan),
        dict(sample_time=math.inf), dict(input_delay=math.inf), dict(input_delay=-0.1),
        dict(computation_delay=-1), dict(computation_delay=2),  # needs a sample time
        dict(actuator_limit=0.0), dict(actuator_limit=-3), dict(kind="submarine"),
    ],
)
def test_absurd_loop_settings_are_refused(lg, kwargs):
    lg.add_plant("p", "1/(s+1)")
    before = lg.counts()
    with pytest.raises(LedgerError):
        lg.add_loop("l", "p", **kwargs)
    assert lg.counts() == before


@pytest.mark.parametrize(
    "limit",
    ["<= 1e999 s", "<= nan s", "<= 5 furlongs", ">= 3 kg", "<= 12", "lots", "<= 3 s s",
     "<= 10 %%", ">= -inf deg extra"],
)
def test_absurd_limits_are_refused(lg, limit):
    lg.add_plant("p", "1/(s+1)")
    lg.add_loop("l", "p")
    before = lg.counts()
    with pytest.raises(LedgerError):
        lg.add_requirement("X-1", title="t", statement="s", metric="settling_time", limit=limit,
                           loops=["l"])
    assert lg.counts() == before


def test_algebraic_loop_and_improper_controllers_are_refused(lg):
    lg.add_plant("p", "-1 + 0/(s+1)")  # static gain -1: with gain(1) 1 + L = 0, an algebraic loop
    lg.add_loop("l", "p")
    before = lg.counts()
    with pytest.raises(LedgerError):
        lg.add_revision("l", "gain(1)", rationale="algebraic loop")
    with pytest.raises(LedgerError, match="derivative"):
        lg.add_revision("l", "pd(kp=1, kd=0.1, tf=0)", rationale="ideal derivative")
    assert lg.counts() == before


def test_fuzz_counts_are_reported():
    # Printed with -s; quoted in docs/operations.md.
    print("\nfuzz inputs tried:", FUZZ_COUNTS)
    assert sum(FUZZ_COUNTS.values()) >= 300
