"""``loopledger loop spectrum`` (record a noise or disturbance spectrum on a loop) and
``loopledger loop rms`` (the rms budget of a revision per source and frequency band, and the
cumulative rms versus frequency)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from ..errors import UsageError
from .common import JSON_OPTION, emit_json, errors_to_exit, open_ledger
from .output import say, table

__all__ = ["loop_spectrum", "loop_rms"]


@errors_to_exit
def loop_spectrum(
    name: str = typer.Argument(..., help="Loop name."),
    source: str = typer.Argument(..., help="sensor_noise, input_disturbance or output_disturbance."),
    intensity: Optional[float] = typer.Option(None, "--intensity", help="Rational spectrum: one-sided PSD of the white noise (in --unit; default the source's plant unit^2/Hz)."),
    shaping: str = typer.Option("", "--shaping", help="Rational spectrum: shaping filter model text (s; z for a digital loop); default 1."),
    psd_file: Optional[Path] = typer.Option(None, "--table", help="Tabulated one-sided PSD: a text file of rows 'frequency, psd'."),
    unit: str = typer.Option("", "--unit", help="PSD unit, e.g. 'um^2/Hz', or an amplitude density 'nm/Hz^0.5' (values squared)."),
    frequency_unit: str = typer.Option("Hz", "--frequency-unit", help="Table frequencies in Hz or rad/s."),
    label: str = typer.Option("", "--label", help="Free text shown in the budget (default: the file name)."),
    as_json: bool = JSON_OPTION,
):
    """Record a noise or disturbance spectrum on a loop (one per source, fixed once recorded)."""
    text = None
    if psd_file is not None:
        try:
            text = psd_file.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise UsageError(f"cannot read spectrum file {str(psd_file)!r}: {e}") from e
        label = label or psd_file.name
    elif intensity is None:
        raise UsageError("give --intensity (with an optional --shaping filter) or --table FILE")
    with open_ledger() as lg:
        form = lg.add_spectrum(name, source, shaping=shaping, intensity=intensity,
                               table_text=text, unit=unit, frequency_unit=frequency_unit,
                               label=label)
    if as_json:
        return emit_json(form)
    what = (f"table of {len(form['table'])} rows" if form["kind"] == "table" else
            f"white {form['intensity']:.4g} /Hz through {form['shaping'] or '1'}")
    typer.echo(f"spectrum {source} on loop {name}: {what} ({form['content_hash'][:12]})")


@errors_to_exit
def loop_rms(
    name: str = typer.Argument(..., help="Loop name."),
    revision: Optional[str] = typer.Option(None, "--revision", help="Revision label (default: the tip)."),
    output: str = typer.Option("error", "--output", help="error (output about its set point), measured (error the controller sees) or effort."),
    bands: str = typer.Option("1,10,100,1000", "--bands", help="Band edges in Hz, comma separated."),
    curve: bool = typer.Option(False, "--curve", help="Also print the cumulative rms at each decade."),
    as_json: bool = JSON_OPTION,
):
    """The rms budget of a revision: per source and frequency band, from the loop's spectra."""
    try:
        edges = [float(b) for b in bands.split(",") if b.strip()]
    except ValueError as e:
        raise UsageError(f"--bands {bands!r} must be numbers in Hz separated by commas") from e
    with open_ledger() as lg:
        v = lg.rms_view(name, revision, output=output, bands=edges)
    from ..exports.rmsplot import band_label

    if as_json:
        return emit_json({"loop": v.loop, "revision": v.revision, "output": v.words,
                          "unit": v.unit, "variant": v.variant, "total_rms": v.total_rms,
                          "sources": [{"source": r[0], "kind": r[1], "label": r[2],
                                       "rms": r[3], "share": r[4], "rel_error": r[5],
                                       "band_rms": list(v.band_rms.get(r[0], ()))}
                                      for r in v.rows],
                          "bands": [[a, b] for a, b in v.bands]})
    u = v.unit
    say(f"rms budget of the {v.words} of {v.loop}/{v.revision} on variant {v.variant} "
        f"(largest combined rms): {v.total_rms:.4g} {u}".rstrip())
    heads = ["source", "rms", "share", "est. error", "spectrum"]
    rows = [[r[0], f"{r[3]:.4g} {u}".strip(), f"{100 * r[4]:.1f} %" if r[4] == r[4] else "-",
             "exact" if r[1] == "rational" else f"{r[5]:.1e}",
             r[1] + (f" ({r[2]})" if r[2] else "")] for r in v.rows]
    table(heads, rows, drop=("spectrum",))
    # the contribution of each source per frequency band, a table of its own so that it
    # keeps its columns on a narrow terminal
    table(["source"] + [band_label(a, b) for a, b in v.bands],
          [[r[0]] + [f"{b:.3g}" for b in v.band_rms.get(r[0], ())] for r in v.rows],
          title=f"rms per frequency band{f' ({u})' if u else ''}")
    if curve:
        import math

        import numpy as np

        f = v.frequencies
        lo, hi = math.floor(math.log10(f[f > 0][0])), math.ceil(math.log10(f[-1]))
        pts = [10.0 ** k for k in range(lo, hi + 1) if 10.0 ** k <= f[-1]]
        rows = [[f"{p:g} Hz"] + [f"{float(np.interp(p, f, c)):.4g}"
                                 for c in v.cumulative_rms.values()] for p in pts]
        table(["up to"] + list(v.cumulative_rms), rows,
              title="cumulative rms" + (f" ({u})" if u else ""))
