"""Discrete PID controller and gain-form conversions (pure; no clock, no I/O).

Units: gains are output units per PV unit; `ki` per second, `kd` in seconds (parallel form
u = kp e + ki ∫e dt + kd de/dt, e = sp - pv). Times in seconds. Sign convention: positive output
raises the PV (for a loop with a negative plant gain, negate all three gains).

The difference equations of `DiscretePid` are the project's one PID algorithm: host-loop runs and
the predictions use this class, and the simulated board's device-side PID mirrors the equations
written in its docstring.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace


@dataclass(frozen=True)
class PidGains:
    """Parallel-form gains: u = kp e + ki ∫e dt + kd de/dt.

    kp in output units per PV unit, ki in output units per (PV unit s), kd in output units s per
    PV unit.
    """

    kp: float
    ki: float = 0.0
    kd: float = 0.0

    def scaled(self, factor: float) -> PidGains:
        """All three gains multiplied by `factor` (detuning keeps Ti and Td)."""
        return PidGains(self.kp * factor, self.ki * factor, self.kd * factor)


def to_standard(g: PidGains) -> tuple[float, float, float]:
    """Standard (ISA) form (Kc, Ti, Td): u = Kc (e + 1/Ti ∫e dt + Td de/dt).

    Ti and Td in seconds; Ti = inf when ki = 0. Raises ValueError when kp = 0 (a controller
    without proportional action has no standard form).
    """
    if g.kp == 0.0:
        raise ValueError("standard form needs kp != 0")
    ti = math.inf if g.ki == 0.0 else g.kp / g.ki
    return g.kp, ti, g.kd / g.kp


def from_standard(kc: float, ti: float = math.inf, td: float = 0.0) -> PidGains:
    """Parallel gains from the standard form; `ti` = inf (or 0 meaning none is refused)."""
    if ti <= 0.0:
        raise ValueError("Ti must be > 0 (use inf for no integral action)")
    ki = 0.0 if math.isinf(ti) else kc / ti
    return PidGains(kc, ki, kc * td)


def from_series(kc: float, ti: float, td: float) -> PidGains:
    """Parallel gains from the series (interacting) form Kc (1 + 1/(Ti s)) (1 + Td s).

    Conversion: kp = Kc (1 + Td/Ti), ki = Kc/Ti, kd = Kc Td (Åström and Hägglund, "PID
    Controllers: Theory, Design and Tuning", 1995, sec. 3.2; from memory).
    """
    if ti <= 0.0:
        raise ValueError("Ti must be > 0")
    if math.isinf(ti):
        return PidGains(kc, 0.0, kc * td)
    return PidGains(kc * (1.0 + td / ti), kc / ti, kc * td)


def filter_time(g: PidGains, n: float) -> float:
    """Derivative filter time constant Tf = Td/N = kd/(kp N) in seconds (0 when kd = 0).

    With kp = 0 the filter has no Td to refer to; Tf is then 0 (unfiltered backward difference).
    """
    if g.kd == 0.0 or g.kp == 0.0 or math.isinf(n):
        return 0.0
    return abs(g.kd / (g.kp * n))


def per_tick(g: PidGains, ts: float, n: float = 10.0) -> dict[str, float]:
    """Per-tick coefficients of `DiscretePid` for a loop that runs every `ts` seconds.

    Returns {"kp": kp, "ki_ts": ki ts (integral increment per unit error per tick),
    "kd_ts": kd / ts, "tf": Tf, "ad": Tf/(Tf+ts) (derivative filter pole),
    "bd": kd/(Tf+ts) (derivative gain per unit PV change per tick), "ts": ts}.
    """
    if ts <= 0.0:
        raise ValueError("ts must be > 0")
    tf = filter_time(g, n)
    return {
        "kp": g.kp,
        "ki_ts": g.ki * ts,
        "kd_ts": g.kd / ts,
        "tf": tf,
        "ad": tf / (tf + ts),
        "bd": g.kd / (tf + ts),
        "ts": ts,
    }


@dataclass(frozen=True)
class PidSettings:
    """Everything `DiscretePid` needs.

    gains: parallel gains; ts: loop period (s); deriv_filter_n: N of the derivative filter
    Tf = Td/N; setpoint_weight: b (proportional term acts on b sp - pv); tracking_time: Tt (s) of
    back-calculation anti-windup, None for clamping (conditional integration); out_min/out_max:
    output limits (output units); bias: constant added to the output (output units).
    """

    gains: PidGains
    ts: float
    deriv_filter_n: float = 10.0
    setpoint_weight: float = 1.0
    tracking_time: float | None = None
    out_min: float = -math.inf
    out_max: float = math.inf
    bias: float = 0.0

    def __post_init__(self) -> None:
        if self.ts <= 0.0:
            raise ValueError("ts must be > 0")
        if self.out_min > self.out_max:
            raise ValueError("out_min above out_max")
        if self.tracking_time is not None and self.tracking_time <= 0.0:
            raise ValueError("tracking_time must be > 0 (or None for clamping)")
        if self.deriv_filter_n <= 0.0:
            raise ValueError("deriv_filter_n must be > 0")

    def with_gains(self, gains: PidGains) -> PidSettings:
        return replace(self, gains=gains)


class DiscretePid:
    """Discrete PID, one call of `update` per tick of period ts.

    Difference equations at tick k (sp[k], y[k] the setpoint and measurement read this tick;
    coefficients from `per_tick`: ki_ts = ki ts, Tf = kd/(kp N), ad = Tf/(Tf+ts),
    bd = kd/(Tf+ts)):

        P[k] = kp (b sp[k] - y[k])                        proportional, setpoint weight b
        D[k] = ad D[k-1] - bd (y[k] - y[k-1])             derivative on measurement, filtered
                                                          (backward difference of
                                                          -kd s/(1 + Tf s) y)
        v[k] = P[k] + I[k] + D[k] + bias                  unsaturated output
        u[k] = min(max(v[k], out_min), out_max)           applied output (returned)
        e[k] = sp[k] - y[k]
        anti-windup, back-calculation (Tt given):
            I[k+1] = I[k] + ki_ts e[k] + (ts/Tt) (u[k] - v[k])
        anti-windup, clamping (Tt None): the integrator holds when the output is saturated
        and this tick's increment would drive it further into saturation:
            I[k+1] = I[k]               if (v[k] > out_max and ki_ts e[k] > 0) or
                                           (v[k] < out_min and ki_ts e[k] < 0)
            I[k+1] = I[k] + ki_ts e[k]  otherwise

    Initial state (first tick after construction or `reset`): I = `integral` (default 0),
    D = 0, y[-1] = y[0] (no derivative kick on the first sample). The integral is forward
    Euler: the error of tick k first acts on the output of tick k+1.
    """

    def __init__(self, settings: PidSettings) -> None:
        self.settings = settings
        self._c = per_tick(settings.gains, settings.ts, settings.deriv_filter_n)
        self.integral = 0.0
        self.derivative = 0.0
        self._y_prev: float | None = None
        self.saturated = False

    def reset(self, integral: float = 0.0, pv: float | None = None) -> None:
        """Restart: integral state `integral` (output units), derivative state 0, previous PV
        `pv` (None: taken from the next sample)."""
        self.integral = float(integral)
        self.derivative = 0.0
        self._y_prev = pv
        self.saturated = False

    def update(self, sp: float, pv: float) -> float:
        """One tick: setpoint and measurement (PV units) in, applied output (output units) out."""
        s = self.settings
        c = self._c
        y_prev = pv if self._y_prev is None else self._y_prev
        p = c["kp"] * (s.setpoint_weight * sp - pv)
        self.derivative = c["ad"] * self.derivative - c["bd"] * (pv - y_prev)
        v = p + self.integral + self.derivative + s.bias
        u = min(max(v, s.out_min), s.out_max)
        inc = c["ki_ts"] * (sp - pv)
        if s.tracking_time is not None:
            self.integral += inc + (s.ts / s.tracking_time) * (u - v)
        elif not ((v > s.out_max and inc > 0.0) or (v < s.out_min and inc < 0.0)):
            self.integral += inc
        self._y_prev = pv
        self.saturated = u != v
        return u
