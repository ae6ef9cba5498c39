"""Published PID tuning rules (pure). Gains in the parallel form of `autotune.pid.PidGains`.

Ku in output units per PV unit, Tu in seconds; model gains K in PV units per output unit,
velocity gains Kv in PV units per (output unit s), times in seconds. Table values are quoted
from memory of the cited papers (and of their reproduction in Åström and Hägglund, "Advanced
PID Control", ISA 2006); the tests check them with worked examples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from autotune.lti import DelayedTF
from autotune.pid import PidGains, from_series, from_standard

# ---------------------------------------------------------------- from Ku, Tu


def zn_p(ku: float, tu: float) -> PidGains:
    """Ziegler and Nichols (1942), frequency-response method, P: Kc = 0.5 Ku."""
    return from_standard(0.5 * ku)


def zn_pi(ku: float, tu: float) -> PidGains:
    """Ziegler and Nichols (1942), PI: Kc = 0.45 Ku, Ti = Tu / 1.2."""
    return from_standard(0.45 * ku, tu / 1.2)


def zn_pid(ku: float, tu: float) -> PidGains:
    """Ziegler and Nichols (1942), PID: Kc = 0.6 Ku, Ti = Tu / 2, Td = Tu / 8."""
    return from_standard(0.6 * ku, tu / 2.0, tu / 8.0)


def tl_pi(ku: float, tu: float) -> PidGains:
    """Tyreus and Luyben (1992), PI: Kc = Ku / 3.2, Ti = 2.2 Tu."""
    return from_standard(ku / 3.2, 2.2 * tu)


def tl_pid(ku: float, tu: float) -> PidGains:
    """Tyreus and Luyben (1992), PID: Kc = Ku / 2.2, Ti = 2.2 Tu, Td = Tu / 6.3."""
    return from_standard(ku / 2.2, 2.2 * tu, tu / 6.3)


def ah_phase_margin(ku: float, tu: float, phase_margin_deg: float = 45.0,
                    alpha: float = 4.0) -> PidGains:
    """Åström and Hägglund (1984, Automatica 20), phase-margin design from the ultimate point.

    The controller moves the ultimate point G(j wu) = -1/Ku to exp(j(pi + phi_m)) on the unit
    circle: Kc = Ku cos(phi_m), and wu Td - 1/(wu Ti) = tan(phi_m) with Ti = alpha Td, so
    wu Td = (tan(phi_m) + sqrt(tan(phi_m)^2 + 4/alpha)) / 2.
    """
    phi = math.radians(phase_margin_deg)
    wu = 2.0 * math.pi / tu
    tan = math.tan(phi)
    td = (tan + math.sqrt(tan * tan + 4.0 / alpha)) / (2.0 * wu)
    return from_standard(ku * math.cos(phi), alpha * td, td)


# ---------------------------------------------------------------- model parameters


@dataclass(frozen=True)
class LowOrderModel:
    """A recognised low-order model: kind "fopdt" (gain, t1, delay), "sopdt" (gain, t1 >= t2,
    delay) or "integrator_lag" (gain = Kv, t1 = lag, delay)."""

    kind: str
    gain: float
    t1: float
    t2: float
    delay: float


def recognise(model: DelayedTF) -> LowOrderModel | None:
    """Read a FOPDT, SOPDT (real poles) or integrator+lag+dead time off a DelayedTF; None if
    the model is none of these (a constant numerator is required)."""
    if len(model.num) != 1:
        return None
    i = model.integrators
    low = model.den[-1 - i]
    if low == 0.0:
        return None
    den = np.array(model.den[: len(model.den) - i]) / low
    b = model.num[0] / low
    order = len(den) - 1
    if i == 0:
        if order == 1 and den[0] > 0:
            return LowOrderModel("fopdt", b, float(den[0]), 0.0, model.delay)
        if order == 2 and den[0] > 0 and den[1] > 0:
            roots = np.roots(den)
            if np.all(np.abs(roots.imag) <= 1e-6 * np.abs(roots)):
                t1, t2 = sorted((-1.0 / roots.real).tolist(), reverse=True)
            else:  # underdamped: both lags taken as 1/wn (a coarse stand-in for the rules)
                t1 = t2 = float(np.sqrt(den[0]))
            return LowOrderModel("sopdt", b, t1, t2, model.delay)
        return None
    if i == 1:
        if order == 0:
            return LowOrderModel("integrator_lag", b, 0.0, 0.0, model.delay)
        if order == 1 and den[0] > 0:
            return LowOrderModel("integrator_lag", b, float(den[0]), 0.0, model.delay)
    return None


def fopdt_equivalent(m: LowOrderModel) -> tuple[float, float, float]:
    """(K, T, L) of a FOPDT approximation by Skogestad's half rule (2003): half of the second
    lag goes to the time constant, half to the dead time. For integrating models the result is
    (Kv, inf, L + T1) (the lag counted as dead time, the apparent step-response delay)."""
    if m.kind == "fopdt":
        return m.gain, m.t1, m.delay
    if m.kind == "sopdt":
        return m.gain, m.t1 + m.t2 / 2.0, m.delay + m.t2 / 2.0
    return m.gain, math.inf, m.delay + m.t1


# ---------------------------------------------------------------- SIMC


def simc_pi(m: LowOrderModel, tau_c: float | None = None) -> PidGains:
    """SIMC PI (Skogestad, J. Process Control 13, 2003), on the half-rule FOPDT equivalent.

    Self-regulating: Kc = T1 / (K (tau_c + theta)), Ti = min(T1, 4 (tau_c + theta)).
    Integrating (Kv e^(-theta s)/s, theta including the half-rule share of the lag):
    Kc = 1 / (Kv (tau_c + theta)), Ti = 4 (tau_c + theta). Default tau_c = theta.
    """
    if m.kind == "integrator_lag":
        kv, theta = m.gain, m.delay + m.t1 / 2.0
        tc = theta if tau_c is None else tau_c
        return from_standard(1.0 / (kv * (tc + theta)), 4.0 * (tc + theta))
    k, t1, theta = fopdt_equivalent(m)
    tc = theta if tau_c is None else tau_c
    return from_standard(t1 / (k * (tc + theta)), min(t1, 4.0 * (tc + theta)))


def simc_pid(m: LowOrderModel, tau_c: float | None = None) -> PidGains | None:
    """SIMC PID (Skogestad 2003) for models with a second lag, series form converted to
    parallel: SOPDT Kc = T1/(K (tau_c + theta)), Ti = min(T1, 4 (tau_c + theta)), Td = T2;
    integrator+lag Kc = 1/(Kv (tau_c + theta)), Ti = 4 (tau_c + theta), Td = T1.
    None for a FOPDT model (the rule then gives PI). Default tau_c = theta."""
    theta = m.delay
    tc = theta if tau_c is None else tau_c
    if m.kind == "sopdt" and m.t2 > 0:
        return from_series(m.t1 / (m.gain * (tc + theta)), min(m.t1, 4.0 * (tc + theta)), m.t2)
    if m.kind == "integrator_lag" and m.t1 > 0:
        return from_series(1.0 / (m.gain * (tc + theta)), 4.0 * (tc + theta), m.t1)
    return None


# ---------------------------------------------------------------- AMIGO


def amigo_pi(m: LowOrderModel) -> PidGains:
    """AMIGO PI (Åström and Hägglund, J. Process Control 14, 2004) on the FOPDT equivalent:
    Kc = 0.15/K + (0.35 - L T/(L + T)^2) T/(K L), Ti = 0.35 L + 13 L T^2/(T^2 + 12 L T + 7 L^2).
    Integrating form (Kv, L): Kc = 0.35/(Kv L), Ti = 13.4 L."""
    k, t, lag = fopdt_equivalent(m)
    if math.isinf(t):
        return from_standard(0.35 / (k * lag), 13.4 * lag)
    kc = 0.15 / k + (0.35 - lag * t / (lag + t) ** 2) * t / (k * lag)
    ti = 0.35 * lag + 13.0 * lag * t * t / (t * t + 12.0 * lag * t + 7.0 * lag * lag)
    return from_standard(kc, ti)


def amigo_pid(m: LowOrderModel) -> PidGains:
    """AMIGO PID (Åström and Hägglund 2004) on the FOPDT equivalent:
    Kc = (0.2 + 0.45 T/L)/K, Ti = L (0.4 L + 0.8 T)/(L + 0.1 T), Td = 0.5 L T/(0.3 L + T).
    Integrating form (Kv, L): Kc = 0.45/(Kv L), Ti = 8 L, Td = 0.5 L."""
    k, t, lag = fopdt_equivalent(m)
    if math.isinf(t):
        return from_standard(0.45 / (k * lag), 8.0 * lag, 0.5 * lag)
    kc = (0.2 + 0.45 * t / lag) / k
    ti = lag * (0.4 * lag + 0.8 * t) / (lag + 0.1 * t)
    td = 0.5 * lag * t / (0.3 * lag + t)
    return from_standard(kc, ti, td)
