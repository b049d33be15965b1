"""Spec files: plants, loops, requirements and revisions as TOML (our own schema, format 1).

See ``docs/spec-files.md``.  Import is one transaction and idempotent: records equal to what
the ledger holds are left untouched, a changed plant or requirement gets a new version, a
changed loop or revision is refused (they are fixed once recorded).  Export writes a spec that
imports back to the same ledger content.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import LedgerError, SpecError, UnitError, with_context

__all__ = ["SPEC_FORMAT", "ImportReport", "load_spec", "import_spec", "export_spec", "dump_spec",
           "measurement_text"]

SPEC_FORMAT = 1

_FIELDS = {
    "plant": {
        "required": {"name": str, "model": str},
        "optional": {"description": str, "input_unit": str, "output_unit": str,
                     "sample_time": (int, float, str), "samples": int, "seed": int, "note": str,
                     "params": dict, "fidelity": dict, "measured": dict},
    },
    "loop": {
        "required": {"name": str, "plant": str},
        "optional": {"kind": str, "description": str, "sensor": str, "prefilter": str,
                     "input_delay": (int, float, str), "output_delay": (int, float, str),
                     "sample_time": (int, float, str), "computation_delay": int,
                     "actuator_limit": (int, float), "spectra": list,
                     "rate_limit": (int, float)},
    },
    "requirement": {
        "required": {"id": str, "title": str, "statement": str},
        "optional": {"rationale": str, "method": str, "status": str, "metric": str,
                     "limit": str, "settings": dict, "derives_from": list, "loops": list,
                     "yield": str, "confidence": (str, int, float)},
    },
    "revision": {
        "required": {"loop": str, "controller": str, "rationale": str},
        "optional": {"label": str, "parent": str, "author": str, "discretize": str,
                     "number_format": str, "prefilter": str, "anti_windup": str,
                     "anti_windup_gain": (int, float)},
    },
}
_TOP = {"format", "title", "plant", "loop", "requirement", "revision"}


@dataclass
class ImportReport:
    """What an import did, record by record."""

    created: list[str] = field(default_factory=list)
    new_versions: list[str] = field(default_factory=list)
    unchanged: list[str] = field(default_factory=list)
    revisions_added: list[tuple[str, str]] = field(default_factory=list)

    @property
    def changed(self) -> bool:
        return bool(self.created or self.new_versions or self.revisions_added)


def _err(path, where: str, fld: str | None, msg: str) -> SpecError:
    loc = f"{where}, field {fld!r}" if fld else where
    return SpecError(f"{path}: {loc}: {msg}")


def _seconds(path, where, fld, value) -> float | None:
    """A time setting: a number (seconds) or a string with a unit ('2 ms')."""
    if value is None:
        return None
    if isinstance(value, bool):
        raise _err(path, where, fld, "must be a number of seconds or a time such as '2 ms'")
    if isinstance(value, (int, float)):
        v = float(value)
    else:
        from .units import convert

        parts = str(value).strip().split(None, 1)
        try:
            num = float(parts[0])
            v = convert(num, parts[1] if len(parts) > 1 else "s", "s")
        except (ValueError, IndexError, UnitError) as e:
            raise _err(path, where, fld, f"not a time: {value!r} ({e})") from e
    if not math.isfinite(v):
        raise _err(path, where, fld, f"must be finite, got {value!r}")
    return v


def _check_record(path, kind: str, idx: int, rec: Any) -> str:
    spec = _FIELDS[kind]
    where = f"{kind} #{idx + 1}"
    if not isinstance(rec, dict):
        raise _err(path, where, None, f"must be a table ([[{kind}]])")
    name = rec.get("name") or rec.get("id") or rec.get("label")
    if isinstance(name, str):
        where = f"{kind} {name!r}"
    for fld, typ in spec["required"].items():
        if fld not in rec:
            raise _err(path, where, fld, "is required")
    for fld, val in rec.items():
        typ = spec["required"].get(fld) or spec["optional"].get(fld)
        if typ is None:
            known = sorted(spec["required"]) + sorted(spec["optional"])
            raise _err(path, where, fld, f"unknown field; known fields: {', '.join(known)}")
        if isinstance(val, bool) and typ is not bool:
            raise _err(path, where, fld, f"expected {_tname(typ)}, got a boolean")
        if not isinstance(val, typ):
            raise _err(path, where, fld, f"expected {_tname(typ)}, got {type(val).__name__}")
        if typ is str and fld in spec["required"] and not val.strip():
            raise _err(path, where, fld, "must not be empty")
        if typ is list and fld == "spectra":
            if not all(isinstance(x, dict) for x in val):
                raise _err(path, where, fld, "must be a list of tables (source, intensity, ...)")
        elif typ is list and not all(isinstance(x, str) for x in val):
            raise _err(path, where, fld, "must be a list of strings")
    return where


def _tname(typ) -> str:
    if isinstance(typ, tuple):
        return " or ".join(t.__name__ for t in typ)
    return {"str": "a string", "int": "an integer", "dict": "a table", "list": "a list"}.get(
        typ.__name__, typ.__name__)


def load_spec(path: str | os.PathLike) -> dict:
    """Read and structurally check a spec file; raise SpecError naming file, record, field."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise SpecError(f"{p}: cannot read spec file ({e.strerror})") from e
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as e:
        raise SpecError(f"{p}: not UTF-8 text (byte {e.start})") from e
    except tomllib.TOMLDecodeError as e:
        raise SpecError(f"{p}: not valid TOML: {e}") from e
    unknown = set(data) - _TOP
    if unknown:
        raise SpecError(f"{p}: unknown top-level key {sorted(unknown)[0]!r}; known: "
                        f"{', '.join(sorted(_TOP))}")
    fmt = data.get("format", SPEC_FORMAT)
    if fmt != SPEC_FORMAT:
        raise SpecError(f"{p}: spec format {fmt!r} is not supported (this loopledger reads {SPEC_FORMAT})")
    for kind in ("plant", "loop", "requirement", "revision"):
        recs = data.get(kind, [])
        if not isinstance(recs, list):
            raise SpecError(f"{p}: '{kind}' must be an array of tables ([[{kind}]])")
        for i, rec in enumerate(recs):
            _check_record(p, kind, i, rec)
    return data


