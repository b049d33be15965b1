"""Reading a frequency-response measurement from a text file (CSV or whitespace columns).

Format (``docs/measured.md``): lines starting with ``#`` and blank lines are skipped; the
first other line is the header, naming each column with its unit in square brackets; each
following line is one point.  Columns are separated by commas when the header has one, else
by whitespace.

========================  ==================================================
column                    meaning
========================  ==================================================
``freq[Hz]``              frequency in Hz (or ``freq[rad/s]``)
``mag[dB]``               magnitude in dB (or ``mag[abs]``: linear)
``phase[deg]``            phase in degrees (or ``phase[rad]``)
``re``, ``im``            real and imaginary part (instead of magnitude and phase)
``coh``                   coherence in [0, 1] (optional)
========================  ==================================================

Every problem is one :class:`~ledger.errors.ModelError` line naming the file line.
"""

from __future__ import annotations

import math
import re

import numpy as np

from ledger.errors import ModelError
from ledger.systems.measured import DEFAULT_MIN_COHERENCE, MeasuredResponse

__all__ = ["parse_measurement", "COLUMN_UNITS"]

#: column -> accepted units (first: what the value is converted to)
COLUMN_UNITS = {"freq": ("Hz", "rad/s"), "mag": ("dB", "abs"), "phase": ("deg", "rad"),
                "re": ("",), "im": ("",), "coh": ("",)}
_HEAD = re.compile(r"\s*([A-Za-z]+)\s*(?:\[\s*([^\]]*?)\s*\])?\s*")


def _header(line: str, lineno: int, sep) -> dict:
    cols = {}
    names = line.split(sep) if sep else line.split()
    for pos, raw in enumerate(names):
        m = _HEAD.fullmatch(raw)
        if not m:
            raise ModelError(f"line {lineno}: header column {raw.strip()!r} is not "
                             f"'name[unit]' (e.g. freq[Hz], mag[dB], phase[deg], re, im, coh)")
        name, unit = m.group(1).lower(), m.group(2) or ""
        if name not in COLUMN_UNITS:
            raise ModelError(f"line {lineno}: unknown column {name!r}; columns are "
                             f"{', '.join(COLUMN_UNITS)}")
        if name in cols:
            raise ModelError(f"line {lineno}: column {name!r} is given twice")
        units = COLUMN_UNITS[name]
        if unit not in units:
            want = " or ".join(f"{name}[{u}]" for u in units) if units != ("",) else name
            got = f"[{unit}]" if unit else "no unit"
            raise ModelError(f"line {lineno}: column {name!r} has {got}; write {want}")
        cols[name] = (pos, unit)
    if "freq" not in cols:
        raise ModelError(f"line {lineno}: no frequency column; add freq[Hz] or freq[rad/s]")
    polar = "mag" in cols or "phase" in cols
    rect = "re" in cols or "im" in cols
    if polar and rect:
        raise ModelError(f"line {lineno}: give magnitude and phase or re and im, not both")
    if polar and not ("mag" in cols and "phase" in cols):
        missing = "phase" if "mag" in cols else "mag"
        raise ModelError(f"line {lineno}: column {missing!r} is missing")
    if rect and not ("re" in cols and "im" in cols):
        raise ModelError(f"line {lineno}: column {'im' if 're' in cols else 're'!r} is "
                         f"missing")
    if not (polar or rect):
        raise ModelError(f"line {lineno}: no response columns; add mag[dB] and phase[deg] "
                         f"(or re and im)")
    return cols


