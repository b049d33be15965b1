"""Plant families: a nominal model with tolerance corners, seeded samples and fidelity models.

A parameter's tolerance is given as relative percent, absolute plus/minus, or explicit
bounds; see :meth:`ParamSpec.from_value`.  Corners and samples of the main model are
evaluated in one vectorised batch.
"""

from __future__ import annotations

import itertools
import math
import re
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from ledger.errors import ModelError
from ledger.systems.bounds import check_number, check_seed
from ledger.systems.model import Model, compile_model
from ledger.systems.variants import PlantFamily, Variant

__all__ = ["ParamSpec", "build_family", "DISTRIBUTIONS"]

DISTRIBUTIONS = ("uniform", "normal")

_NUM = r"[+]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?"
_PERCENT = re.compile(rf"\s*({_NUM})\s*%\s*")
_ABSOLUTE = re.compile(rf"\s*({_NUM})\s*")
_KEYS = ("nominal", "tol", "low", "high", "distribution")


def _number(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ModelError(f"{name} must be a number, got {value!r}")
    return check_number(name, value)  # finite and within NUMBER_RANGE (ledger/systems/bounds)


@dataclass(frozen=True)
class ParamSpec:
    """Nominal value and tolerance of one model parameter.

    Parameters
    ----------
    nominal : float
        Design value, in the parameter's own unit.
    low, high : float, optional
        Bounds of the tolerance band (default: both equal to ``nominal``, no tolerance);
        ``low <= nominal <= high``.
    distribution : str
        How samples are drawn: ``"uniform"`` over ``[low, high]`` (default) or ``"normal"``
        centred on ``nominal`` with the larger of ``nominal - low`` and ``high - nominal`` as
        3 sigma, clipped to ``[low, high]``.
    """

    nominal: float
    low: float | None = None
    high: float | None = None
    distribution: str = "uniform"

    def __post_init__(self):
        nominal = _number("nominal", self.nominal)
        low = nominal if self.low is None else _number("low", self.low)
        high = nominal if self.high is None else _number("high", self.high)
        if not low <= nominal <= high:
            raise ModelError(f"bounds must satisfy low <= nominal <= high, got low={low:g}, "
                             f"nominal={nominal:g}, high={high:g}")
        if self.distribution not in DISTRIBUTIONS:
            raise ModelError(f"distribution must be one of {', '.join(DISTRIBUTIONS)}, got "
                             f"{self.distribution!r}")
        object.__setattr__(self, "nominal", nominal)
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)

    @property
    def has_tolerance(self) -> bool:
        """True when ``low < high``."""
        return self.low < self.high

    @property
    def sigma(self) -> float:
        """Standard deviation used by ``normal`` sampling (before clipping)."""
        return max(self.nominal - self.low, self.high - self.nominal) / 3.0

    @classmethod
    def from_value(cls, obj: Any) -> "ParamSpec":
        """Build from a spec-file value.

        Parameters
        ----------
        obj : float or dict or ParamSpec
            A plain number (no tolerance), or a dict with ``nominal`` and at most one of
            ``tol`` (``"20 %"`` relative to ``|nominal|``, or a number / number string for
            an absolute plus/minus) or ``low`` and ``high`` together; optional
            ``distribution`` (``"uniform"`` or ``"normal"``).

        Returns
        -------
        ParamSpec

        Raises
        ------
        ModelError
            Unknown keys, missing nominal, malformed or negative tolerance, bad bounds.
        """
        if isinstance(obj, ParamSpec):
            return obj
        if not isinstance(obj, Mapping):
            return cls(_number("a parameter value", obj))
        unknown = [k for k in obj if k not in _KEYS]
        if unknown:
            raise ModelError(f"unknown parameter field {unknown[0]!r}; use "
                             f"{', '.join(_KEYS)}")
        if "nominal" not in obj:
            raise ModelError("a parameter with a tolerance needs a 'nominal' value")
        nominal = _number("nominal", obj["nominal"])
        dist = obj.get("distribution", "uniform")
        has_bounds = "low" in obj or "high" in obj
        if "tol" in obj and has_bounds:
            raise ModelError("give either 'tol' or 'low'/'high', not both")
        if has_bounds:
            if "low" not in obj or "high" not in obj:
                raise ModelError("give both 'low' and 'high'")
            return cls(nominal, _number("low", obj["low"]), _number("high", obj["high"]), dist)
        if "tol" not in obj:
            return cls(nominal, distribution=dist)
        tol = obj["tol"]
        if isinstance(tol, str):
            m = _PERCENT.fullmatch(tol)
            if m:
                half = abs(nominal) * float(m.group(1)) / 100.0
            else:
                m = _ABSOLUTE.fullmatch(tol)
                if not m:
                    raise ModelError(f"tolerance {tol!r} is not understood; write e.g. "
                                     f"\"20 %\" or 0.5")
                half = float(m.group(1))
        else:
            half = _number("tol", tol)
        if not math.isfinite(half) or half < 0:
            raise ModelError(f"tolerance must be zero or positive, got {tol!r}")
        return cls(nominal, nominal - half, nominal + half, dist)