def _topo_requirements(path, reqs: list[dict], existing: set[str]) -> list[dict]:
    by_id: dict[str, dict] = {}
    for r in reqs:
        if r["id"] in by_id:
            raise _err(path, f"requirement {r['id']!r}", "id", "appears twice in the file")
        by_id[r["id"]] = r
    order, state = [], {}

    def visit(key: str, chain: tuple[str, ...]):
        if state.get(key) == 2:
            return
        if state.get(key) == 1:
            raise _err(path, f"requirement {key!r}", "derives_from",
                       f"trace cycle: {' -> '.join(chain + (key,))}")
        state[key] = 1
        for parent in by_id[key].get("derives_from", []):
            if parent in by_id:
                visit(parent, chain + (key,))
            elif parent not in existing:
                raise _err(path, f"requirement {key!r}", "derives_from",
                           f"unknown requirement {parent!r}")
        state[key] = 2
        order.append(by_id[key])

    for key in by_id:
        visit(key, ())
    return order


def import_spec(ledger, path: str | os.PathLike) -> ImportReport:
    """Import a spec file into ``ledger`` in one transaction; return what changed.

    The whole import is one writing context of the ledger's unit of work (retried as a whole
    while the database is busy): every record goes in through the store, or nothing does.
    """
    from .store import loops as loops_db
    from .store import plants as plants_db
    from .store import requirements as req_db
    from .store import revisions as rev_db

    p = Path(path)
    data = load_spec(p)

    def work(s) -> ImportReport:
        report = ImportReport()
        author = ledger.author

        def guard(kind, rec, fn):
            name = rec.get("name") or rec.get("id") or rec.get("label") or ""
            try:
                return fn()
            except SpecError:
                raise
            except LedgerError as e:
                where = f"{kind} {name!r}" if name else kind
                prefix = p if str(e).startswith(f"{where}: ") else f"{p}: {where}"
                raise with_context(e, prefix) from e

        for rec in data.get("plant", []):
            where = f"plant {rec['name']!r}"
            st = _seconds(p, where, "sample_time", rec.get("sample_time"))
            measured = _measurements(p, where, rec.get("measured") or {})
            info, changed = guard("plant", rec, lambda: plants_db.add(
                s, rec["name"], rec["model"], author=author, params=rec.get("params"),
                fidelity=rec.get("fidelity"), samples=rec.get("samples", 0),
                seed=rec.get("seed", 0), sample_time=st, input_unit=rec.get("input_unit", ""),
                output_unit=rec.get("output_unit", ""), description=rec.get("description", ""),
                note=rec.get("note", ""), measured=measured))
            _tally(report, f"plant {info.name}", changed, info.version)

        for rec in data.get("loop", []):
            where = f"loop {rec['name']!r}"
            kw = {k: _seconds(p, where, k, rec.get(k)) for k in ("input_delay", "output_delay",
                                                                  "sample_time")}
            info, changed = guard("loop", rec, lambda: loops_db.add(
                s, rec["name"], rec["plant"], kind=rec.get("kind", "position"),
                sensor=rec.get("sensor", ""), prefilter=rec.get("prefilter", ""),
                input_delay=kw["input_delay"] or 0.0, output_delay=kw["output_delay"] or 0.0,
                sample_time=kw["sample_time"], computation_delay=rec.get("computation_delay", 0),
                actuator_limit=rec.get("actuator_limit"), description=rec.get("description", ""),
                rate_limit=rec.get("rate_limit")))
            _tally(report, f"loop {info.name}", changed, 1)
            for item in rec.get("spectra", []):
                from .spectra_io import spec_kwargs
                from .store import spectra as spectra_db

                kw_sp = spec_kwargs(item, p.parent, f"{p}: {where}")
                _, made = guard("loop", rec, lambda: spectra_db.add(
                    s, rec["name"], item["source"], author=author, **kw_sp))
                _tally(report, f"loop {info.name} spectrum {item['source']}", made, 1)

        existing = req_db.keys(s)
        for rec in _topo_requirements(p, data.get("requirement", []), existing):
            info, changed = guard("requirement", rec, lambda: req_db.upsert(
                s, rec["id"], title=rec["title"], statement=rec["statement"], author=author,
                rationale=rec.get("rationale", ""), method=rec.get("method", "analysis"),
                status=rec.get("status", "draft"), metric=rec.get("metric"),
                settings=rec.get("settings"), limit=rec.get("limit"),
                parents=rec.get("derives_from", []), loops=rec.get("loops", []),
                yield_claim=rec.get("yield"), confidence=rec.get("confidence")))
            _tally(report, f"requirement {info.key}", changed, info.version)

        for rec in data.get("revision", []):
            parent = rec.get("parent", None)
            info, changed = guard("revision", rec, lambda: rev_db.add(
                s, rec["loop"], rec["controller"], rationale=rec["rationale"],
                parent=parent if parent else None, author=rec.get("author") or author,
                label=rec.get("label"), discretization=rec.get("discretize", ""),
                number_format=rec.get("number_format", ""),
                prefilter=rec.get("prefilter", ""),
                anti_windup=rec.get("anti_windup", "none"),
                anti_windup_gain=rec.get("anti_windup_gain")))
            if changed:
                report.revisions_added.append((info.loop, info.label))
            else:
                report.unchanged.append(f"revision {info.loop}/{info.label}")
        return report

    return ledger.store.write(work)


