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
