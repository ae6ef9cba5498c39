"""A loop on top of two closed wheel loops (the heading of a two-wheel drive base); pure.

Geometry and signs. Wheel speeds ω_L, ω_R in rad/s (positive: the wheel drives the base
forward), wheel radius r (m), track width W (m, between the wheels' contact points). The
heading θ (rad, positive counter-clockwise seen from above: the right wheel faster turns the
base left) changes at dθ/dt = (ω_R − ω_L) r / W (differential steering kinematics, analytic).

The outer loop's output is a differential wheel-speed setpoint u (rad/s): the left wheel's
setpoint is base − u, the right one's base + u. Each wheel runs its board-side PID; T_L(s),
T_R(s) are the wheels' closed loops from setpoint to speed. Then

    θ(s) = (r/W) [ (T_R(s) − T_L(s)) base + (T_R(s) + T_L(s)) u(s) ] / s

and with base = 0 (the turn on the spot the experiment uses) the outer plant is

    P(s) = (r/W) (T_R(s) + T_L(s)) / s        (rad per rad/s of differential setpoint)

an integrating plant. Its gain at low frequency is 2 r / W per second (T(0) = 1 with integral
action in the wheel loops).

Inner closed loop as a `DelayedTF`. The wheel's model G = num/den e^{−L s} with the board's PID
(parallel form, derivative on the measurement through the filter Tf = kd/(kp N), proportional
on b·sp − pv; `autotune.core.pid`) sampled every ts seconds: the loop's dead time L and the
hold's ts/2 (the usual continuous stand-in for the zero-order hold, as `autotune.core.robust`
counts it) are replaced by a Padé approximant (`robust.pade`) so the closed loop is rational:

    T = C_r G / (1 + C_y G),  C_r = (b kp s + ki)/s,  C_y = kp + ki/s + kd s/(Tf s + 1)

Separation of the loops. The outer loop should be at least about 4 times slower than the inner
ones (common practice, no source): `separation` compares the inner closed loops' bandwidth
(the lowest −3 dB frequency of T_L, T_R) with the outer loop's gain crossover frequency.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core.lti import DelayedTF
from autotune.core.pid import PidGains
from autotune.core.robust import loop_margins, pade

SEPARATION_RATIO = 4.0
"""The outer loop's gain crossover at most 1/4 of the inner loops' bandwidth (common practice,
no source)."""

INNER_PADE_ORDER = 3
"""Padé order of the inner loop's dead time (L + ts/2) in the rational closed loop."""


