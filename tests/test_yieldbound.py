"""Yield with confidence: Clopper-Pearson lower bound and samples needed for a yield claim."""

from __future__ import annotations

import math

import pytest
from scipy.stats import beta

from ledger.errors import SpecError
from ledger.yieldbound import lower_bound, meets, parse_yield, samples_needed


@pytest.mark.parametrize("k, n", [(1, 1), (5, 10), (95, 100), (99, 100), (290, 299),
                                  (1, 1000), (999, 1000), (0, 50), (50, 50)])
@pytest.mark.parametrize("conf", [0.90, 0.95, 0.99])
def test_lower_bound_against_scipy_beta(k, n, conf):
    # Source: Clopper & Pearson (1934); one-sided lower bound = Beta(1 - c; k, n - k + 1)
    # quantile, computed by scipy.stats.beta.ppf (reference library), 0 for k = 0.
    ref = 0.0 if k == 0 else beta.ppf(1.0 - conf, k, n - k + 1)
    assert lower_bound(k, n, conf) == pytest.approx(ref, rel=1e-9, abs=1e-12)


def test_samples_needed_table_value():
    # Source: the standard zero-failure ("success run") table: 99 % reliability at 95 %
    # confidence needs 299 samples (n = ceil(ln 0.05 / ln 0.99)); 90 % at 90 % needs 22,
    # 95 % at 95 % needs 59 (same formula; values from memory, checked by the formula).
    assert samples_needed(0.99, 0.95) == 299
    assert samples_needed(0.90, 0.90) == 22
    assert samples_needed(0.95, 0.95) == 59


@pytest.mark.parametrize("n", [100, 300, 1000, 10000])
def test_rule_of_three(n):
    # Source: the "rule of three" (Hanley & Lippman-Hand, JAMA 1983): with no failure in n
    # samples the 95 % upper bound on the failure rate is about 3/n; exact is 1 - 0.05^(1/n),
    # a little below 3/n (ln 20 = 2.996).
    fail_bound = 1.0 - lower_bound(n, n, 0.95)
    assert fail_bound < 3.0 / n
    assert fail_bound == pytest.approx(3.0 / n, rel=0.01 + 5.0 / n)


def test_judgement_at_the_edge():
    # Source: closed form for k = n: bound = 0.05^(1/n); 0.05^(1/299) = 0.99003 >= 0.99,
    # 0.05^(1/298) = 0.98999 < 0.99 (arithmetic).
    target, conf = parse_yield("99 % at 95 %")
    assert (target, conf) == (0.99, 0.95)
    assert meets(299, 299, target, conf)
    assert not meets(298, 298, target, conf)
    # one failure in 299: the point estimate 298/299 = 0.9967 exceeds 99 %, the bound does not
    assert 298 / 299 > target and not meets(298, 299, target, conf)


@pytest.mark.parametrize("bad", ["99", "99 % at", "0 % at 95 %", "99 % at 100 %", ""])
def test_bad_claim_is_refused(bad):
    with pytest.raises(SpecError):
        parse_yield(bad)


def test_bad_counts_are_refused():
    for k, n in ((3, 2), (-1, 5), (0, 0)):
        with pytest.raises(SpecError):
            lower_bound(k, n)
    assert math.isclose(lower_bound(10, 10, 0.5), 0.5 ** 0.1)  # closed form, k = n