def _tally(report: ImportReport, name: str, changed: bool, version: int) -> None:
    if not changed:
        report.unchanged.append(name)
    elif version == 1:
        report.created.append(name)
    else:
        report.new_versions.append(f"{name} v{version}")


_MEASURED_KEYS = ("file", "rhp_poles", "integrators", "min_coherence", "measured_by",
                  "measured_at", "excitation", "note", "source", "source_hash")


def _measurements(path, where, table: dict) -> dict:
    """``[plant.measured.<name>]`` tables: ``file`` (relative to the spec file) read and
    hashed, the declarations and metadata beside it (docs/measured.md)."""
    import hashlib

    from .systems.measfile import parse_measurement

    out = {}
    for name, rec in table.items():
        fld = f"measured.{name}"
        if not isinstance(rec, dict):
            raise _err(path, where, fld, "must be a table with at least 'file'")
        unknown = [k for k in rec if k not in _MEASURED_KEYS]
        if unknown:
            raise _err(path, where, f"{fld}.{unknown[0]}",
                       f"unknown field; known fields: {', '.join(_MEASURED_KEYS)}")
        if not isinstance(rec.get("file"), str) or not rec["file"]:
            raise _err(path, where, f"{fld}.file", "is required (a path relative to the spec)")
        f = Path(path).parent / rec["file"]
        try:
            text = f.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise _err(path, where, f"{fld}.file", f"cannot read {rec['file']}: "
                       f"{e.__class__.__name__}") from None
        meta = {k: str(rec[k]) for k in ("measured_by", "measured_at", "excitation", "note")
                if k in rec}
        # the file's own name and hash, unless the entry names the original bench file it was
        # rewritten from (an exported spec, :func:`dump_spec`): the provenance is kept
        meta["source"] = str(rec.get("source") or rec["file"])
        meta["source_hash"] = str(rec.get("source_hash")
                                  or hashlib.sha256(text.encode()).hexdigest())
        try:
            out[name] = parse_measurement(
                text, rhp_poles=rec.get("rhp_poles", 0), integrators=rec.get("integrators", 0),
                min_coherence=float(rec.get("min_coherence", 0.8)), where=rec["file"],
                **meta)
        except LedgerError as e:
            raise _err(path, where, fld, str(e)) from e
    return out


def _drop_empty(d: dict) -> dict:
    return {k: v for k, v in d.items() if v not in (None, "", [], {}) and v is not False}