def _tf_variants(model: Model, rows: list[tuple[str, str, dict]], dt: float) -> list[Variant]:
    import control

    env = {p: np.array([r[2][p] for r in rows]) for p in model.parameters}
    if not env:
        env = None
    num, den, delay = model.evaluate_batch(env)
    if not env:
        num = np.repeat(num, len(rows), axis=0)
        den = np.repeat(den, len(rows), axis=0)
        delay = np.repeat(delay, len(rows))
    out = []
    for i, (name, kind, params) in enumerate(rows):
        n, d = np.trim_zeros(num[i], "f"), np.trim_zeros(den[i], "f")
        if n.size == 0:
            n = np.zeros(1)
        out.append(Variant(name=name, kind=kind, system=control.tf(n, d, dt),
                           params=dict(params), delay=float(delay[i])))
    return out


def build_family(model: str | Model, params: Mapping[str, Any], *, corners: bool = True,
                 samples: int = 0, seed: int = 0, fidelity: Mapping[str, str] | None = None,
                 sample_time: float | None = None, max_corners: int = 1024,
                 measured: Mapping[str, Any] | None = None) -> PlantFamily:
    """Build a plant family from a model and its parameter tolerances.

    Parameters
    ----------
    model : str or Model
        Model text or a compiled model.
    params : mapping of str to ParamSpec (or a value accepted by ``ParamSpec.from_value``)
        Every parameter the model (and each fidelity model) uses.
    corners : bool
        Add every low/high combination of the model's parameters that have a tolerance,
        named like ``corner:J+,b-`` (``+`` high, ``-`` low; parameters in ``params`` order).
    samples : int
        Number of random samples ``sample:0001``, ... drawn with
        ``numpy.random.default_rng(seed)``, parameter by parameter in sorted name order (so
        the samples depend on the parameters, not on the order they are given in).
    seed : int
        Seed of the sample generator (same seed, same samples).
    fidelity : mapping of str to str, optional
        Extra models by name (e.g. the full-order model), evaluated at the nominal values
        and named ``fidelity:<name>``.
    sample_time : float, optional
        Sample time in seconds for ``z`` models.
    max_corners : int
        Largest number of corners allowed (default 1024).
    measured : mapping of str to MeasuredResponse (or its JSON form), optional
        Bench measurements by name, members ``measured:<name>`` of kind ``measured``
        (frequency metrics only; ``docs/measured.md``).

    Returns
    -------
    PlantFamily
        ``nominal`` first, then corners, samples, fidelity models.

    Raises
    ------
    ModelError
        Missing parameter, too many corners, bad arguments, or any model evaluation error.
    """
    if isinstance(model, str):
        model = compile_model(model)
    if not isinstance(model, Model):
        raise ModelError(f"model must be text or a compiled Model, got {type(model).__name__}")
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 0:
        raise ModelError(f"samples must be a whole number >= 0, got {samples!r}")
    seed = check_seed(seed)
    if isinstance(max_corners, bool) or not isinstance(max_corners, int) or max_corners < 1:
        raise ModelError(f"max_corners must be a whole number >= 1, got {max_corners!r}")
    specs = {}
    for name, value in params.items():
        try:
            specs[name] = ParamSpec.from_value(value)
        except ModelError as e:
            raise ModelError(f"parameter {name!r}: {e}") from e
    missing = sorted(model.parameters - specs.keys())
    if missing:
        raise ModelError(f"parameter {missing[0]!r} of the model has no value; add it to the "
                         f"parameter table")
    nominal = {n: s.nominal for n, s in specs.items()}
    rows: list[tuple[str, str, dict]] = [("nominal", "nominal", nominal)]

    varied = [n for n, s in specs.items() if n in model.parameters and s.has_tolerance]
    if corners and varied:
        if 2 ** len(varied) > max_corners:
            raise ModelError(f"{len(varied)} toleranced parameters make {2 ** len(varied)} "
                             f"corners, more than max_corners={max_corners}; use samples or "
                             f"fewer toleranced parameters")
        for signs in itertools.product("-+", repeat=len(varied)):
            values = dict(nominal)
            for n, sign in zip(varied, signs):
                values[n] = specs[n].high if sign == "+" else specs[n].low
            label = ",".join(f"{n}{sign}" for n, sign in zip(varied, signs))
            rows.append((f"corner:{label}", "corner", values))

    if samples:
        rng = np.random.default_rng(seed)
        drawn = {}
        # sorted order: the numbers depend only on the parameters (a plant's content hash reads
        # them sorted too), while corner names keep the order given
        for n in sorted(varied):
            s = specs[n]
            if s.distribution == "normal":
                drawn[n] = np.clip(rng.normal(s.nominal, s.sigma, samples), s.low, s.high)
            else:
                drawn[n] = rng.uniform(s.low, s.high, samples)
        width = max(4, len(str(samples)))
        for i in range(samples):
            values = dict(nominal)
            values.update({n: float(drawn[n][i]) for n in varied})
            rows.append((f"sample:{i + 1:0{width}d}", "sample", values))

    dt = model._dt(sample_time)
    if model.is_state_space:
        variants = [Variant(name=name, kind=kind, params=dict(values),
                            **_evaluated_fields(model.evaluate(values, sample_time=sample_time)))
                    for name, kind, values in rows]
    else:
        variants = _tf_variants(model, rows, dt)

    for fname, text in (fidelity or {}).items():
        if not isinstance(fname, str) or not fname.strip():
            raise ModelError("a fidelity model needs a non-empty name")
        fmodel = compile_model(text) if isinstance(text, str) else text
        if not isinstance(fmodel, Model):
            raise ModelError(f"fidelity model {fname!r} must be model text")
        fmissing = sorted(fmodel.parameters - specs.keys())
        if fmissing:
            raise ModelError(f"fidelity model {fname!r} uses parameter {fmissing[0]!r}, which "
                             f"has no value in the parameter table")
        ev = fmodel.evaluate(nominal, sample_time=sample_time)
        variants.append(Variant(name=f"fidelity:{fname}", kind="fidelity", system=ev.system,
                                params=dict(nominal), delay=ev.delay))
    from ledger.systems.measured import MeasuredResponse

    for mname, m in (measured or {}).items():
        if not isinstance(m, MeasuredResponse):
            m = MeasuredResponse.from_json(m)
        variants.append(Variant(name=f"measured:{mname}", kind="measured", system=m,
                                params={}))
    try:
        return PlantFamily(tuple(variants))
    except ValueError as e:
        raise ModelError(f"cannot build the family: {e}") from e


def _evaluated_fields(ev) -> dict:
    return {"system": ev.system, "delay": ev.delay}
