"""Step-response metrics over recorded arrays (pure).

Times in seconds (device time), PV in PV units, output in output units. The step is taken to
happen at t[0] (pass the arrays from the step on) unless `t_step` says otherwise.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class StepMetrics:
    """rise_time: 10 % to 90 % of the step (s); overshoot: peak beyond the target in percent of
    the step; settling_time: from the step until the PV stays within the band (2 % of the step)
    around the target (s); steady_state_error: target minus the mean PV over the last 5 % of
    the record (PV units); iae: ∫|target - y| dt (PV units s); peak_output: max |u| (output
    units); time_saturated: time with |u| at the limit (s). nan where undefined (no 90 %
    crossing, never settled, no output given)."""

    rise_time: float
    overshoot: float
    settling_time: float
    steady_state_error: float
    iae: float
    peak_output: float
    time_saturated: float

    def as_dict(self) -> dict[str, float]:
        return asdict(self)


def _first_crossing(t: np.ndarray, r: np.ndarray, level: float) -> float:
    """First time r reaches `level` (linear interpolation between samples); nan if never."""
    idx = np.nonzero(r >= level)[0]
    if idx.size == 0:
        return math.nan
    i = int(idx[0])
    if i == 0:
        return float(t[0])
    r0, r1 = r[i - 1], r[i]
    return float(t[i - 1] + (level - r0) / (r1 - r0) * (t[i] - t[i - 1]))


def step_metrics(
    t: np.ndarray,
    y: np.ndarray,
    y0: float,
    y_final_target: float,
    u: np.ndarray | None = None,
    u_limit: float | None = None,
    settle_band: float = 0.02,
    t_step: float | None = None,
) -> StepMetrics:
    """Metrics of a step from `y0` towards `y_final_target` (PV units).

    Crossing times are interpolated linearly between samples; the settling time is the
    interpolated time the PV last enters the band (the first sample after the last one
    outside it, refined between the two samples). `u_limit`: the actuator limit (output
    units); samples with |u| >= u_limit count as saturated (each for its interval to the next
    sample).
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if t.shape != y.shape or t.size < 2:
        raise ValueError("t and y must be equal-length arrays of at least two samples")
    step = y_final_target - y0
    if step == 0.0:
        raise ValueError("step size is zero")
    ts0 = float(t[0]) if t_step is None else float(t_step)
    keep = t >= ts0
    t, y = t[keep], y[keep]
    if u is not None:
        u = np.asarray(u, dtype=float)[keep]
    r = (y - y0) / step  # normalised: 0 at start, 1 at target
    t10 = _first_crossing(t, r, 0.1)
    t90 = _first_crossing(t, r, 0.9)
    rise = t90 - t10
    overshoot = max(0.0, float(np.max(r)) - 1.0) * 100.0
    outside = np.nonzero(np.abs(r - 1.0) >= settle_band)[0]
    if outside.size == 0:
        settling = 0.0
    elif outside[-1] == r.size - 1:
        settling = math.nan
    else:
        i = int(outside[-1])
        d0, d1 = abs(r[i] - 1.0) - settle_band, abs(r[i + 1] - 1.0) - settle_band
        frac = d0 / (d0 - d1) if d0 != d1 else 1.0
        settling = float(t[i] + frac * (t[i + 1] - t[i]) - ts0)
    tail = max(1, int(math.ceil(0.05 * y.size)))
    sse = float(y_final_target - np.mean(y[-tail:]))
    err = np.abs(y_final_target - y)
    iae = float(np.sum(0.5 * (err[1:] + err[:-1]) * np.diff(t)))
    peak_out = math.nan
    t_sat = math.nan
    if u is not None and u.size:
        peak_out = float(np.max(np.abs(u)))
        if u_limit is not None:
            dt = np.diff(t, append=t[-1])
            t_sat = float(np.sum(dt[np.abs(u) >= u_limit * (1 - 1e-9)]))
    return StepMetrics(rise, overshoot, settling, sse, iae, peak_out, t_sat)


