"""The benchmark scenario: an invented voice-coil pipette axis.

Reduced design model ``K/(s (tau_m s + 1))`` with the full-order model
``K/(s (tau_m s + 1)(tau_e s + 1))`` beside it; tau_e = 0.4 ms, tau_m = 30 ms (+-20 %),
K = 180 (+-10 %).  All numbers are invented for the benchmark (the pipette axis of the
demo in ``sample_db/``).  When ``sample_db/demo.toml`` exists its presence is reported, but the
workloads stay on this fixed scenario so that figures from different runs compare.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["PLANT_TEXT", "FULL_TEXT", "PARAMS", "CONTROLLER", "CONTROLLER_GAINS", "SUITE",
           "REQUIREMENTS", "family", "demo_spec_path", "ROOT"]

ROOT = Path(__file__).resolve().parent.parent

PLANT_TEXT = "K/(s*(tau_m*s+1))"
FULL_TEXT = "K/(s*(tau_m*s+1)*(tau_e*s+1))"
PARAMS = {"K": {"nominal": 180.0, "tol": "10 %"},
          "tau_m": {"nominal": 0.03, "tol": "20 %"},
          "tau_e": 0.0004}

#: PID with derivative filter: kp + ki/s + kd s/(tf s + 1)
CONTROLLER_GAINS = {"kp": 1.5, "ki": 15.0, "kd": 0.02, "tf": 0.0005}
CONTROLLER = "pid(kp=1.5, ki=15, kd=0.02, tf=0.0005)"

#: the standard suite of the benchmark (metric names of the catalogue)
SUITE = ("stable", "min_damping", "rise_time", "settling_time", "overshoot", "peak_effort",
         "gain_margin", "phase_margin", "delay_margin", "gain_crossover", "bandwidth",
         "peak_sensitivity", "peak_complementary_sensitivity", "disk_margin")

#: requirements of the ledger workloads: (key, metric, limit)
REQUIREMENTS = (
    ("PZ-01", "stable", "true"),
    ("PZ-02", "min_damping", ">= 0.5"),
    ("PZ-03", "rise_time", "<= 30 ms"),
    ("PZ-04", "settling_time", "<= 150 ms"),
    ("PZ-05", "overshoot", "<= 25 %"),
    ("PZ-06", "peak_effort", "<= 200"),
    ("PZ-07", "gain_margin", ">= 10 dB"),
    ("PZ-08", "phase_margin", ">= 45 deg"),
    ("PZ-09", "delay_margin", ">= 2 ms"),
    ("PZ-10", "gain_crossover", ">= 50 rad/s"),
    ("PZ-11", "bandwidth", ">= 60 rad/s"),
    ("PZ-12", "peak_sensitivity", "<= 2"),
    ("PZ-13", "peak_complementary_sensitivity", "<= 1.5"),
    ("PZ-14", "disk_margin", ">= 0.6"),
)


def demo_spec_path() -> Path | None:
    """``sample_db/demo.toml`` when present, else ``None``."""
    p = ROOT / "sample_db" / "demo.toml"
    return p if p.exists() else None


def family(n_variants: int = 1000, seed: int = 1):
    """The pipette family with ``n_variants`` members: nominal, 4 corners, seeded samples and
    the full-order fidelity model."""
    from ledger.systems import build_family

    samples = max(0, n_variants - 6)
    return build_family(PLANT_TEXT, PARAMS, corners=True, samples=samples, seed=seed,
                        fidelity={"full-order": FULL_TEXT})