@dataclass(frozen=True)
class DriveGeometry:
    """The drive base's wheel radius r (m) and track width W (m), both > 0."""

    wheel_radius: float
    track_width: float

    def __post_init__(self) -> None:
        for name in ("wheel_radius", "track_width"):
            v = getattr(self, name)
            if not (isinstance(v, int | float) and math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a finite number > 0 (m), got {v!r}")

    @property
    def rate_gain(self) -> float:
        """r / W: heading rate (rad/s) per rad/s of wheel-speed difference ω_R − ω_L."""
        return self.wheel_radius / self.track_width


def heading_step(theta: float, omega_left: float, omega_right: float,
                 geometry: DriveGeometry, dt: float) -> float:
    """θ[k+1] = θ[k] + (ω_R − ω_L) r/W Δt (rad; speeds rad/s, dt s; forward Euler)."""
    return theta + (omega_right - omega_left) * geometry.rate_gain * dt


def integrate_heading(t: np.ndarray, omega_left: np.ndarray, omega_right: np.ndarray,
                      geometry: DriveGeometry, theta0: float = 0.0) -> np.ndarray:
    """The heading (rad) at the sample times t (s) from the wheel speeds there (rad/s):
    θ[0] = theta0, θ[k+1] = θ[k] + (ω_R[k] − ω_L[k]) r/W (t[k+1] − t[k]) (`heading_step`
    on every sample)."""
    t = np.asarray(t, dtype=float)
    diff = np.asarray(omega_right, dtype=float) - np.asarray(omega_left, dtype=float)
    if t.shape != diff.shape:
        raise ValueError("t, omega_left and omega_right must have the same length")
    theta = np.empty_like(t)
    if t.size == 0:
        return theta
    theta[0] = theta0
    theta[1:] = theta0 + np.cumsum(diff[:-1] * np.diff(t)) * geometry.rate_gain
    return theta


def inner_closed_loop(model: DelayedTF, gains: PidGains, ts: float, n: float = 10.0,
                      setpoint_weight: float = 1.0, pade_order: int = INNER_PADE_ORDER
                      ) -> DelayedTF:
    """T(s): the wheel's closed loop from setpoint to speed, rational (see the module
    docstring); model: the wheel's identified plant (output units -> PV units, positive gain);
    gains: its board-side PID; ts: the board's tick (s; its hold counted as ts/2 of dead time);
    n: derivative filter N; setpoint_weight: b."""
    if ts <= 0:
        raise ValueError(f"ts must be > 0, got {ts!r}")
    delay = model.delay + 0.5 * ts
    pn, pd = pade(delay, pade_order)
    gn = np.polymul(model.num, pn)
    gd = np.polymul(model.den, pd)
    kp, ki, kd = gains.kp, gains.ki, gains.kd
    tf = kd / (kp * n) if kd != 0.0 and kp != 0.0 else 0.0
    filt = np.array([tf, 1.0]) if tf > 0 else np.array([1.0])
    nr = np.polymul([setpoint_weight * kp, ki], filt)
    ny = np.polyadd(np.polymul([kp, ki], filt), [kd, 0.0, 0.0]) if kd != 0.0 else \
        np.array([kp, ki])
    cd = np.polymul([1.0, 0.0], filt)  # s (Tf s + 1)
    num = np.polymul(nr, gn)
    den = np.polyadd(np.polymul(cd, gd), np.polymul(ny, gn))
    scale = den[0]
    return DelayedTF(tuple(num / scale), tuple(den / scale), 0.0)


def outer_plant(left: DelayedTF, right: DelayedTF, geometry: DriveGeometry,
                delay: float = 0.0) -> DelayedTF:
    """P(s) = (r/W) (T_R + T_L) / s e^{−delay s}: heading (rad) per rad/s of differential
    setpoint, from the two rational inner closed loops (`inner_closed_loop`); delay: any dead
    time of the outer loop's own (s, e.g. the host's latency; the outer hold is the design's)."""
    if left.delay or right.delay:
        raise ValueError("the inner closed loops must be rational (no dead time)")
    num = np.polyadd(np.polymul(left.num, right.den), np.polymul(right.num, left.den))
    den = np.polymul(np.polymul(left.den, right.den), [1.0, 0.0])
    return DelayedTF(tuple(geometry.rate_gain * num), tuple(den), delay)


def outer_ultimate(plant: DelayedTF, ts: float | None = None) -> tuple[float, float] | None:
    """Ultimate gain Ku (rad/s of differential setpoint per rad of heading) and period Tu (s)
    of the outer plant under a relay on the host: the plant with the host hold's ts/2 of dead
    time added (None: continuous); None when the phase never reaches −180 degrees."""
    extra = 0.0 if ts is None else 0.5 * ts
    return DelayedTF(plant.num, plant.den, plant.delay + extra).ultimate_point()


def bandwidth(closed_loop: DelayedTF, w_max: float = 1e4) -> float:
    """The lowest angular frequency (rad/s) where |T(jw)| falls 3 dB below |T(0)|; inf when it
    never does up to w_max."""
    t0 = abs(complex(closed_loop.freq_response(0.0)))
    level = t0 / math.sqrt(2.0)
    grid = np.logspace(-4, math.log10(w_max), 4000)
    mag = np.abs(closed_loop.freq_response(grid))
    below = np.nonzero(mag < level)[0]
    if below.size == 0:
        return math.inf
    i = int(below[0])
    if i == 0:
        return float(grid[0])
    return float(scipy.optimize.brentq(
        lambda w: abs(complex(closed_loop.freq_response(w))) - level, grid[i - 1], grid[i],
        xtol=1e-12))


def gain_crossover(plant: DelayedTF, gains: PidGains, n: float = 10.0,
                   ts: float | None = None) -> float | None:
    """The outer loop's gain crossover frequency (rad/s) with `gains` on `plant` (the hold
    and discrete PID of period ts, `robust.loop_margins`); None when |L| never falls through 1."""
    w = loop_margins(plant, gains, n, ts).w_gc
    return float(w) if math.isfinite(w) else None


@dataclass(frozen=True)
class Separation:
    """How much slower the outer loop is than the inner ones.

    inner_bandwidth: the lowest −3 dB frequency of the inner closed loops (rad/s);
    outer_frequency: the outer loop's gain crossover (rad/s); ratio: inner / outer; ok: ratio
    >= required (SEPARATION_RATIO unless told); warning: a sentence when not ok, else ""."""

    inner_bandwidth: float
    outer_frequency: float
    ratio: float
    required: float
    ok: bool
    warning: str

    def as_dict(self) -> dict[str, object]:
        return {"inner_bandwidth": self.inner_bandwidth, "outer_frequency": self.outer_frequency,
                "ratio": self.ratio, "required": self.required, "ok": self.ok,
                "warning": self.warning or None}


def separation(inner_loops: Sequence[DelayedTF], outer_frequency: float,
               required: float = SEPARATION_RATIO) -> Separation:
    """Compare the outer loop's frequency (rad/s, its gain crossover) with the slowest inner
    closed loop's bandwidth (`bandwidth`); warns when the outer loop is less than `required`
    times slower (see SEPARATION_RATIO)."""
    if not inner_loops:
        raise ValueError("separation needs at least one inner loop")
    inner = min(bandwidth(t) for t in inner_loops)
    ratio = inner / outer_frequency if outer_frequency > 0 else math.inf
    ok = ratio >= required
    warning = "" if ok else (
        f"the outer loop is only {ratio:.1f} times slower than the inner loops (crossover "
        f"{outer_frequency:.3g} rad/s against their bandwidth {inner:.3g} rad/s; at least "
        f"{required:g} times is the usual practice): the loops will interact, expect a "
        "response unlike the prediction; choose gentler outer gains or faster inner loops")
    return Separation(inner, outer_frequency, ratio, required, ok, warning)


def hold_delay(ts: float | None) -> float:
    """The continuous stand-in of a zero-order hold of period ts: ts/2 of dead time (s)."""
    return 0.0 if ts is None else 0.5 * ts


__all__ = ["SEPARATION_RATIO", "DriveGeometry", "Separation", "bandwidth", "gain_crossover",
           "heading_step", "hold_delay", "inner_closed_loop",
           "integrate_heading", "outer_plant", "outer_ultimate", "separation"]
