"""Generate the demo's two bench measurements of the gantry X drive (invented data).

The "true" plant is the design model's structure with a softer, less damped belt (the first
belt mode about 7 % lower than the model puts it, damping ratio about 0.03) and, for unit 2, a
slightly heavier head.  Each measurement is a swept sine from 2 Hz to 400 Hz: 1.5 % magnitude
and 0.8 deg phase noise (seeded), and a coherence dip at the belt anti-resonance region and near
50 Hz (mains pick-up on the scale cable), where the points are also noisier.

    python sample_db/make_measurements.py      # writes sample_db/measured/gantry-x-unit*.csv
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
OUT = HERE / "measured"


def true_plant(f_hz, *, mh, mp=0.25, kb=142000.0, cb=26.0, Kf=12.0, b=6.0):
    s = 2j * math.pi * np.asarray(f_hz)
    m = mh + mp
    return Kf / (s * (m * s + b)) * (cb * s + kb) / (m * s ** 2 + cb * s + kb)


def write(name: str, mh: float, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    f = np.geomspace(2.0, 400.0, 240)
    g = true_plant(f, mh=mh)
    coh = 0.995 - 0.01 * rng.random(f.size)
    dip = np.exp(-0.5 * ((f - 50.0) / 1.2) ** 2)          # mains pick-up at 50 Hz
    coh = np.clip(coh - 0.6 * dip, 0.0, 1.0)
    noise = 1.0 + 4.0 * dip                                # noisier where coherence dips
    mag_db = 20 * np.log10(np.abs(g)) + 20 * np.log10(1 + 0.015 * noise * rng.standard_normal(f.size))
    phase = np.degrees(np.unwrap(np.angle(g))) + 0.8 * noise * rng.standard_normal(f.size)
    OUT.mkdir(exist_ok=True)
    path = OUT / f"{name}.csv"
    lines = [f"# gantry X drive, {name}: invented swept-sine data (sample_db/make_measurements.py)",
             "freq[Hz], mag[dB], phase[deg], coh"]
    lines += [f"{a:.6g}, {b:.6g}, {c:.6g}, {d:.4f}" for a, b, c, d in zip(f, mag_db, phase, coh)]
    path.write_text("\n".join(lines) + "\n")
    return path


if __name__ == "__main__":
    print(write("gantry-x-unit1", mh=0.9, seed=101))
    print(write("gantry-x-unit2", mh=0.95, seed=102))
