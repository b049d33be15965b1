"""Yield with confidence for Monte Carlo samples.

A pass fraction ``k/n`` estimates the true pass probability; a yield claim needs a bound.
:func:`lower_bound` is the one-sided Clopper-Pearson (exact binomial) lower confidence bound:
the smallest ``p`` for which seeing ``k`` or more passes out of ``n`` still has probability
at least ``1 - confidence``.  :func:`samples_needed` is the number of samples, all passing,
that supports the claim "yield >= target at this confidence" (99 % at 95 % needs 299).
:func:`parse_yield` reads the claim syntax ``'99 % at 95 %'``; :func:`meets` judges a claim
on the bound, never on the point estimate.  Computed with the standard library only (log-space
binomial tail and bisection), so the tests can check it against scipy independently.
"""

from __future__ import annotations

import math
import re

from .errors import SpecError

__all__ = ["lower_bound", "samples_needed", "parse_yield", "meets"]


def _tail(k: int, n: int, p: float) -> float:
    """P(X >= k) for X ~ Binomial(n, p)."""
    if k <= 0:
        return 1.0
    if p <= 0.0:
        return 0.0
    if p >= 1.0:
        return 1.0
    lp, lq = math.log(p), math.log1p(-p)
    lgn = math.lgamma(n + 1)
    terms = [lgn - math.lgamma(j + 1) - math.lgamma(n - j + 1) + j * lp + (n - j) * lq
             for j in range(k, n + 1)]
    m = max(terms)
    return min(1.0, math.exp(m) * sum(math.exp(t - m) for t in terms))


def _check(k: int, n: int, confidence: float) -> None:
    if not (isinstance(n, int) and isinstance(k, int) and 0 <= k <= n and n > 0):
        raise SpecError(f"need 0 <= passes <= samples and samples > 0, got {k} of {n}")
    if not 0.0 < confidence < 1.0:
        raise SpecError(f"confidence must lie strictly between 0 and 1, got {confidence}")


def lower_bound(k: int, n: int, confidence: float = 0.95) -> float:
    """One-sided Clopper-Pearson lower bound on the pass probability from ``k`` passes out of
    ``n`` samples.  ``k = 0`` gives 0; ``k = n`` gives the closed form ``(1 - c) ** (1 / n)``."""
    _check(k, n, confidence)
    alpha = 1.0 - confidence
    if k == 0:
        return 0.0
    if k == n:
        return alpha ** (1.0 / n)
    lo, hi = 0.0, 1.0
    for _ in range(200):  # tail is increasing in p; bisect to full double precision
        mid = 0.5 * (lo + hi)
        if mid in (lo, hi):
            break
        if _tail(k, n, mid) < alpha:
            lo = mid
        else:
            hi = mid
    return hi


def samples_needed(target: float, confidence: float = 0.95) -> int:
    """Smallest ``n`` with every one of ``n`` samples passing such that the lower bound is at
    least ``target``: ``target ** n <= 1 - confidence``."""
    if not 0.0 < target < 1.0:
        raise SpecError(f"yield target must lie strictly between 0 and 1, got {target}")
    _check(1, 1, confidence)
    n = max(1, math.ceil(math.log(1.0 - confidence) / math.log(target)))
    while target ** n > 1.0 - confidence:  # guard the rounding of the logarithms
        n += 1
    while n > 1 and target ** (n - 1) <= 1.0 - confidence:
        n -= 1
    return n


_YIELD_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*%\s*at\s*([0-9]*\.?[0-9]+)\s*%\s*$")


def parse_yield(text: str) -> tuple[float, float]:
    """``'99 % at 95 %'`` (yield at confidence, both in percent) to ``(0.99, 0.95)``."""
    m = _YIELD_RE.match(text or "")
    if not m:
        raise SpecError(f"yield claim {text!r} must look like '99 % at 95 %'")
    target, conf = float(m.group(1)) / 100.0, float(m.group(2)) / 100.0
    if not (0.0 < target < 1.0 and 0.0 < conf < 1.0):
        raise SpecError(f"yield claim {text!r}: both percentages must lie strictly between 0 and 100")
    return target, conf


def meets(k: int, n: int, target: float, confidence: float = 0.95) -> bool:
    """Whether ``k`` passes of ``n`` support "yield >= target" at ``confidence``."""
    return lower_bound(k, n, confidence) >= target
