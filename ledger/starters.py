"""Starter requirement sets: limits customary in practice for common loop kinds.

Offered when a loop is created (``loopledger loop add --starter``); they are recorded as
*draft* requirements that the engineer edits to fit the system's real needs.  Every limit
here is common practice, no source: typical values quoted across control texts and industry
guides, not derived from any particular system.  ``docs/metrics.md`` explains each metric and
the customary ranges.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Starter", "STARTERS", "starter_set"]


@dataclass(frozen=True)
class Starter:
    suffix: str
    title: str
    metric: str
    limit: str
    statement: str
    rationale: str
    settings: tuple = ()


_COMMON = (
    Starter("S01", "Closed loop stable", "stable", "true",
            "The closed loop shall be internally stable on every plant variant.",
            "A loop that is unstable on any variant the hardware can be is unusable."),
    Starter("S02", "Gain margin", "gain_margin", ">= 6 dB",
            "The loop shall keep a gain margin of at least 6 dB on every plant variant.",
            "Common practice: 6 dB covers a doubling of loop gain (amplifier, sensor or "
            "load changes) before instability."),
    Starter("S03", "Phase margin", "phase_margin", ">= 45 deg",
            "The loop shall keep a phase margin of at least 45 deg on every plant variant.",
            "Common practice: 45-60 deg gives well-damped responses and room for unmodelled "
            "lag."),
    Starter("S04", "Peak sensitivity", "peak_sensitivity", "<= 6 dB",
            "The peak of |S| shall not exceed 2 (6 dB) on any plant variant.",
            "Common practice: Ms <= 2 bounds the amplification of disturbances and guarantees "
            "gain margin >= 2 and phase margin >= 29 deg together."),
    Starter("S05", "Disk margin", "disk_margin", ">= 0.5",
            "The balanced disk margin shall be at least 0.5 on every plant variant.",
            "Common practice: the customary minimum; covers simultaneous gain and phase "
            "variation (about +-4.4 dB and +-28 deg together)."),
)

STARTERS: dict[str, tuple[Starter, ...]] = {
    "position": _COMMON + (
        Starter("S06", "Step overshoot", "overshoot", "<= 10 %",
                "A reference step shall overshoot by no more than 10 %.",
                "Common practice for positioners: limits collision risk and settling cost."),
        Starter("S07", "Complementary sensitivity peak", "peak_complementary_sensitivity",
                "<= 1.3",
                "The peak of |T| shall not exceed 1.3.",
                "Common practice: Mt <= 1.3 keeps resonant peaking of the closed loop low."),
    ),
    "speed": _COMMON + (
        Starter("S06", "Step overshoot", "overshoot", "<= 15 %",
                "A speed step shall overshoot by no more than 15 %.",
                "Common practice for speed loops inside a position or process loop."),
    ),
    "temperature": (
        _COMMON[0],
        Starter("S02", "Gain margin", "gain_margin", ">= 8 dB",
                "The loop shall keep a gain margin of at least 8 dB.",
                "Common practice for thermal loops, whose gain varies with operating point."),
        Starter("S03", "Phase margin", "phase_margin", ">= 45 deg",
                "The loop shall keep a phase margin of at least 45 deg.",
                "Common practice: dead time dominates thermal loops; keep phase in reserve."),
        _COMMON[3],
        Starter("S06", "Step overshoot", "overshoot", "<= 5 %",
                "A set-point step shall overshoot by no more than 5 %.",
                "Common practice: thermal overshoot is slow to recover and may damage samples."),
    ),
    "process": (
        _COMMON[0],
        Starter("S02", "Gain margin", "gain_margin", ">= 6 dB",
                "The loop shall keep a gain margin of at least 6 dB.",
                "Common practice for process loops (gain margin 2 to 5 is quoted as a range)."),
        Starter("S03", "Phase margin", "phase_margin", ">= 30 deg",
                "The loop shall keep a phase margin of at least 30 deg.",
                "Common practice for process loops (30 to 60 deg is the usual range)."),
        _COMMON[3],
    ),
}
STARTERS["other"] = _COMMON


def starter_set(kind: str) -> tuple[Starter, ...]:
    if kind not in STARTERS:
        raise KeyError(kind)
    return STARTERS[kind]


#: added to the kind's set on a digital loop (one with a sample time); docs/digital.md
DIGITAL_STARTERS: tuple[Starter, ...] = (
    Starter("D01", "Coefficients as stored keep the poles", "quantization_pole_shift",
            "<= 0.002",
            "With the controller coefficients in the number format stored in firmware, no "
            "closed-loop pole shall move by more than 0.002 in the z plane on any plant "
            "variant.",
            "Common practice, no source: near z = 1 a pole moved by more than about 0.002 "
            "shifts a mode's frequency or damping noticeably at usual sample rates; together "
            "with S01 (stable, judged on the quantised coefficients) it is the quantisation "
            "stability check."),
)
