"""Spectra as the ledger records them: a source's spectrum from user input (a shaping filter
with an intensity, or a PSD table from a file, with units) checked and converted to the
stored form, and the stored form back to the engine's :class:`~ledger.engine.spectra.Spectrum`.

Stored form (plain JSON-able data, what enters the metric key and the record's hash):
``{"source", "kind": "rational"|"table", "shaping": text, "intensity": float (source
unit^2/Hz), "table": [[f Hz, PSD source-unit^2/Hz], ...], "unit", "frequency_unit",
"label"}``.  The source unit is the plant's output unit for sensor noise and output
disturbances, its input unit for input disturbances.
"""

from __future__ import annotations

import math

from .errors import ModelError, UnitError
from .hashing import sha256_of

__all__ = ["SOURCES", "source_unit", "spectrum_form", "spectrum_hash", "engine_spectrum",
           "canonical_forms"]

SOURCES = ("sensor_noise", "input_disturbance", "output_disturbance")


def source_unit(source: str, input_unit: str, output_unit: str) -> str:
    """The plant unit a source is measured in (``""`` when the plant declares none)."""
    return (input_unit if source == "input_disturbance" else output_unit) or ""


def _psd_factor(unit: str, base: str) -> tuple[float, bool]:
    """(factor to base^2/Hz, amplitude?) of a PSD unit: ``unit^2/Hz`` or an amplitude density
    ``unit/sqrt(Hz)`` (its values are squared)."""
    from .units import _parse_errors, _ureg

    ureg = _ureg()
    target2 = f"({base})**2/Hz" if base else "1/Hz"
    target1 = f"({base})/Hz**0.5" if base else "1/Hz**0.5"
    try:
        q = ureg.Quantity(1.0, unit)
    except _parse_errors() as e:
        raise UnitError(f"spectrum unit {unit!r} is not a unit pint knows; write e.g. "
                        "'um^2/Hz' or 'nm/Hz^0.5'") from e
    for target, amp in ((target2, False), (target1, True)):
        try:
            return float(q.to(target).magnitude), amp
        except Exception:  # noqa: BLE001 - pint raises several kinds; try the other form
            continue
    raise UnitError(f"spectrum unit {unit!r} is neither {target2} nor an amplitude density "
                    f"{target1} (the {'plant unit ' + base if base else 'plant declares no unit'})")


def _freq_factor(unit: str) -> float:
    u = (unit or "Hz").strip()
    if u == "Hz":
        return 1.0
    if u in ("rad/s", "rad/sec"):
        return 1.0 / (2.0 * math.pi)
    raise UnitError(f"frequency unit {unit!r} is unknown; use Hz or rad/s")


def spectrum_form(source: str, *, shaping: str = "", intensity: float | str | None = None,
                  table_text: str | None = None, unit: str = "", frequency_unit: str = "Hz",
                  label: str = "", input_unit: str = "", output_unit: str = "",
                  sample_time: float | None = None, where: str = "spectrum file") -> dict:
    """Check a spectrum and return its stored form (see the module note).

    A rational spectrum gives ``intensity`` (a number in ``unit``, default the source's plant
    unit^2/Hz) and optionally ``shaping`` (model text in s, or in z for a digital loop); a table
    gives ``table_text`` (rows ``frequency, psd``; ``frequency_unit`` Hz or rad/s; ``unit`` the
    PSD unit).  Nothing is written; a bad input raises a one-line :class:`ModelError` or
    :class:`UnitError` (a table's names the row).
    """
    if source not in SOURCES:
        raise ModelError(f"spectrum source {source!r} is unknown; use one of {', '.join(SOURCES)}")
    base = source_unit(source, input_unit, output_unit)
    factor, amp = _psd_factor(unit, base) if unit else (1.0, False)
    form = {"source": source, "unit": unit or "", "frequency_unit": frequency_unit or "Hz",
            "label": label or "", "shaping": "", "intensity": None, "table": []}
    if table_text is not None:
        if shaping or intensity is not None:
            raise ModelError(f"{source}: give a table or a shaping filter with an intensity, "
                             "not both")
        from .engine.spectra import parse_psd_table

        fs, ps = parse_psd_table(table_text, where)
        ff = _freq_factor(frequency_unit)
        rows = [[f * ff, (p * factor) ** 2 if amp else p * factor] for f, p in zip(fs, ps)]
        form.update(kind="table", table=rows)
    else:
        if intensity is None:
            raise ModelError(f"{source}: give an intensity (one-sided PSD of the white noise) "
                             "or a table")
        try:
            q = float(intensity)
        except (TypeError, ValueError) as e:
            raise ModelError(f"{source}: intensity {intensity!r} is not a number") from e
        if not (math.isfinite(q) and q >= 0):
            raise ModelError(f"{source}: intensity {intensity!r} must be finite and >= 0")
        q = q * q * factor * factor if amp else q * factor
        text = (shaping or "").strip()
        if text:
            from .systems import parse_model

            ev = parse_model(text, sample_time=sample_time)
            if ev.delay:
                raise ModelError(f"{source}: a shaping filter has no delay")
        form.update(kind="rational", shaping=text, intensity=q)
    engine_spectrum(form, sample_time)  # the engine's checks (stable filter, table rules)
    return form


