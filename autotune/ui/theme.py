"""Colours and glyphs of the bench view, in one place.

The palette is chosen for a workshop terminal seen from a step away: the PV is the brightest
trace, the setpoint a calm reference, the output a warm secondary trace; anything that asks the
operator to act is white on red.
"""

from __future__ import annotations

from rich.theme import Theme

PV = "bright_cyan"
SP = "yellow"
OUT = "orchid1"
PREDICTED = "spring_green2"
AXIS = "grey50"
MUTED = "grey62"
OK = "green3"
WARN = "gold1"
BAD = "red1"
ALARM = "bold white on red3"
KEYBAR = "bold black on gold1"
KEYCAP = "bold black on grey85"
TITLE = "bold bright_white"
CURRENT = "bold black on bright_cyan"
SELECTED = "bold black on grey85"

BENCH_THEME = Theme(
    {
        "bench.pv": PV,
        "bench.sp": SP,
        "bench.out": OUT,
        "bench.pred": PREDICTED,
        "bench.axis": AXIS,
        "bench.muted": MUTED,
        "bench.ok": OK,
        "bench.warn": WARN,
        "bench.bad": BAD,
        "bench.alarm": ALARM,
        "bench.keybar": KEYBAR,
        "bench.title": TITLE,
    }
)


def level_style(fraction: float) -> str:
    """Style for how close a value is to its limit: 0 = far, 1 = at the limit."""
    if fraction >= 0.85:
        return BAD
    if fraction >= 0.6:
        return WARN
    return OK
