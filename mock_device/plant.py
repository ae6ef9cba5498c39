"""Simulated plant: rational transfer function plus dead time, actuator and sensor.

Pure module (numpy/scipy only, no I/O, no clock): the mock device uses it, and tests use it
to produce simulated data.

Conventions
- Input ``u`` is in output units (e.g. percent duty), output ``y`` in PV units.
- ``num``/``den`` are polynomial coefficients in s, highest power first (as scipy.signal).
- The input is held constant between calls (zero-order hold); the dead time shifts the held
  input exactly: every input change is queued and reaches the plant ``delay`` seconds later.
- Integration is exact for piecewise-constant input (matrix exponential of the augmented
  system), in equal sub-steps no longer than ``max_step`` between input changes (the composed
  map of each segment length is cached); an integrating plant (den ending in 0) is handled the
  same way, since the augmented exponential needs no inverse of A.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Sequence

import numpy as np

__all__ = ["Actuator", "LtiPlant", "Sensor", "SimulatedAxis"]

_EPS_T = 1e-12  # seconds: segments shorter than this are treated as empty


def _controllable_form(
    num: np.ndarray, den: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    """State-space (A, B, C, D) of num/den in controllable canonical form (as scipy's tf2ss).

    Built here rather than with scipy.signal so that the device process starts quickly.
    """
    n = den.size - 1
    a = den / den[0]
    b = np.concatenate([np.zeros(n + 1 - num.size), num]) / den[0]
    d = float(b[0])
    amat = np.zeros((n, n))
    amat[0, :] = -a[1:]
    if n > 1:
        amat[1:, :-1] = np.eye(n - 1)
    bmat = np.zeros((n, 1))
    bmat[0, 0] = 1.0
    cmat = (b[1:] - d * a[1:]).reshape(1, -1)
    return amat, bmat, cmat, d


class LtiPlant:
    """Exact zero-order-hold simulation of ``num(s)/den(s) * exp(-delay*s)``.

    Args:
        num: numerator coefficients, highest power of s first.
        den: denominator coefficients, highest power of s first; ``den[0] != 0``,
            ``len(num) <= len(den)`` (proper).
        delay: dead time in seconds (>= 0).
        max_step: longest internal integration step in seconds (the device uses a tenth
            of its tick or less).

    The plant starts at rest (zero state, zero input for all past time).
    """

    def __init__(
        self,
        num: Sequence[float],
        den: Sequence[float],
        delay: float = 0.0,
        *,
        max_step: float = 1e-3,
    ) -> None:
        num_a = np.atleast_1d(np.asarray(num, dtype=float))
        den_a = np.atleast_1d(np.asarray(den, dtype=float))
        den_a = np.trim_zeros(den_a, "f")
        num_a = np.trim_zeros(num_a, "f")
        if den_a.size == 0:
            raise ValueError("den must have a non-zero coefficient")
        if num_a.size == 0:
            num_a = np.zeros(1)
        if num_a.size > den_a.size:
            raise ValueError("transfer function must be proper: len(num) <= len(den)")
        if not (delay >= 0.0 and math.isfinite(delay)):
            raise ValueError(f"delay must be a finite number >= 0, got {delay!r}")
        if not (max_step > 0.0 and math.isfinite(max_step)):
            raise ValueError(f"max_step must be > 0, got {max_step!r}")
        self.num = num_a
        self.den = den_a
        self.delay = float(delay)
        self.max_step = float(max_step)
        self.order = den_a.size - 1
        if self.order == 0:
            # static gain: y = (num/den) u
            self._a = np.zeros((0, 0))
            self._b = np.zeros((0, 1))
            self._c = np.zeros((1, 0))
            self._d = float(num_a[-1] / den_a[0])
        else:
            self._a, self._b, self._c, self._d = _controllable_form(num_a, den_a)
        self._b_vec = self._b[:, 0]
        self._c_vec = self._c[0, :]
        self._cache: dict[float, tuple[np.ndarray, np.ndarray]] = {}
        self.reset()

    # ------------------------------------------------------------------ state
    def reset(self) -> None:
        """Back to rest at t = 0: zero state, zero input history."""
        self._x = np.zeros(self.order)
        self._t = 0.0
        self._u_now = 0.0  # input currently acting at the plant (after the dead time)
        self._last_cmd = 0.0  # last commanded (undelayed) input
        self._pending: deque[tuple[float, float]] = deque()  # (time it arrives, value)

    @property
    def t(self) -> float:
        """Simulated time in seconds since the last reset."""
        return self._t

    @property
    def y(self) -> float:
        """Plant output now (PV units, noise-free)."""
        return float(self._c_vec @ self._x + self._d * self._u_now) if self.order else (
            self._d * self._u_now
        )

    @property
    def state(self) -> np.ndarray:
        """Copy of the state vector (controllable canonical form, as scipy.signal.tf2ss)."""
        return self._x.copy()

    @property
    def input_now(self) -> float:
        """Input currently acting at the plant, i.e. the command from ``delay`` s ago."""
        return self._u_now

    def set_state(self, x: Sequence[float]) -> None:
        """Overwrite the state vector (used to start from a non-rest condition)."""
        xa = np.asarray(x, dtype=float).reshape(-1)
        if xa.size != self.order:
            raise ValueError(f"state must have {self.order} elements")
        self._x = xa.copy()

    # ------------------------------------------------------------ simulation
    def _discrete(self, span: float) -> tuple[np.ndarray, np.ndarray]:
        """(Ad, Bd) over ``span`` s as the composition of equal sub-steps <= max_step, cached.

        Each sub-step is the exact ZOH discretisation exp([[A, B], [0, 0]] h); composing them
        gives the same map as stepping one by one (to rounding), at the cost of one product.
        """
        key = round(span, 13)
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        n = self.order
        steps = max(1, math.ceil(span / self.max_step - 1e-9))
        h = span / steps
        m = np.zeros((n + 1, n + 1))
        m[:n, :n] = self._a * h
        m[:n, n] = self._b_vec * h
        e = expm(m)
        ad_h = e[:n, :n]
        bd_h = e[:n, n]
        ad = np.eye(n)
        bd = np.zeros(n)
        for _ in range(steps):
            ad = ad_h @ ad
            bd = ad_h @ bd + bd_h
        if len(self._cache) > 256:
            self._cache.clear()
        self._cache[key] = (ad, bd)
        return ad, bd

    def _integrate(self, span: float, u: float) -> None:
        """Integrate the state over ``span`` seconds with constant input ``u``."""
        if self.order == 0 or span <= _EPS_T:
            return
        ad, bd = self._discrete(span)
        self._x = ad @ self._x + bd * u

    def advance(self, u: float, dt: float) -> None:
        """Hold input ``u`` (output units) for ``dt`` seconds; the plant sees it ``delay`` later."""
        if dt < 0.0:
            raise ValueError("dt must be >= 0")
        u = float(u)
        if u != self._last_cmd:
            self._last_cmd = u
            if self.delay <= 0.0:
                self._pending.append((self._t, u))
            else:
                self._pending.append((self._t + self.delay, u))
        t_end = self._t + dt
        t = self._t
        while True:
            # apply every change due now
            while self._pending and self._pending[0][0] <= t + _EPS_T:
                self._u_now = self._pending.popleft()[1]
            nxt = self._pending[0][0] if self._pending else math.inf
            seg_end = min(nxt, t_end)
            self._integrate(seg_end - t, self._u_now)
            t = seg_end
            if t >= t_end - _EPS_T:
                break
        self._t = t_end
        while self._pending and self._pending[0][0] <= self._t + _EPS_T:
            self._u_now = self._pending.popleft()[1]

    def simulate(self, u: Sequence[float], dt: float) -> np.ndarray:
        """Sampled response to a sequence of held inputs, like a device ticking every ``dt``.

        Returns ``y[k]`` = output at ``t_k = t0 + k*dt`` *before* ``u[k]`` is applied
        (sample, then hold), for k = 0..len(u)-1. Advances the plant.
        """
        out = np.empty(len(u))
        for k, uk in enumerate(u):
            out[k] = self.y
            self.advance(float(uk), dt)
        return out

    def dc_gain(self) -> float:
        """Static gain (PV units per output unit); inf for an integrating plant."""
        if self.den[-1] == 0.0:
            return math.inf
        return float(self.num[-1] / self.den[-1])


class Actuator:
    """Actuator: saturation at +/- ``limit`` and a dead zone of half-width ``deadband``.

    Output units throughout. ``saturate`` is the drive the device actually applies (what it
    reports); ``apply`` is the effective plant input: zero while ``|u| <= deadband`` (static
    friction), else ``u - sign(u)*deadband`` (continuous dead zone).
    """

    def __init__(self, limit: float = 100.0, deadband: float = 0.0) -> None:
        if not limit > 0.0:
            raise ValueError("actuator limit must be > 0")
        if deadband < 0.0:
            raise ValueError("deadband must be >= 0")
        self.limit = float(limit)
        self.deadband = float(deadband)

    def saturate(self, u: float) -> float:
        """Clip ``u`` to [-limit, +limit]."""
        return min(self.limit, max(-self.limit, float(u)))

    def apply(self, u: float) -> float:
        """Effective plant input for command ``u`` after saturation and dead zone."""
        us = self.saturate(u)
        if abs(us) <= self.deadband:
            return 0.0
        return us - math.copysign(self.deadband, us)


class Sensor:
    """Sensor: offset, additive Gaussian noise (std ``noise``), quantisation to ``resolution``.

    PV units throughout. ``rng`` is a numpy Generator (seeded by the caller for reproducible
    runs); None means ``numpy.random.default_rng(0)``.
    """

    def __init__(
        self,
        noise: float = 0.0,
        resolution: float = 0.0,
        offset: float = 0.0,
        rng: np.random.Generator | None = None,
    ) -> None:
        if noise < 0.0 or resolution < 0.0:
            raise ValueError("noise and resolution must be >= 0")
        self.noise = float(noise)
        self.resolution = float(resolution)
        self.offset = float(offset)
        self.rng = rng if rng is not None else np.random.default_rng(0)

    def read(self, y: float) -> float:
        """Measured PV for true plant output ``y``."""
        v = float(y) + self.offset
        if self.noise > 0.0:
            v += self.noise * float(self.rng.standard_normal())
        if self.resolution > 0.0:
            v = round(v / self.resolution) * self.resolution
        return v


class SimulatedAxis:
    """One axis of the board: actuator -> (load added) -> plant -> sensor.

    ``load`` is a constant disturbance in output units added at the plant input after the
    actuator (e.g. gravity on an arm), so it acts even while the drive is zero.
    """

    def __init__(
        self, plant: LtiPlant, actuator: Actuator, sensor: Sensor, load: float = 0.0
    ) -> None:
        self.plant = plant
        self.actuator = actuator
        self.sensor = sensor
        self.load = float(load)

    def read(self) -> float:
        """Measured PV now (PV units)."""
        return self.sensor.read(self.plant.y)

    def drive(self, u: float, dt: float) -> float:
        """Hold command ``u`` for ``dt`` s; returns the saturated drive actually applied."""
        applied = self.actuator.saturate(u)
        self.plant.advance(self.actuator.apply(applied) + self.load, dt)
        return applied


def expm(m: np.ndarray) -> np.ndarray:
    """The matrix exponential by scaling and squaring with a Taylor series (the plant's states
    are few; numpy only, so the simulated board starts without loading scipy): m is scaled by
    2^-s until its norm is at most 0.5, the series summed to double precision, and the result
    squared s times."""
    m = np.asarray(m, dtype=float)
    norm = float(np.max(np.sum(np.abs(m), axis=1))) if m.size else 0.0
    s = max(0, int(np.ceil(np.log2(norm / 0.5)))) if norm > 0.5 else 0
    a = m / (2.0 ** s)
    term = np.eye(m.shape[0])
    out = term.copy()
    for k in range(1, 30):
        term = term @ a / k
        out = out + term
        if float(np.max(np.abs(term))) <= 1e-18 * float(np.max(np.abs(out))):
            break
    for _ in range(s):
        out = out @ out
    return out