def spectrum_hash(form: dict) -> str:
    """SHA-256 of what a spectrum's values depend on (the label and units as written are
    kept out: the converted numbers carry them)."""
    return sha256_of({k: form[k] for k in ("source", "kind", "shaping", "intensity", "table")})


def canonical_forms(forms: list[dict]) -> list[dict]:
    """The forms that enter a metric key, by source."""
    return [{k: f[k] for k in ("source", "kind", "shaping", "intensity", "table")}
            for f in sorted(forms, key=lambda f: SOURCES.index(f["source"]))]


def engine_spectrum(form: dict, sample_time: float | None = None):
    """The engine's :class:`~ledger.engine.spectra.Spectrum` of a stored form."""
    from .engine.spectra import Spectrum

    if form["kind"] == "table":
        rows = form["table"]
        return Spectrum(form["source"], frequencies=tuple(float(r[0]) for r in rows),
                        psd=tuple(float(r[1]) for r in rows), label=form.get("label", ""))
    W = None
    if form.get("shaping"):
        from .systems import parse_model

        W = parse_model(form["shaping"], sample_time=sample_time).system
        if sample_time is not None and not W.dt:
            raise ModelError(f"{form['source']} shaping filter must be in z with dt = "
                             f"{sample_time} s for this digital loop")
    sp = Spectrum(form["source"], intensity=float(form["intensity"]), shaping=W,
                  label=form.get("label", ""))
    if W is not None:
        from .engine.rms import _shaping

        _shaping(sp, sample_time)
    return sp


#: Keys of one ``[[loop.spectra]]`` table of a spec file.
SPEC_KEYS = {"source", "intensity", "shaping", "file", "table", "unit", "frequency_unit", "label"}


def spec_kwargs(item, base_dir, where: str) -> dict:
    """Keyword arguments of :func:`ledger.store.spectra.add` from one ``spectra`` entry of a
    spec file's loop: ``source`` and either ``intensity`` (+ ``shaping``) or ``file`` (a PSD
    table next to the spec file) or ``table`` (inline rows ``[[f, psd], ...]``); ``unit``,
    ``frequency_unit``, ``label`` optional."""
    from pathlib import Path

    from .errors import SpecError

    if not isinstance(item, dict) or "source" not in item:
        raise SpecError(f"{where}: each spectra entry is a table with a 'source'")
    extra = set(item) - SPEC_KEYS
    if extra:
        raise SpecError(f"{where}: spectra entry has unknown key {sorted(extra)[0]!r}; known: "
                        f"{', '.join(sorted(SPEC_KEYS))}")
    kw = {"shaping": str(item.get("shaping", "")), "intensity": item.get("intensity"),
          "unit": str(item.get("unit", "")),
          "frequency_unit": str(item.get("frequency_unit", "Hz")),
          "label": str(item.get("label", "")), "table_text": None}
    if "file" in item:
        f = Path(base_dir) / str(item["file"])
        try:
            kw["table_text"] = f.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise SpecError(f"{where}: cannot read spectrum file {str(f)!r}: {e}") from e
        kw["label"] = kw["label"] or f.name
    elif "table" in item:
        try:
            kw["table_text"] = "\n".join(f"{float(a)!r}, {float(b)!r}" for a, b in item["table"])
        except (TypeError, ValueError) as e:
            raise SpecError(f"{where}: spectra 'table' must be rows [frequency, psd]") from e
    return kw


def spec_entry(form: dict) -> dict:
    """A stored form as a spec file's ``spectra`` entry (converted numbers: Hz and the plant
    unit^2/Hz), so an export imports back to the same spectrum."""
    if form["kind"] == "table":
        out = {"source": form["source"], "table": [list(r) for r in form["table"]]}
    else:
        out = {"source": form["source"], "intensity": form["intensity"]}
        if form.get("shaping"):
            out["shaping"] = form["shaping"]
    if form.get("label"):
        out["label"] = form["label"]
    return out
