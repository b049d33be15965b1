"""What a measurement returns and how it is keyed: results, request keys, fingerprints.

:class:`MetricResult` (one metric over every variant), :class:`FamilyResult` (all requests
over a family) and :class:`Measurement` (the mapping :func:`ledger.engine.measure` returns);
:func:`request_key` and :func:`fingerprint` hash what a cached value depends on, including
:data:`ENGINE_VERSION`.  Cheap to import: python-control is imported only to hash a system.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import ComputeError, UnstableLoopError
from .metrics import METRICS, get_metric, resolve_settings

if TYPE_CHECKING:
    from .loop import LoopSpec
    from .stability import StabilityReport

__all__ = ["ENGINE_VERSION", "engine_version", "MetricResult", "FamilyResult", "Measurement", "request_key",
           "fingerprint"]

#: Bumped whenever a number the engine returns may change; part of every fingerprint.
ENGINE_VERSION = "engine-6"


def engine_version() -> str:
    """The engine version in force (read at call time, so every reader agrees): stored with
    each result; a result of another version is stale (docs/history.md)."""
    return ENGINE_VERSION

# --------------------------------------------------------------------------- results

@dataclass(frozen=True)
class MetricResult:
    """One metric with one set of settings, over every variant.

    Attributes
    ----------
    name : str
    settings : dict
        Complete settings used.
    key : str
        :func:`request_key` of (name, settings).
    values : ndarray (V,)
        Per-variant values; a failed variant holds the worst-direction infinity.
    variant_errors : dict
        Variant name -> reason, for variants that could not be computed.
    unstable : bool
        True when a failure is due to an unstable loop.
    """

    name: str
    settings: dict
    key: str
    values: np.ndarray
    variant_errors: dict
    unstable: bool
    variants: tuple = field(repr=False, default=())

    @property
    def error(self) -> str | None:
        """Reason the family-wide value does not exist, or ``None``."""
        if not self.variant_errors:
            return None
        first = next(iter(self.variant_errors.items()))
        more = len(self.variant_errors) - 1
        tail = f" (and {more} more variant(s))" if more else ""
        return f"{self.name}: {first[1]}{tail}"

    def _worst_index(self) -> int:
        mdef = METRICS[self.name]
        return int(np.argmax(self.values) if mdef.better == "lower" else np.argmin(self.values))

    @property
    def worst(self) -> float:
        """Worst value over the family; raises when any variant failed."""
        if self.variant_errors:
            cls = UnstableLoopError if self.unstable else ComputeError
            raise cls(self.error)
        return float(self.values[self._worst_index()])

    @property
    def worst_variant(self) -> str:
        """Name of the variant that gives :attr:`worst` (or the first failed one)."""
        if self.variant_errors:
            return next(iter(self.variant_errors))
        return self.variants[self._worst_index()]


@dataclass(frozen=True)
class FamilyResult:
    """Results of :func:`measure_family`.

    Attributes
    ----------
    variants : tuple of str
    results : Mapping[str, MetricResult]
        Keyed by :func:`request_key`.
    stability : StabilityReport
    """

    variants: tuple
    results: Mapping
    stability: StabilityReport

    def get(self, name: str, settings: dict | None = None) -> MetricResult:
        """The result of ``name`` with ``settings`` (completed with defaults)."""
        return self.results[request_key(name, resolve_settings(name, settings))]


@dataclass(frozen=True, eq=False)
class Measurement(Mapping):
    """Worst-case metric values over a family, as a read-only mapping name -> float.

    Iteration and ``in`` cover the metrics that were computed for every variant.  Reading a
    metric that failed raises :class:`~ledger.errors.UnstableLoopError` or
    :class:`~ledger.errors.ComputeError` with the reason; see :attr:`errors`.
    """

    result: FamilyResult
    request_keys: Mapping

    def _res(self, name: str) -> MetricResult:
        try:
            return self.result.results[self.request_keys[name]]
        except KeyError as e:
            raise KeyError(f"{name!r} was not measured; measured: {', '.join(self.request_keys)}") from e

    def __getitem__(self, name: str) -> float:
        return self._res(name).worst

    def __iter__(self):
        return (n for n in self.request_keys if not self._res(n).variant_errors)

    def __len__(self) -> int:
        return sum(1 for _ in self)

    def __contains__(self, name) -> bool:
        return name in self.request_keys and not self._res(name).variant_errors

    def __repr__(self) -> str:
        parts = [f"{n}={self[n]:.6g}" for n in self]
        parts += [f"{n}=<error>" for n in self.errors]
        return f"Measurement({', '.join(parts)})"

    @property
    def variants(self) -> tuple:
        """Variant names in family order."""
        return self.result.variants

    @property
    def errors(self) -> dict:
        """Metric name -> reason, for metrics without a family-wide value."""
        return {n: self._res(n).error for n in self.request_keys if self._res(n).variant_errors}

    def per_variant(self, name: str) -> np.ndarray:
        """Values per variant (V,); failed variants hold the worst-direction infinity."""
        return self._res(name).values.copy()

    def variant_errors(self, name: str) -> dict:
        """Variant name -> reason for the variants where ``name`` failed."""
        return dict(self._res(name).variant_errors)

    def worst_variant(self, name: str) -> str:
        """Name of the variant giving the worst value of ``name``."""
        return self._res(name).worst_variant

    def unit(self, name: str) -> str:
        """Unit of a metric."""
        return get_metric(name).unit


# --------------------------------------------------------------------------- hashing

def _canon(x: Any):
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        x = float(x) + 0.0
        return repr(x) if not math.isfinite(x) else format(x, ".15e")
    if isinstance(x, str) or x is None:
        return x
    if isinstance(x, (tuple, list)):
        return [_canon(v) for v in x]
    if isinstance(x, Mapping):
        return {str(k): _canon(v) for k, v in sorted(x.items())}
    import control  # only systems reach here (imported once; primitives return above)

    if isinstance(x, (control.TransferFunction, control.StateSpace)):
        return {"lti": _digest(x)}
    raise TypeError(f"cannot hash a {type(x).__name__}")


def _digest(system, delay: float = 0.0) -> str:
    if hasattr(system, "digest") and hasattr(system, "omega"):  # a measured response
        payload = json.dumps(["measured", system.digest(), _canon(delay)])
        return hashlib.sha256(payload.encode()).hexdigest()
    try:
        from ledger.systems import system_digest
    except ImportError:  # parser package not present: own canonical tf form
        import control

        tf = control.tf(system)
        num, den = np.asarray(tf.num[0][0], float), np.asarray(tf.den[0][0], float)
        lead = den[np.flatnonzero(den)[0]]
        payload = json.dumps([_canon(list(num / lead)), _canon(list(den / lead)),
                              _canon(tf.dt or 0.0), _canon(delay)])
        return hashlib.sha256(payload.encode()).hexdigest()
    return system_digest(system, delay)


def request_key(name: str, settings: Mapping) -> str:
    """Stable hash of a metric name and its (complete) settings, 16 hex characters."""
    payload = json.dumps([name, _canon(dict(settings))], sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()[:16]


def fingerprint(variant, controller, loop: LoopSpec, metric: str, settings: Mapping) -> str:
    """SHA-256 of everything a cached metric value of one variant depends on.

    Parameters
    ----------
    variant : Variant
    controller : control.LTI
    loop : LoopSpec
    metric : str
    settings : mapping
        Complete metric settings.

    Returns
    -------
    str
        64 hex characters; includes :data:`ENGINE_VERSION`.
    """
    # fields added later enter only when set, so older fingerprints hold
    loop_form = {f.name: _canon(getattr(loop, f.name)) for f in fields(loop)
                 if not (f.name in ("number_format", "reference_controller")
                         and getattr(loop, f.name) is None) and f.name != "spectra"}
    if getattr(loop, "spectra", ()):  # only then: fingerprints of loops without stay the same
        loop_form["spectra"] = [sp.canonical() for sp in loop.spectra]
    payload = json.dumps({"engine": ENGINE_VERSION,
                          "plant": _digest(variant.system, variant.delay),
                          "controller": _digest(controller) if not isinstance(
                              controller, (int, float)) else _canon(controller),
                          "loop": loop_form, "metric": metric,
                          "settings": _canon(dict(settings))}, sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()