def measurement_text(m: dict) -> str:
    """A stored measurement (its JSON form) as a measurement file that reads back to the same
    numbers: frequency in rad/s, real and imaginary parts (and coherence) as shortest reprs."""
    cols = ["freq[rad/s]", "re", "im"] + (["coh"] if m.get("coherence") is not None else [])
    lines = ["# written by loopledger export: the stored points of one measurement "
             "(docs/measured.md)", ",".join(cols)]
    data = [m["omega"], m["re"], m["im"]] + ([m["coherence"]] if len(cols) == 4 else [])
    lines += [",".join(repr(float(x)) for x in row) for row in zip(*data)]
    return "\n".join(lines) + "\n"


def _measured_entries(plant: str, measured: dict, folder: str, files: dict | None) -> dict:
    out = {}
    for name, m in sorted(measured.items()):
        rel = f"{folder}/{plant}.{name}.csv"
        if files is not None:
            files[rel] = measurement_text(m)
        meta = m.get("meta", {})
        out[name] = _drop_empty({
            "file": rel, "rhp_poles": m.get("rhp_poles") or None,
            "integrators": m.get("integrators") or None,
            "min_coherence": m.get("min_coherence"),
            **{k: meta.get(k) for k in ("measured_by", "measured_at", "excitation", "note",
                                        "source", "source_hash")}})
    return out


def dump_spec(ledger, *, folder: str = "measured", files: dict | None = None) -> dict:
    """The ledger's current content (latest versions, every revision) as spec data.

    Measurements are written as files: each entry names ``folder/<plant>.<name>.csv``
    (relative to the spec file) and, when ``files`` is a dict, its text is put there under
    that name (:func:`export_spec` writes them beside the spec)."""
    from .spectra_io import spec_entry

    out: dict[str, Any] = {"format": SPEC_FORMAT}
    out["plant"] = [_drop_empty({
        "name": p.name, "model": p.model, "description": p.description,
        "input_unit": p.input_unit, "output_unit": p.output_unit, "sample_time": p.sample_time,
        "samples": p.samples, "seed": p.seed, "note": p.note, "params": p.params,
        "fidelity": p.fidelity,
        "measured": _measured_entries(p.name, p.measured or {}, folder, files),
    }) for p in ledger.plants()]
    loops = ledger.loops()
    out["loop"] = [_drop_empty({
        "name": lp.name, "plant": lp.plant, "kind": lp.kind, "description": lp.description,
        "sensor": lp.sensor, "prefilter": lp.prefilter, "input_delay": lp.input_delay or None,
        "output_delay": lp.output_delay or None, "sample_time": lp.sample_time,
        "computation_delay": lp.computation_delay or None, "actuator_limit": lp.actuator_limit,
        "spectra": [spec_entry(f) for f in ledger.spectra(lp.name)],
        "rate_limit": lp.rate_limit,
    }) for lp in loops]
    out["requirement"] = [_drop_empty({
        "id": r.key, "title": r.title, "statement": r.statement, "rationale": r.rationale,
        "method": r.method, "status": r.status, "metric": r.metric, "limit": r.limit_text,
        "settings": r.settings, "derives_from": list(r.parents), "loops": list(r.loops),
        **_yield_entry(r),
    }) for r in ledger.requirements()]
    revs = []
    for lp in loops:
        for r in ledger.revisions(lp.name):
            revs.append(_drop_empty({
                "loop": r.loop, "label": r.label, "parent": r.parent, "author": r.author,
                "rationale": r.rationale, "controller": r.controller,
                "discretize": r.discretization, "number_format": r.number_format,
                "prefilter": r.prefilter,
                "anti_windup": None if r.anti_windup == "none" else r.anti_windup,
                "anti_windup_gain": r.anti_windup_gain,
            }))
    out["revision"] = revs
    return {k: v for k, v in out.items() if v != []}


def export_spec(ledger, path: str | os.PathLike) -> Path:
    """Write the ledger's content as a spec file (atomically: temp file, then rename), and
    each measurement as a file in ``<spec stem>-measured/`` beside it (each atomically, before
    the spec)."""
    import tomli_w

    from .fileio import write_atomic

    path = Path(path)
    files: dict[str, str] = {}
    data = dump_spec(ledger, folder=f"{path.stem}-measured", files=files)
    text = "# loopledger spec file (format 1); see docs/spec-files.md\n" + tomli_w.dumps(
        data, multiline_strings=True)
    for rel, body in sorted(files.items()):
        f = path.parent / rel
        f.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(f, lambda tmp, body=body: tmp.write_text(body, encoding="utf-8"))
    return write_atomic(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def _yield_entry(r) -> dict:
    """The ``yield`` claim (``'99 % at 95 %'``) or a bound ``confidence`` of a requirement as
    a spec file gives them (nothing when neither is set)."""
    from .yieldbound import percent_text, yield_text

    if r.yield_target is not None:
        return {"yield": yield_text(r.yield_target, r.confidence)}
    if r.confidence is not None:
        return {"confidence": percent_text(r.confidence)}
    return {}
