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
from functools import lru_cache

from .errors import SpecError

__all__ = ["lower_bound", "samples_needed", "parse_yield", "parse_confidence", "meets",
           "yield_text", "percent_text", "DEFAULT_CONFIDENCE", "cached_bound", "YIELD_KEYS",
           "yield_settings", "split_yield", "yield_fields", "bound_text",
           "bound_percent"]

#: the confidence of the bound shown beside a pass fraction when a requirement sets none
DEFAULT_CONFIDENCE = 0.95


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


_YIELD_RE = re.compile(r"^\s*(?:yield\s*)?(?:>=\s*)?([0-9]*\.?[0-9]+)\s*%\s*at\s*"
                       r"([0-9]*\.?[0-9]+)\s*%\s*$", re.IGNORECASE)
_PERCENT_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*%\s*$")


def parse_yield(text: str) -> tuple[float, float]:
    """``'99 % at 95 %'`` (yield at confidence, both in percent; ``'yield >= 99 % at 95 %'``
    reads the same) to ``(0.99, 0.95)``."""
    m = _YIELD_RE.match(text or "")
    if not m:
        raise SpecError(f"yield claim {text!r} must look like '99 % at 95 %'")
    target, conf = float(m.group(1)) / 100.0, float(m.group(2)) / 100.0
    if not (0.0 < target < 1.0 and 0.0 < conf < 1.0):
        raise SpecError(f"yield claim {text!r}: both percentages must lie strictly between 0 and 100")
    return target, conf


def parse_confidence(text) -> float:
    """A confidence ``'90 %'`` (or a fraction such as ``0.9``) to ``0.9``."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value = float(text)
    else:
        m = _PERCENT_RE.match(str(text or ""))
        if not m:
            raise SpecError(f"confidence {text!r} must look like '95 %'")
        value = float(m.group(1)) / 100.0
    if not 0.0 < value < 1.0:
        raise SpecError(f"confidence {text!r} must lie strictly between 0 and 100 %")
    return value


def percent_text(fraction: float) -> str:
    """``0.99`` as ``'99 %'``, ``0.995`` as ``'99.5 %'`` (shortest round-trip digits)."""
    return f"{round(100.0 * fraction, 10):g} %"


def yield_text(target: float, confidence: float) -> str:
    """The claim ``(0.99, 0.95)`` as ``'99 % at 95 %'`` (what :func:`parse_yield` reads)."""
    return f"{percent_text(target)} at {percent_text(confidence)}"


@lru_cache(maxsize=4096)
def cached_bound(k: int, n: int, confidence: float) -> float:
    """:func:`lower_bound`, memoised (views show the same counts many times)."""
    return lower_bound(k, n, confidence)


def meets(k: int, n: int, target: float, confidence: float = 0.95) -> bool:
    """Whether ``k`` passes of ``n`` support "yield >= target" at ``confidence``."""
    return lower_bound(k, n, confidence) >= target


#: the keys a requirement's yield claim and bound confidence take in its stored settings JSON
#: (part of the requirement's content hash; never sent to the engine)
YIELD_KEYS = ("yield_target", "confidence")


def yield_settings(claim=None, confidence=None) -> dict:
    """The stored settings of a yield claim: ``claim`` is ``None`` or ``""``/``"none"`` (no
    target), a text ``'99 % at 95 %'`` or ``(target, confidence or None)`` as fractions;
    ``confidence`` (``'90 %'`` or a fraction) sets the bound's confidence on its own.  A claim
    and a confidence that disagree are refused.  Returns ``{}`` when neither is set."""
    target = claim_conf = None
    if isinstance(claim, str):
        if claim.strip().lower() not in ("", "none"):
            target, claim_conf = parse_yield(claim)
    elif claim is not None:
        target, claim_conf = claim
        if not (isinstance(target, (int, float)) and 0.0 < float(target) < 1.0):
            raise SpecError(f"yield target must lie strictly between 0 and 1, got {target!r}")
        target = float(target)
        if claim_conf is not None:
            claim_conf = parse_confidence(claim_conf)
    conf = None if confidence is None or confidence == "" else parse_confidence(confidence)
    if conf is not None and claim_conf is not None and not math.isclose(conf, claim_conf):
        raise SpecError(f"yield claim at {percent_text(claim_conf)} disagrees with confidence "
                        f"{percent_text(conf)}")
    conf = conf if conf is not None else claim_conf
    out = {}
    if target is not None:
        out["yield_target"] = target
        out["confidence"] = conf if conf is not None else DEFAULT_CONFIDENCE
    elif conf is not None:
        out["confidence"] = conf
    return out


def split_yield(settings: dict) -> tuple[dict, float | None, float | None]:
    """Stored settings to ``(metric settings, yield target or None, confidence or None)``."""
    rest = {k: v for k, v in (settings or {}).items() if k not in YIELD_KEYS}
    return rest, (settings or {}).get("yield_target"), (settings or {}).get("confidence")


def yield_fields(samples: int | None, passes: int | None, target: float | None,
                 confidence: float | None) -> dict:
    """The yield fields of a result view (:class:`ledger.records.ResultInfo`): the counts, the
    confidence, the lower bound (``None`` without random samples) and, with a target, the
    number of all-passing samples its claim needs."""
    conf = confidence or DEFAULT_CONFIDENCE
    ok = samples is not None and passes is not None and samples > 0
    return {"samples": samples, "sample_passes": passes if ok else None,
            "confidence": conf,
            "yield_bound": cached_bound(int(passes), int(samples), conf) if ok else None,
            "yield_target": target,
            "samples_needed": samples_needed(target, conf) if target else None}


def bound_text(r) -> str:
    """How a result's bound reads beside its pass fraction: ``'98.9 % at 95 %'`` (shortest
    digits that do not round across the target), ``'no samples'`` for a family without random
    samples (corners, fidelity models: a bound only means something for random draws),
    ``'re-verify'`` when a sampled family's counts were not recorded (results written before
    they were kept) and ``'-'`` when there is no value."""
    if r.yield_bound is not None:
        return f"{bound_percent(r.yield_bound, r.yield_target)} at {percent_text(r.confidence)}"
    if r.samples is not None and r.sample_passes is None and r.value is not None:
        return "re-verify"
    if r.samples is None and r.variants and r.value is not None:
        return "no samples"
    return "-"


def bound_percent(bound: float, target: float | None) -> str:
    """The bound in percent with one decimal, more when fewer would hide which side of the
    target it lies on."""
    for d in range(1, 7):
        text = f"{100.0 * bound:.{d}f}"
        if target is None or (float(text) >= 100.0 * target) == (bound >= target):
            return text + " %"
    return f"{100.0 * bound:.8f} %"
