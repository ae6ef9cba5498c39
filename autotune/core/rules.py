"""Published PID tuning rules (pure). Gains in the parallel form of `autotune.core.pid.PidGains`.

Ku in output units per PV unit, Tu in seconds; model gains K in PV units per output unit,
velocity gains Kv in PV units per (output unit s), times in seconds. Table values are quoted
from memory of the cited papers (and of their reproduction in Åström and Hägglund, "Advanced
PID Control", ISA 2006); the tests check them with worked examples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from autotune.core.lti import DelayedTF
from autotune.core.pid import PidGains, from_series, from_standard

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
    """A model in the low-order shape the rules need.

    kind "fopdt" (gain K, lag t1, delay), "sopdt" (K, t1 >= t2, delay) or "integrator_lag"
    (gain = Kv, lag t1, delay). For a model of higher order the values come from Skogestad's
    half rule (see `recognise`); `fo_lag`/`fo_delay` are the half-rule first-order values
    (fo_lag = inf for integrating models, whose fo_delay is the delay plus half the largest
    lag plus all smaller ones), `apparent_delay` the step-response delay of an integrating
    model (delay plus all lags: where the ramp asymptote crosses zero).
    """

    kind: str
    gain: float
    t1: float
    t2: float
    delay: float
    fo_lag: float = math.nan
    fo_delay: float = math.nan
    apparent_delay: float = math.nan


def recognise(model: DelayedTF) -> LowOrderModel | None:
    """Read a model off a DelayedTF: real stable poles (at most one integrator) and real zeros
    (a left-half-plane zero only where it cancels against a larger lag); None otherwise.

    Exact FOPDT, SOPDT and integrator+lag+dead time models map onto themselves. Higher orders
    use Skogestad's half rule (J. Process Control 13, 2003): lags sorted tau1 >= tau2 >= ...;
    SOPDT t1 = tau1, t2 = tau2 + tau3/2, delay + tau3/2 + sum(tau_i, i >= 4); FOPDT
    T = tau1 + tau2/2, delay + tau2/2 + sum(tau_i, i >= 3); an inverse-response zero
    (1 - T0 s) adds T0 to the delay. Repeated poles are found numerically; imaginary parts
    below 5 % of the magnitude count as round-off (e.g. 1/(s+1)^8).
    """
    i = model.integrators
    if i > 1:
        return None
    num = np.array(model.num)
    den = np.array(model.den[: len(model.den) - i])
    if num[-1] == 0.0 or den[-1] == 0.0:
        return None
    gain = float(num[-1] / den[-1])
    inverse = 0.0
    lead: list[float] = []
    for z in (np.roots(num) if num.size > 1 else []):
        if abs(z.imag) > 0.05 * abs(z):
            return None  # complex zeros: no half-rule reading here
        if z.real > 0:
            inverse += 1.0 / z.real
        else:
            lead.append(-1.0 / z.real)
    lags: list[float] = []
    for p in (np.roots(den) if den.size > 1 else []):
        if abs(p.imag) > 0.05 * abs(p) or p.real >= 0:
            if p.real < 0 and den.size == 3:  # underdamped second order: 1/wn for both lags
                lags = [float(np.sqrt(den[0] / den[2]))] * 2
                break
            return None
        lags.append(-1.0 / p.real)
    lags.sort(reverse=True)
    theta = model.delay + inverse
    for t0 in sorted(lead):
        # a left-half-plane zero (T0 s + 1) cancels against the nearest larger lag tau0:
        # (T0 s + 1)/(tau0 s + 1) ~ 1/((tau0 - T0) s + 1) for tau0 >= T0, T0 <= 5 theta
        # (Skogestad 2003, from memory), or where tau0 is within 10 % of T0 (near
        # cancellation, common practice, no source); negligible zeros (below 1e-4 of the
        # largest lag) drop
        if lags and t0 < 1e-4 * lags[0]:
            continue
        bigger = [k for k, tl in enumerate(lags) if tl >= t0 * (1 - 1e-3)]
        if not bigger:
            return None
        k = bigger[-1]
        if t0 > 5.0 * theta and lags[k] - t0 > 0.1 * lags[k]:
            return None  # neither within the rule's range nor a near pole-zero cancellation
        lags[k] = max(lags[k] - t0, 0.0)
        lags = sorted((tl for tl in lags if tl > 1e-12 * lags[0]), reverse=True)
    tau = lags + [0.0, 0.0, 0.0]
    if i == 1:
        fo_delay = theta + tau[0] / 2.0 + sum(tau[1:])
        lag = tau[0] + tau[1] / 2.0
        pid_delay = theta + tau[1] / 2.0 + sum(tau[2:])
        return LowOrderModel("integrator_lag", gain, lag, 0.0, pid_delay, math.inf, fo_delay,
                             theta + sum(lags))
    if not lags:
        return None
    fo_lag = tau[0] + tau[1] / 2.0
    fo_delay = theta + tau[1] / 2.0 + sum(tau[2:])
    if len(lags) == 1:
        return LowOrderModel("fopdt", gain, tau[0], 0.0, theta, fo_lag, fo_delay, math.nan)
    t2 = tau[1] + tau[2] / 2.0
    delay2 = theta + tau[2] / 2.0 + sum(tau[3:])
    return LowOrderModel("sopdt", gain, tau[0], t2, delay2, fo_lag, fo_delay, math.nan)


def fopdt_equivalent(m: LowOrderModel) -> tuple[float, float, float]:
    """(K, T, L) of the half-rule first-order approximation; (Kv, inf, L) for integrating."""
    return m.gain, m.fo_lag, m.fo_delay


# ---------------------------------------------------------------- SIMC


def simc_pi(m: LowOrderModel, tau_c: float | None = None) -> PidGains:
    """SIMC PI (Skogestad, J. Process Control 13, 2003), on the half-rule first-order model.

    Self-regulating: Kc = T1 / (K (tau_c + theta)), Ti = min(T1, 4 (tau_c + theta)).
    Integrating (Kv e^(-theta s)/s, theta including the half-rule share of the lag):
    Kc = 1 / (Kv (tau_c + theta)), Ti = 4 (tau_c + theta). Default tau_c = theta.
    """
    if m.kind == "integrator_lag":
        kv, theta = m.gain, m.fo_delay
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
    """AMIGO PI (Åström and Hägglund, J. Process Control 14, 2004) on the half-rule FOPDT
    (the paper reads K, T, L off the step response; the half rule stands in for that here):
    Kc = 0.15/K + (0.35 - L T/(L + T)^2) T/(K L), Ti = 0.35 L + 13 L T^2/(T^2 + 12 L T + 7 L^2).
    Integrating form (Kv, L), L the apparent delay: Kc = 0.35/(Kv L), Ti = 13.4 L."""
    k, t, lag = fopdt_equivalent(m)
    if math.isinf(t):
        lag = m.apparent_delay
        return from_standard(0.35 / (k * lag), 13.4 * lag)
    kc = 0.15 / k + (0.35 - lag * t / (lag + t) ** 2) * t / (k * lag)
    ti = 0.35 * lag + 13.0 * lag * t * t / (t * t + 12.0 * lag * t + 7.0 * lag * lag)
    return from_standard(kc, ti)


def amigo_pid(m: LowOrderModel) -> PidGains:
    """AMIGO PID (Åström and Hägglund 2004) on the FOPDT equivalent:
    Kc = (0.2 + 0.45 T/L)/K, Ti = L (0.4 L + 0.8 T)/(L + 0.1 T), Td = 0.5 L T/(0.3 L + T).
    Integrating form (Kv, L), L the apparent delay: Kc = 0.45/(Kv L), Ti = 8 L, Td = 0.5 L."""
    k, t, lag = fopdt_equivalent(m)
    if math.isinf(t):
        lag = m.apparent_delay
        return from_standard(0.45 / (k * lag), 8.0 * lag, 0.5 * lag)
    kc = (0.2 + 0.45 * t / lag) / k
    ti = lag * (0.4 * lag + 0.8 * t) / (lag + 0.1 * t)
    td = 0.5 * lag * t / (0.3 * lag + t)
    return from_standard(kc, ti, td)