def parse_measurement(text: str, *, rhp_poles: int = 0, integrators: int = 0,
                      min_coherence: float = DEFAULT_MIN_COHERENCE, where: str = "",
                      **meta) -> MeasuredResponse:
    """Parse a measurement file's text.

    Parameters
    ----------
    text : str
        File content.
    rhp_poles, integrators, min_coherence, **meta
        As :class:`~ledger.systems.measured.MeasuredResponse`.
    where : str
        File name put before messages (``"bench.csv: line 7: ..."``).

    Raises
    ------
    ModelError
        One line naming the file line: header problems, a wrong number of fields, a field that
        is not a finite number, a frequency that is not above the one before, a coherence
        outside [0, 1], a zero linear magnitude, fewer than 2 points.
    """
    prefix = f"{where}: " if where else ""
    try:
        return _parse(text, rhp_poles, integrators, min_coherence, meta)
    except ModelError as e:
        raise ModelError(f"{prefix}{e}") from e


def _parse(text, rhp_poles, integrators, min_coherence, meta) -> MeasuredResponse:
    if not isinstance(text, str):
        raise ModelError("a measurement file must be text")
    cols = None
    sep = None
    rows: list[tuple[int, list[float]]] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        if cols is None:
            sep = "," if "," in s else None
            cols = _header(s, lineno, sep)
            continue
        fields = [f.strip() for f in (s.split(sep) if sep else s.split())]
        if len(fields) != len(cols):
            raise ModelError(f"line {lineno}: {len(fields)} fields, the header names "
                             f"{len(cols)}")
        vals = []
        for name, (pos, _) in cols.items():
            try:
                x = float(fields[pos])
            except ValueError:
                raise ModelError(f"line {lineno}: {name} {fields[pos]!r} is not a number") \
                    from None
            if not math.isfinite(x):
                raise ModelError(f"line {lineno}: {name} is {fields[pos]!r}; every value "
                                 f"must be finite")
            vals.append(x)
        rows.append((lineno, vals))
    if cols is None:
        raise ModelError("the file has no header line (e.g. 'freq[Hz], mag[dB], phase[deg]')")
    if len(rows) < 2:
        raise ModelError(f"the file has {len(rows)} data point(s); a measurement needs at "
                         f"least 2")
    names = list(cols)
    data = {n: np.array([r[1][k] for r in rows]) for k, n in enumerate(names)}
    lines = [r[0] for r in rows]
    w = data["freq"] * (2 * math.pi if cols["freq"][1] == "Hz" else 1.0)
    for i in range(len(w)):
        if w[i] <= 0:
            raise ModelError(f"line {lines[i]}: frequency {data['freq'][i]:g} is not > 0")
        if i and w[i] <= w[i - 1]:
            word = "repeats" if w[i] == w[i - 1] else "is below"
            raise ModelError(f"line {lines[i]}: frequency {data['freq'][i]:g} {word} the one "
                             f"before; frequencies must increase strictly")
    if "mag" in cols:
        mag = data["mag"]
        if cols["mag"][1] == "dB":
            mag = 10.0 ** (mag / 20.0)
        else:
            bad = np.flatnonzero(mag <= 0)
            if bad.size:
                raise ModelError(f"line {lines[bad[0]]}: linear magnitude "
                                 f"{data['mag'][bad[0]]:g} is not > 0 (is the column in dB?)")
        ph = data["phase"] * (math.pi / 180 if cols["phase"][1] == "deg" else 1.0)
        g = mag * np.exp(1j * ph)
    else:
        g = data["re"] + 1j * data["im"]
        bad = np.flatnonzero(g == 0)
        if bad.size:
            raise ModelError(f"line {lines[bad[0]]}: the response is zero")
    coh = data.get("coh")
    if coh is not None:
        bad = np.flatnonzero((coh < 0) | (coh > 1))
        if bad.size:
            raise ModelError(f"line {lines[bad[0]]}: coherence {coh[bad[0]]:g} is not "
                             f"between 0 and 1")
    try:
        return MeasuredResponse(omega=w, response=g, coherence=coh, rhp_poles=rhp_poles,
                                integrators=integrators, min_coherence=min_coherence,
                                meta=meta)
    except ModelError as e:
        m = re.match(r"point (\d+): (.*)", str(e))
        if m:
            raise ModelError(f"line {lines[int(m.group(1)) - 1]}: {m.group(2)}") from e
        raise
