"""The hard benchmark families: servo axes with lightly damped structural modes.

Plant of order ``n`` (even, >= 2)::

    G(s) = K / (s (tau_m s + 1)) * prod_k wk^2 / (s^2 + 2 zk wk s + wk^2)

a rigid body with a motor lag and ``(n - 2) / 2`` structural modes, the first at 40 Hz with
damping 0.05, the next ones at 1.9, 3.6, 6.9 ... times that frequency with dampings 0.03 to 0.05.
Every parameter (K, tau_m, each wk and zk) is drawn uniformly within +-20 % of its nominal
value (seeded).  Controller: lead + integrator,
``kp (1 + 1/(Ti s)) (Td s + 1) / (a Td s + 1)``.  All numbers are invented for the benchmark.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["NOMINAL", "CONTROLLER_TEXT", "controller", "family", "lazy_family", "modes"]

NOMINAL = {"K": 20.0, "tau_m": 0.01}
#: lead + integrator: kp (1 + 1/(Ti s)) (Td s + 1)/(a Td s + 1)
CONTROLLER_GAINS = {"kp": 0.3, "Ti": 0.3, "Td": 0.1, "a": 0.3}
CONTROLLER_TEXT = "0.3*(1 + 1/(0.3*s))*(0.1*s + 1)/(0.03*s + 1)"
TOL = 0.2


def modes(order: int) -> list[tuple[float, float]]:
    """(natural frequency rad/s, damping) of the nominal structural modes of a plant order."""
    if order < 2 or order % 2:
        raise ValueError(f"plant order {order} is not even and >= 2")
    out = []
    for k in range((order - 2) // 2):
        out.append((2 * math.pi * 40.0 * 1.9 ** k, 0.05 - 0.02 * (k % 2)))
    return out


def controller():
    import control

    g = CONTROLLER_GAINS
    s = control.tf("s")
    return g["kp"] * (1 + 1 / (g["Ti"] * s)) * (g["Td"] * s + 1) / (g["a"] * g["Td"] * s + 1)


def _factors(n_variants: int, order: int, seed: int) -> np.ndarray:
    """(n, p) parameter factors: ones for the nominal, then the seeded draws."""
    rng = np.random.default_rng(seed)
    p = 2 + 2 * len(modes(order))
    out = np.ones((n_variants, p))
    for i in range(1, n_variants):
        out[i] = rng.uniform(1 - TOL, 1 + TOL, p)
    return out


def _variant(i: int, f: np.ndarray, order: int):
    import control

    from ledger.engine.types import Variant

    K, tm = NOMINAL["K"] * f[0], NOMINAL["tau_m"] * f[1]
    num = np.array([K])
    den = np.polymul([1.0, 0.0], [tm, 1.0])
    params = {"K": float(K), "tau_m": float(tm)}
    for k, (wk, zk) in enumerate(modes(order)):
        w, z = wk * f[2 + 2 * k], zk * f[3 + 2 * k]
        num = num * w * w
        den = np.polymul(den, [1.0, 2 * z * w, w * w])
        params[f"w{k + 1}"], params[f"z{k + 1}"] = float(w), float(z)
    return Variant(name="nominal" if i == 0 else f"sample:{i:06d}",
                   kind="nominal" if i == 0 else "sample", system=control.tf(num, den),
                   params=params)


def family(n_variants: int, *, order: int = 4, seed: int = 7):
    """``n_variants`` variants: the nominal plant first, then seeded draws within +-20 %."""
    from ledger.engine.types import PlantFamily

    F = _factors(n_variants, order, seed)
    return PlantFamily(tuple(_variant(i, F[i], order) for i in range(n_variants)))


class _LazyVariants(tuple):
    """A read-only sequence of the family's variants made on access from the stored parameter
    factors (a python-control transfer function costs several kB, so 100,000 of them held at
    once would dominate the memory of a streamed measurement)."""

    def __new__(cls, F, order):
        obj = super().__new__(cls)
        obj._F, obj._order = F, order
        return obj

    def __len__(self):
        return self._F.shape[0]

    def __getitem__(self, k):
        if isinstance(k, slice):
            return tuple(_variant(i, self._F[i], self._order) for i in range(len(self))[k])
        k = range(len(self))[k]
        return _variant(k, self._F[k], self._order)

    def __iter__(self):
        return (self[i] for i in range(len(self)))


def lazy_family(n_variants: int, *, order: int = 4, seed: int = 7):
    """:func:`family` with its variants made on access (the same variants, in the same order)."""
    from ledger.engine.types import PlantFamily

    return PlantFamily(_LazyVariants(_factors(n_variants, order, seed), order))
