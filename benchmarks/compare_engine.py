"""Compare the engine's per-variant values with those of another engine checkout.

Usage::

    # 1. values of the reference engine (e.g. a checkout of an earlier commit):
    git archive <commit> ledger | tar -x -C /tmp/ref
    PYTHONPATH=/tmp/ref:. python benchmarks/compare_engine.py save /tmp/ref-values.npz
    # 2. values of this tree, and the largest relative difference per family and metric:
    PYTHONPATH=. python benchmarks/compare_engine.py compare /tmp/ref-values.npz

Families: the resonant family (``benchmarks/resonant.py``) at 1,000 variants, plant orders
2, 4, 8, 16 at 100 variants, and the easy pipette family at 1,000 variants; the benchmark
suite of 14 metrics.  ``--only NAME,...`` restricts the families.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

if __package__ in (None, ""):
    sys.path.append(str(Path(__file__).resolve().parent.parent))
    __package__ = "benchmarks"

import numpy as np  # noqa: E402

FAMILIES = {
    "resonant-1000": ("resonant", 1000, 4),
    "order2-100": ("resonant", 100, 2),
    "order4-100": ("resonant", 100, 4),
    "order8-100": ("resonant", 100, 8),
    "order16-100": ("resonant", 100, 16),
    "easy-1000": ("easy", 1000, 0),
}


def values(name: str) -> dict:
    from benchmarks import resonant as R
    from benchmarks import scenario as S
    from ledger.engine.loop import LoopSpec
    from ledger.engine.measure import measure_family
    from ledger.systems import parse_model

    kind, n, order = FAMILIES[name]
    if kind == "resonant":
        fam, C = R.family(n, order=order), R.controller()
    else:
        fam, C = S.family(n), parse_model(S.CONTROLLER).system
    t0 = time.perf_counter()
    res = measure_family(fam, C, LoopSpec(), list(S.SUITE))
    dt = time.perf_counter() - t0
    print(f"{name}: {dt:.2f} s", file=sys.stderr, flush=True)
    return {f"{name}/{m}": np.asarray(res.get(m).values, float) for m in S.SUITE}


def rel_diff(a: np.ndarray, b: np.ndarray) -> float:
    """Largest |a - b| / max(|b|, 1e-300) over finite pairs; inf when infinities differ."""
    same = (a == b) | (np.isnan(a) & np.isnan(b))
    fin = np.isfinite(a) & np.isfinite(b)
    if np.any(~same & ~fin):
        return float("inf")
    d = np.abs(a[fin] - b[fin]) / np.maximum(np.abs(b[fin]), 1e-300)
    return float(np.max(d, initial=0.0))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("action", choices=("save", "compare"))
    ap.add_argument("path")
    ap.add_argument("--only", default="")
    args = ap.parse_args(argv)
    import ledger
    print(f"engine from {Path(ledger.__file__).parent}", file=sys.stderr)
    names = [n for n in FAMILIES if not args.only or n in args.only.split(",")]
    if args.action == "save":
        out = {}
        for n in names:
            out.update(values(n))
        np.savez(args.path, **out)
        return 0
    ref = np.load(args.path)
    worst = 0.0
    for n in names:
        if f"{n}/stable" not in ref:
            continue
        cur = values(n)
        for k, v in cur.items():
            d = rel_diff(v, ref[k])
            worst = max(worst, d)
            print(f"{k:<50} {d:.2e}")
    print(f"largest relative difference: {worst:.2e}")
    return 0 if worst <= 1e-9 else 1


if __name__ == "__main__":
    sys.exit(main())
