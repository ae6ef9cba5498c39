"""Rational transfer functions with dead time: the one model representation of the pure core.

A `DelayedTF` is G(s) = num(s) / den(s) * exp(-delay * s), coefficients highest power of s first
(as scipy.signal). Input in output units, output in PV units, time in seconds.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)


@dataclass(frozen=True)
class DelayedTF:
    """G(s) = num(s)/den(s) * exp(-delay s); `delay` in seconds, gain in PV units per output unit."""

    num: tuple[float, ...]
    den: tuple[float, ...]
    delay: float = 0.0

    def __post_init__(self) -> None:
        num = tuple(float(c) for c in np.trim_zeros(np.atleast_1d(self.num), "f")) or (0.0,)
        den = tuple(float(c) for c in np.trim_zeros(np.atleast_1d(self.den), "f"))
        if not den:
            raise ValueError("denominator is all zeros")
        if len(num) > len(den):
            raise ValueError("improper transfer function (numerator order above denominator)")
        if self.delay < 0:
            raise ValueError("dead time must be >= 0")
        object.__setattr__(self, "num", num)
        object.__setattr__(self, "den", den)
        object.__setattr__(self, "delay", float(self.delay))

    # ------------------------------------------------------------------ properties
    @property
    def integrators(self) -> int:
        """Number of poles at s = 0."""
        den = np.array(self.den)
        n = 0
        while n < len(den) and den[len(den) - 1 - n] == 0.0:
            n += 1
        return n

    @property
    def is_integrating(self) -> bool:
        return self.integrators > 0

    @property
    def static_gain(self) -> float:
        """G(0) in PV units per output unit; inf for an integrating plant."""
        if self.is_integrating:
            return float("inf")
        return self.num[-1] / self.den[-1]

    @property
    def velocity_gain(self) -> float:
        """lim s->0 s G(s) for a plant with one integrator (PV units per output unit per second)."""
        if self.integrators != 1:
            raise ValueError("velocity gain is defined for exactly one integrator")
        return self.num[-1] / self.den[-2]

    # ------------------------------------------------------------------ frequency domain
    def freq_response(self, w: np.ndarray | float) -> np.ndarray:
        """Complex G(j w) for angular frequencies w (rad/s), dead time applied exactly."""
        w = np.asarray(w, dtype=float)
        s = 1j * w
        return np.polyval(self.num, s) / np.polyval(self.den, s) * np.exp(-self.delay * s)

    def phase(self, w: np.ndarray | float) -> np.ndarray:
        """Continuous (unwrapped along w) phase of G(j w) in radians, dead time included."""
        w = np.asarray(w, dtype=float)
        s = 1j * np.atleast_1d(w)
        ph = np.zeros(s.shape)
        for z in np.roots(self.num) if len(self.num) > 1 else []:
            ph += np.angle(s - z)
        for p in np.roots(self.den) if len(self.den) > 1 else []:
            ph -= np.angle(s - p)
        ph += np.angle(self.num[0] / self.den[0]) - self.delay * np.atleast_1d(w)
        ph -= self._phase_branch_offset
        return ph.reshape(w.shape) if w.shape else ph[0]

    @cached_property
    def _phase_branch_offset(self) -> float:
        """Multiple of 2 pi that puts the low-frequency phase on its principal branch."""
        num_low = [c for c in self.num if c != 0.0][-1]
        den_low = [c for c in self.den if c != 0.0][-1]
        num_origin = len(self.num) - 1 - max(i for i, c in enumerate(self.num) if c != 0.0)
        expected = np.angle(num_low / den_low) + (num_origin - self.integrators) * np.pi / 2
        w0 = 1e-9
        s0 = 1j * w0
        raw = np.angle(self.num[0] / self.den[0])
        for z in np.roots(self.num) if len(self.num) > 1 else []:
            raw += np.angle(s0 - z)
        for p in np.roots(self.den) if len(self.den) > 1 else []:
            raw -= np.angle(s0 - p)
        return float(2 * np.pi * np.round((raw - expected) / (2 * np.pi)))

    def phase_crossover(self, phase: float = -np.pi, w_max: float = 1e4) -> float | None:
        """Lowest angular frequency (rad/s) where the phase reaches `phase` (radians), or None."""
        grid = np.logspace(-5, np.log10(w_max), 4000)
        ph = self.phase(grid) - phase
        idx = np.nonzero(np.diff(np.sign(ph)) < 0)[0]
        if idx.size == 0:
            return None
        i = int(idx[0])
        return float(scipy.optimize.brentq(lambda w: float(self.phase(w)) - phase, grid[i], grid[i + 1],
                                     xtol=1e-14, rtol=1e-13))

    def ultimate_point(self) -> tuple[float, float] | None:
        """Ultimate gain Ku (output units per PV unit) and period Tu (s) at phase -180 degrees.

        Returns None when the phase never reaches -180 degrees (no finite ultimate gain).
        """
        w180 = self.phase_crossover(-np.pi)
        if w180 is None:
            return None
        return 1.0 / float(abs(self.freq_response(w180))), 2.0 * np.pi / w180

    # ------------------------------------------------------------------ time domain
    @cached_property
    def _ss(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        a, b, c, d = scipy.signal.tf2ss(self.num, self.den)
        return a, b, c, d

    def simulate_zoh(self, u: np.ndarray, dt: float, x0: np.ndarray | None = None) -> np.ndarray:
        """Exact response at t = k dt to an input held constant over each [k dt, (k+1) dt).

        `u[k]` is applied (before the dead time) over the k-th interval; returns y[k] = y(k dt),
        starting from rest (or state `x0` with all past inputs zero). The dead time is handled
        exactly, including a fractional part of dt, by splitting each interval.
        """
        u = np.asarray(u, dtype=float)
        n = u.size
        a, b, c, d = self._ss
        order = a.shape[0]
        m, frac = divmod(self.delay, dt)
        m = int(m)
        if frac > dt * (1 - 1e-9):
            m, frac = m + 1, 0.0
        # Delayed input over [k dt, (k+1) dt): u[k-m-1] for the first `frac`, then u[k-m].
        padded = np.concatenate([np.zeros(m + 1), u])
        u_late = padded[1 : n + 1]  # u[k-m]
        u_early = padded[:n]  # u[k-m-1]
        if order == 0:
            return (d[0, 0] * u_late).astype(float) if frac == 0 else d[0, 0] * u_late
        phi1, gam1 = _zoh(a, b, frac) if frac > 0 else (np.eye(order), np.zeros((order, 1)))
        phi2, gam2 = _zoh(a, b, dt - frac)
        x = np.zeros(order) if x0 is None else np.asarray(x0, dtype=float)
        y = np.empty(n)
        cc = c[0]
        g1, g2 = gam1[:, 0], gam2[:, 0]
        for k in range(n):
            y[k] = cc @ x + d[0, 0] * (u_early[k] if frac > 0 else u_late[k])
            x = phi2 @ (phi1 @ x + g1 * u_early[k]) + g2 * u_late[k]
        return y


def _zoh(a: np.ndarray, b: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Matrix-exponential ZOH discretisation over h seconds: (Phi, Gamma)."""
    n = a.shape[0]
    block = np.zeros((n + 1, n + 1))
    block[:n, :n] = a * h
    block[:n, n:] = b * h
    e = scipy.linalg.expm(block)
    return e[:n, :n], e[:n, n:]


def fopdt(gain: float, time_constant: float, delay: float) -> DelayedTF:
    """K exp(-L s) / (T s + 1): gain K (PV/output), T and L in seconds."""
    return DelayedTF((gain,), (time_constant, 1.0), delay)


def sopdt(gain: float, t1: float, t2: float, delay: float) -> DelayedTF:
    """K exp(-L s) / ((T1 s + 1)(T2 s + 1)); times in seconds."""
    return DelayedTF((gain,), tuple(np.polymul([t1, 1.0], [t2, 1.0])), delay)


def integrator_lag(velocity_gain: float, time_constant: float, delay: float) -> DelayedTF:
    """Kv exp(-L s) / (s (T s + 1)): integrator plus lag plus dead time; Kv in PV/(output s)."""
    return DelayedTF((velocity_gain,), (time_constant, 1.0, 0.0), delay)
