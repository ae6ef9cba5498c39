"""Sampled closed loop of a `DelayedTF` plant and the project's `DiscretePid` (pure).

The PID runs every ts seconds: at tick k it reads y(k ts), computes u[k] and holds it over
[k ts, (k+1) ts) (zero-order hold). The plant response at the ticks is exact: it is the
convolution of the plant input with the plant's exact ZOH pulse response, taken from
`DelayedTF.simulate_zoh` (so dead time, including a fraction of a tick, is exact).
Units: seconds, PV units, output units; the loop starts at rest (y = 0, u = bias).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from autotune.lti import DelayedTF
from autotune.pid import DiscretePid, PidSettings


@dataclass(frozen=True)
class ClosedLoopRun:
    """Arrays at the ticks t[k] = k ts: y PV, u controller output (after its limits), sp
    setpoint, load the disturbance added to the plant input (output units)."""

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    sp: np.ndarray
    load: np.ndarray


_PULSE_CACHE: dict[tuple[DelayedTF, float], np.ndarray] = {}


def pulse_response(plant: DelayedTF, ts: float, n: int) -> np.ndarray:
    """Exact sampled response h[k] = y(k ts), k < n, to a unit input held over [0, ts).

    Memoised per (plant, ts) (a pure function of its arguments; a longer request recomputes).
    Returns a read-only array.
    """
    key = (plant, float(ts))
    h = _PULSE_CACHE.get(key)
    if h is None or h.size < n:
        pulse = np.zeros(n)
        pulse[0] = 1.0
        h = plant.simulate_zoh(pulse, ts)
        h.setflags(write=False)
        if len(_PULSE_CACHE) > 64:
            _PULSE_CACHE.clear()
        _PULSE_CACHE[key] = h
    return h[:n]


def simulate_closed_loop(
    plant: DelayedTF,
    settings: PidSettings,
    t_end: float,
    setpoint_step: float,
    load_step: float = 0.0,
    load_time: float | None = None,
    max_ticks: int = 20000,
) -> ClosedLoopRun:
    """Simulate the sampled loop from rest for `t_end` seconds.

    setpoint_step: setpoint (PV units) from t = 0 on. load_step: added to the plant input
    (output units) from `load_time` on (None: from t = 0). The plant input is
    u + load (the controller's limits apply to u only). The plant must be strictly proper or
    have dead time (the PV read at a tick cannot depend on the output computed from it).
    """
    ts = settings.ts
    n = int(round(t_end / ts)) + 1
    if n > max_ticks:
        raise ValueError(f"{n} ticks requested (t_end/ts), above max_ticks={max_ticks}")
    h = pulse_response(plant, ts, n)
    if abs(h[0]) > 1e-12 * max(1.0, float(np.max(np.abs(h)))):
        raise ValueError("plant has direct feedthrough and no dead time: sampled loop undefined")
    h_rev = h[1:][::-1].copy()  # h_rev[n-1-k+i] = h[k-i]
    t = np.arange(n) * ts
    sp = np.full(n, float(setpoint_step))
    load = np.zeros(n)
    load[t >= (0.0 if load_time is None else load_time) - 1e-12 * ts] = load_step
    y = np.zeros(n)
    u = np.zeros(n)
    w = np.zeros(n)  # plant input
    pid = DiscretePid(settings)
    for k in range(n):
        yk = float(np.dot(h_rev[n - 1 - k : n - 1], w[:k])) if k else 0.0
        y[k] = yk
        uk = pid.update(sp[k], yk)
        u[k] = uk
        w[k] = uk + load[k]
    return ClosedLoopRun(t, y, u, sp, load)
