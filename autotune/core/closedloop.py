"""Sampled closed loop of a `DelayedTF` plant and the project's `DiscretePid` (pure).

The PID runs every ts seconds: at tick k it reads y(k ts), computes u[k] and holds it over
[k ts, (k+1) ts) (zero-order hold). The plant response at the ticks is exact (dead time,
including a fraction of a tick, included). Two equivalent evaluations: while the output stays
inside its limits the loop is linear and is solved at once as a difference equation built from
the plant's exact ZOH form (`autotune.core.model.discrete_coefficients`) and the PID's transfer
functions; otherwise `DiscretePid` runs tick by tick against the same exact ZOH difference
equation of the plant.
Units: seconds, PV units, output units; the loop starts at rest (y = 0, u = bias).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core.lti import DelayedTF
from autotune.core.model import discrete_coefficients
from autotune.core.pid import DiscretePid, PidSettings, per_tick


@dataclass(frozen=True)
class ClosedLoopRun:
    """Arrays at the ticks t[k] = k ts: y PV, u controller output (after its limits), sp
    setpoint, load the disturbance added to the plant input (output units)."""

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    sp: np.ndarray
    load: np.ndarray


_COEF_CACHE: dict[tuple[DelayedTF, float], tuple[np.ndarray, np.ndarray, int]] = {}


def _coefficients(plant: DelayedTF, ts: float) -> tuple[np.ndarray, np.ndarray, int]:
    """Memoised `discrete_coefficients` (pure function of its arguments)."""
    key = (plant, float(ts))
    if key not in _COEF_CACHE:
        if len(_COEF_CACHE) > 64:
            _COEF_CACHE.clear()
        _COEF_CACHE[key] = discrete_coefficients(plant, ts)
    return _COEF_CACHE[key]


def _linear_loop(plant: DelayedTF, settings: PidSettings, sp: np.ndarray, load: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """The unsaturated loop as one difference equation (polynomials in z^-1, ascending).

    Plant y = z^-m B/A w; DiscretePid u = (Nr sp - Ny y)/Dc + bias with
    Dc = (1 - z^-1)(1 - ad z^-1), Nr = kp b Dc + ki_ts z^-1 (1 - ad z^-1),
    Ny = kp Dc + ki_ts z^-1 (1 - ad z^-1) + bd (1 - z^-1)^2; hence
    (A Dc + z^-m B Ny) y = z^-m B (Nr sp + Dc (load + bias)).
    """
    c = per_tick(settings.gains, settings.ts, settings.deriv_filter_n)
    b_p, a_p, m = _coefficients(plant, settings.ts)
    bz = np.concatenate([np.zeros(m), b_p])  # z^-m B
    one_m = np.array([1.0, -1.0])
    filt = np.array([1.0, -c["ad"]])
    dc = np.convolve(one_m, filt)
    integ = c["ki_ts"] * np.concatenate([[0.0], filt])
    nr = np.polyadd(c["kp"] * settings.setpoint_weight * dc[::-1], integ[::-1])[::-1]
    ny = np.polyadd(np.polyadd(c["kp"] * dc[::-1], integ[::-1]),
                    c["bd"] * np.convolve(one_m, one_m)[::-1])[::-1]
    den = np.polyadd(np.convolve(a_p, dc)[::-1], np.convolve(bz, ny)[::-1])[::-1]
    w = load + settings.bias
    with np.errstate(all="ignore"):
        y = scipy.signal.lfilter(np.convolve(bz, nr), den, sp) + \
            scipy.signal.lfilter(np.convolve(bz, dc), den, w)
        u = scipy.signal.lfilter(nr, dc, sp) - scipy.signal.lfilter(ny, dc, y) + settings.bias
    return y, u


def simulate_closed_loop(
    plant: DelayedTF,
    settings: PidSettings,
    t_end: float,
    setpoint_step: float,
    load_step: float = 0.0,
    load_time: float | None = None,
    max_ticks: int = 1_000_000,
    method: str = "auto",
    dead_zone: float = 0.0,
    operating_output: float = 0.0,
) -> ClosedLoopRun:
    """Simulate the sampled loop from rest for `t_end` seconds.

    setpoint_step: setpoint (PV units) from t = 0 on. load_step: added to the plant input
    (output units) from `load_time` on (None: from t = 0). The plant input is
    u + load (the controller's limits apply to u only). The plant must be strictly proper or
    have dead time (the PV read at a tick cannot depend on the output computed from it).
    method: "auto" (linear solution when the output never reaches its limits, else tick by
    tick), "ticks" (always tick by tick, the reference), "linear" (ignore the limits).
    dead_zone: the actuator's dead zone (output units, half-width; 0: none), as the mock
    device and the analysis model it: the plant sees dz(v) = 0 for |v| <= dead_zone, else
    v - sign(v) dead_zone, of the actuator command v = operating_output + u (u in deviation
    from the operating point, output units); the plant input is dz(v) - dz(operating_output)
    + load. A dead zone makes the loop nonlinear: it is simulated tick by tick.
    """
    if not (dead_zone >= 0.0 and np.isfinite(dead_zone)):
        raise ValueError(f"dead_zone must be a finite number >= 0, got {dead_zone!r}")
    ts = settings.ts
    n = int(round(t_end / ts)) + 1
    if n > max_ticks:
        raise ValueError(f"{n} ticks requested (t_end/ts), above max_ticks={max_ticks}")
    b_p, _, m = _coefficients(plant, ts)
    if m == 0 and abs(b_p[0]) > 1e-12 * max(1.0, float(np.max(np.abs(b_p)))):
        raise ValueError("plant has direct feedthrough and no dead time: sampled loop undefined")
    t = np.arange(n) * ts
    sp = np.full(n, float(setpoint_step))
    load = np.zeros(n)
    load[t >= (0.0 if load_time is None else load_time) - 1e-12 * ts] = load_step
    if method in ("auto", "linear") and dead_zone == 0.0:
        y, u = _linear_loop(plant, settings, sp, load)
        inside = bool(np.all((u >= settings.out_min) & (u <= settings.out_max)))
        if method == "linear" or inside:
            return ClosedLoopRun(t, y, u, sp, load)
    elif method not in ("ticks", "auto", "linear"):
        raise ValueError(f"unknown method {method!r}")
    b_p, a_p, m = _coefficients(plant, ts)
    bz = (np.concatenate([np.zeros(m), b_p]) / a_p[0]).tolist()  # y = (z^-m B / A) w
    az = (a_p[1:] / a_p[0]).tolist()
    # taps that are exactly zero (the whole-tick dead time) are skipped
    btaps = [(i, c) for i, c in enumerate(bz) if i > 0 and c != 0.0]  # bz[0] = 0 (checked)
    ataps = list(enumerate(az, start=1))
    yl = [0.0] * n
    ul = [0.0] * n
    wl = [0.0] * n  # plant input
    spl = sp.tolist()
    loadl = load.tolist()
    pid = DiscretePid(settings)
    dz0 = _dz(operating_output, dead_zone)
    for k in range(n):
        acc = 0.0
        for i, c in btaps:
            if i <= k:
                acc += c * wl[k - i]
        for i, c in ataps:
            if i <= k:
                acc -= c * yl[k - i]
        yl[k] = acc
        uk = pid.update(spl[k], acc)
        ul[k] = uk
        wl[k] = (uk if dead_zone == 0.0 else _dz(operating_output + uk, dead_zone) - dz0) \
            + loadl[k]
    return ClosedLoopRun(t, np.array(yl), np.array(ul), sp, load)


def _dz(v: float, width: float) -> float:
    """The continuous dead zone: 0 for |v| <= width, else v - sign(v) width."""
    if abs(v) <= width:
        return 0.0
    return v - width if v > 0 else v + width