# ---------------------------------------------------------------------- noise filter
def moving_average(y: np.ndarray, window: int) -> np.ndarray:
    """Centred moving average over `window` samples (odd; 1 = the samples unchanged).

    Near the ends the window shrinks symmetrically, so the first and last samples stay as
    they are and no value is shifted in time. PV units in, PV units out.
    """
    y = np.asarray(y, dtype=float)
    w = int(window)
    if w < 1 or w % 2 == 0:
        raise ValueError(f"window must be an odd number of samples >= 1, got {window!r}")
    if w == 1 or y.size < 3:
        return y.copy()
    half = w // 2
    c = np.concatenate([[0.0], np.cumsum(y)])
    i = np.arange(y.size)
    h = np.minimum(np.minimum(i, y.size - 1 - i), half)  # half-width that fits at sample i
    return (c[i + h + 1] - c[i - h]) / (2 * h + 1)


class RunningMean:
    """Causal mean of the last `window` samples (the online form of `moving_average`; it lags
    by (window - 1) / 2 samples)."""

    def __init__(self, window: int) -> None:
        if int(window) < 1:
            raise ValueError("window must be >= 1 sample")
        self.window = int(window)
        self._buf: list[float] = []
        self._sum = 0.0

    def update(self, y: float) -> float:
        self._buf.append(float(y))
        self._sum += float(y)
        if len(self._buf) > self.window:
            self._sum -= self._buf.pop(0)
        return self._sum / len(self._buf)


# ---------------------------------------------------------------------- swings and decay ratio
@dataclass(frozen=True)
class Extremum:
    """A turning point of the PV: device time t (s), value y (PV units), kind +1 peak, -1 trough."""

    t: float
    y: float
    kind: int


class SwingTracker:
    """Turning points of a signal, one sample at a time, with hysteresis.

    A running maximum (minimum) becomes a peak (trough) once the signal has come back from it
    by more than `threshold` (PV units), so noise smaller than the threshold makes no turning
    points. `start_kind` is the first kind looked for (+1: a peak, as after a step upwards).
    """

    def __init__(self, threshold: float, start_kind: int = 1) -> None:
        if not threshold >= 0.0:
            raise ValueError("threshold must be >= 0 (PV units)")
        if start_kind not in (-1, 1):
            raise ValueError("start_kind must be +1 or -1")
        self.threshold = float(threshold)
        self.extrema: list[Extremum] = []
        self._kind = start_kind
        self._best: tuple[float, float] | None = None  # (t, y) of the running extreme

    def update(self, t: float, y: float) -> Extremum | None:
        """Feed one sample; returns the turning point it confirmed, if any."""
        best = self._best
        if best is None or (y - best[1]) * self._kind > 0.0:
            self._best = (t, y)
            return None
        if (best[1] - y) * self._kind > self.threshold:
            ext = Extremum(best[0], best[1], self._kind)
            self.extrema.append(ext)
            self._kind = -self._kind
            self._best = (t, y)
            return ext
        return None


def half_swings(extrema: list[Extremum]) -> list[float]:
    """|y[k+1] - y[k]| of successive turning points (PV units): the half-cycle swings."""
    return [abs(b.y - a.y) for a, b in zip(extrema, extrema[1:], strict=False)]


@dataclass(frozen=True)
class Oscillation:
    """Successive swings of a step response.

    decay_ratio: swing k+2 over swing k (one period apart; independent of where the response
    settles); period: s between the turning points of the same kind; swing, first_swing: the
    later and the earlier swing (PV units); t: device time (s) it was confirmed.
    Quarter-amplitude damping is 0.25.
    """

    decay_ratio: float
    period: float
    swing: float
    t: float
    first_swing: float = 0.0

    def as_dict(self) -> dict[str, float]:
        return asdict(self)


def last_decay(extrema: list[Extremum]) -> Oscillation | None:
    """Decay ratio and period from the last three half-swings (four turning points)."""
    if len(extrema) < 4:
        return None
    e = extrema[-4:]
    h = half_swings(e)
    if h[0] <= 0.0:
        return None
    period = 0.5 * ((e[2].t - e[0].t) + (e[3].t - e[1].t))
    return Oscillation(h[2] / h[0], period, h[2], e[3].t, h[0])


def decay_ratios(extrema: list[Extremum], min_swing: float = 0.0) -> list[Oscillation]:
    """Every decay ratio of a list of turning points whose two swings are both at least
    `min_swing` (PV units: smaller swings are noise or inside the band); see `last_decay`."""
    out = []
    for k in range(4, len(extrema) + 1):
        o = last_decay(extrema[:k])
        if o is not None and min(o.swing, o.first_swing) >= min_swing:
            out.append(o)
    return out
