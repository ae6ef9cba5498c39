"""When has a relay oscillation settled? The one convergence test of the live run and the analysis.

Pure module. Cycles are anything with `period` (s) and `amplitude_pp` (PV units, peak to peak);
a first-harmonic amplitude `amplitude_h1` (PV units) is used for the amplitude where present
(robust to noise and quantisation).

What the measurement can resolve (common practice, no source): a switching instant moves with
the PV noise and quantisation divided by the PV slope at the switching level, and the tick
rounds it (`switch_jitter`); a peak-to-peak reading is off by up to one quantisation step and
two noise standard deviations. Two readings of a steady oscillation may differ by that much;
`measurement_tolerances` turns it into relative tolerances, and `steady_converged` widens the
configured tolerance to them.

The criterion (`steady_converged`): the first cycle after a settings change still carries the
plant's transient and is left out; of the remaining (steady) cycles, at least `min_cycles`,
and the last two or three agree in period and in amplitude within the widened tolerance.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

__all__ = [
    "cycle_amplitude",
    "cycles_to_converge",
    "measurement_tolerances",
    "steady_converged",
    "steady_tolerances",
    "switch_jitter",
]

AGREE_CYCLES = 3  # at most this many of the last steady cycles must agree


def switch_jitter(amplitude: float, period: float, hysteresis: float = 0.0,
                  noise_std: float = 0.0, resolution: float = 0.0, tick: float = 0.0) -> float:
    """Standard deviation (s) of one relay switching instant.

    The relay switches when the PV crosses centre -/+ hysteresis; PV noise (std `noise_std`) and
    quantisation (step `resolution`, uniform error of std resolution/sqrt(12)), divided by the
    PV slope there, move that instant, and the tick (s) rounds it (uniform, std tick/sqrt(12)).
    The slope is that of a sinusoid of peak `amplitude` and `period` at the switching level:
    (2 pi / period) sqrt(amplitude^2 - hysteresis^2), floored at a third of its peak value
    (common practice, no source). amplitude and hysteresis in PV units, period in s.
    """
    quant = tick * tick / 12.0
    if not (amplitude > 0 and period > 0):
        return math.sqrt(quant)
    level = max(amplitude * amplitude - hysteresis * hysteresis, (amplitude / 3.0) ** 2)
    slope = 2.0 * math.pi / period * math.sqrt(level)
    pv_var = noise_std * noise_std + resolution * resolution / 12.0
    return math.sqrt(pv_var / (slope * slope) + quant)


def measurement_tolerances(period: float, amplitude_pp: float, *, hysteresis: float = 0.0,
                           tick: float = 0.0, noise_std: float = 0.0, resolution: float = 0.0,
                           cycles_per_reading: int = 2) -> tuple[float, float]:
    """(period, amplitude) relative differences that two readings of a steady oscillation can
    show from the measurement alone (period s, amplitude_pp PV units peak to peak).

    A reading is the mean over `cycles_per_reading` consecutive cycles. Period: 3 x the
    standard deviation of the difference of two readings, each period being the difference of
    two switching instants (`switch_jitter`): a reading of n cycles spans two switches, so its
    jitter is sqrt(2) sd / n, and the difference of two readings sqrt(2) times that (readings
    that share a switch differ by up to sqrt(6) / sqrt(4) times more: the bound taken is
    2 sqrt(2) sd / n), and at least one tick. Amplitude: a peak-to-peak reading is off by up
    to one quantisation step and 2 x noise.
    """
    if not (period > 0 and amplitude_pp > 0):
        return math.inf, math.inf
    n = max(int(cycles_per_reading), 1)
    sd = switch_jitter(0.5 * amplitude_pp, period, hysteresis, noise_std, resolution, tick)
    tol_p = max(3.0 * 2.0 * math.sqrt(2.0) * sd / n, tick) / period
    tol_a = (resolution + 2.0 * noise_std) / amplitude_pp
    return tol_p, tol_a


def steady_tolerances(period: float, amplitude_pp: float, *, tick: float = 0.0,
                      noise_std: float = 0.0, resolution: float = 0.0,
                      hysteresis: float = 0.0) -> tuple[float, float]:
    """Relative (period, amplitude) differences single steady cycles can show from measurement
    alone (for dropping start-up cycles in the analysis).

    period (s), amplitude_pp (PV units, peak to peak), tick (s), noise_std, resolution,
    hysteresis (PV units). `measurement_tolerances` for readings of two cycles; the amplitude
    tolerance is at least the period's, since the jitter that moves a switch moves the swing
    with it (for an integrating plant the swing grows in proportion to the half-period; common
    practice, no source). (0, 0) when the cycle figures are not positive.
    """
    tol_p, tol_a = measurement_tolerances(period, amplitude_pp, hysteresis=hysteresis,
                                          tick=tick, noise_std=noise_std,
                                          resolution=resolution)
    if not (math.isfinite(tol_p) and math.isfinite(tol_a)):
        return 0.0, 0.0
    return tol_p, max(tol_a, tol_p)


def cycle_amplitude(cycle: Any) -> float:
    """Peak-to-peak PV amplitude of a cycle (PV units); from its first harmonic when it has one
    (4 / pi of a sinusoid's peak-to-peak would differ: the first harmonic's peak is doubled,
    so that a sinusoid reads the same either way)."""
    h1 = getattr(cycle, "amplitude_h1", None)
    if h1 is not None and h1 > 0 and math.isfinite(h1):
        return 2.0 * float(h1)
    return float(cycle.amplitude_pp)


def steady_converged(cycles: Sequence[Any], tol: float = 0.02, *, min_cycles: int = 2,
                     skip_first: bool = True, hysteresis: float = 0.0, tick: float = 0.0,
                     noise_std: float = 0.0, resolution: float = 0.0) -> bool:
    """Has the relay oscillation settled? `cycles`: those since the last settings change.

    The first is left out when `skip_first` (it carries the transient of the change). Of the
    rest, at least max(min_cycles, 2), and the last min(3, n) agree: each one's period (s) and
    amplitude (PV units, `cycle_amplitude`) lies within `tol` (relative) of their mean, the
    tolerance widened to the difference two single-cycle readings can show from the tick (s),
    the PV noise and resolution (PV units) alone (`measurement_tolerances`; a first-harmonic
    amplitude averages the noise over the cycle's `samples`, and the jitter of the switches
    moves the swing by twice the period's tolerance).
    """
    steady = list(cycles[1:] if skip_first else cycles)
    if len(steady) < max(int(min_cycles), 2):
        return False
    last = steady[-min(AGREE_CYCLES, len(steady)):]
    periods = [float(c.period) for c in last]
    amps = [cycle_amplitude(c) for c in last]
    if not all(math.isfinite(x) and x > 0 for x in periods + amps):
        return False
    p_mean = sum(periods) / len(periods)
    a_mean = sum(amps) / len(amps)
    pp = min(float(c.amplitude_pp) for c in last)
    tol_p, tol_a = measurement_tolerances(p_mean, pp, hysteresis=hysteresis, tick=tick,
                                          noise_std=noise_std, resolution=resolution,
                                          cycles_per_reading=1)
    n = min(int(getattr(c, "samples", 0) or 0) for c in last)
    if getattr(last[0], "amplitude_h1", 0) and n > 0:
        # first harmonic: the PV error (noise and quantisation) averaged over n samples
        sd = math.sqrt(noise_std ** 2 + resolution ** 2 / 12.0) * 2.0 / math.sqrt(n / 2.0)
        tol_a = 3.0 * math.sqrt(2.0) * sd / a_mean
    # a switch moved by the jitter lets the PV run on (or turn early) for that long: the swing
    # changes by about twice the relative change of the half-period it ends (the swing of an
    # integrating loop goes as its half-period; common practice, no source)
    tol_a = max(tol_a, 2.0 * tol_p)
    return (max(abs(p - p_mean) for p in periods) <= max(tol, tol_p) * p_mean and
            max(abs(a - a_mean) for a in amps) <= max(tol, tol_a) * a_mean)


def cycles_to_converge(cycles: Sequence[Any], tol: float = 0.02, *, min_cycles: int = 2,
                       skip_first: bool = True, **measurement: float) -> int | None:
    """Number of cycles (counted from the first given, the skipped one included) after which
    `steady_converged` first holds; None when it never does. `measurement`: hysteresis, tick,
    noise_std, resolution as for steady_converged."""
    for n in range(2, len(cycles) + 1):
        if steady_converged(cycles[:n], tol, min_cycles=min_cycles, skip_first=skip_first,
                            **measurement):
            return n
    return None
