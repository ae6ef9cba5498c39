"""Low-order process models fitted to a recorded relay experiment.

The fit models the *sampled* experiment exactly: the recorded output `u[k]` (output units) is
held over [t_k, t_k + ts) (zero-order hold, as the device applies it) and the recorded PV
`y[k]` (PV units) is the plant output sampled at t_k. The fitted transfer function is therefore
the continuous plant itself; the hold's delay (about ts/2) is *not* part of it (see
`autotune.core.analysis`, `delays_included`).

Candidates (tried in this order; DelayedTF constructors in autotune.core.lti where they exist):
  "fopdt"          K exp(-L s) / (T s + 1)
  "integrator_lag" Kv exp(-L s) / (s (T s + 1))
  "sopdt"          K exp(-L s) / ((T1 s + 1)(T2 s + 1))
  "lag_n"          K (Tz s + 1) exp(-L s) / (T s + 1)^n, n = 2..8 (Tz < 0: a right-half-plane
                   zero, non-minimum phase); covers high-order lags and inverse responses
  "sopdt_zero"     K (Tz s + 1) exp(-L s) / ((T1 s + 1)(T2 s + 1)) (optional, not by default)
  "lag_mode"       K exp(-L s) / ((T s + 1)(s^2 / wn^2 + 2 zeta s / wn + 1)): a lag and a
                   lightly damped mode (a compliant belt, a flexible mast)
  "int_mode"       Kv exp(-L s) / (s (T s + 1)(s^2 / wn^2 + 2 zeta s / wn + 1))
The gain, an output offset, the zero, (integrating models) an input offset and, for a record
that does not start at rest, the free response of the unknown initial state all enter
linearly and are solved by linear least squares inside the nonlinear search over the time
constants and the dead time (variable projection). The mode candidates are tried only on a
record from rest, and only when no simpler candidate reproduces what was measured and a
higher harmonic stands above every simpler model (a resonance near it).

Each candidate is checked by the caller (`check`: autotune.core.validation.check_model against
the measured points and static gain). The winner has the lowest Akaike criterion
n ln(RSS/n) + 2 p among the candidates that pass (else among those not rejected as beyond the
record, else among all, and the model is then marked unreliable); for the record lengths of a
relay experiment that is "best residual wins" unless two candidates are practically tied, when
the simpler one is kept. The search stops early once a candidate that passes is down at the
noise floor.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core.lti import DelayedTF, _zoh, fopdt, integrator_lag, sopdt

CANDIDATES = ("fopdt", "integrator_lag", "sopdt", "lag_n")
MODE_KINDS = ("lag_mode", "int_mode")
_N_NONLINEAR = {"fopdt": 2, "sopdt": 3, "integrator_lag": 2, "sopdt_zero": 3, "lag_n": 2,
                "lag_mode": 4, "int_mode": 4}
# lag_n: gain, zero, offset + the order
_N_LINEAR = {"fopdt": 2, "sopdt": 2, "integrator_lag": 3, "sopdt_zero": 3, "lag_n": 4,
             "lag_mode": 2, "int_mode": 3}
ZETA_BOUNDS = (0.02, 0.99)  # damping of a mode candidate (underdamped: distinct poles)
LAG_ORDERS = range(2, 9)


# ---------------------------------------------------------------------------- sampled response
def discrete_coefficients(tf: DelayedTF, dt: float) -> tuple[np.ndarray, np.ndarray, int]:
    """Exact ZOH-sampled form of `tf`: y = z^-m B(z^-1)/A(z^-1) u, returned as (b, a, m).

    Same mathematics as DelayedTF.simulate_zoh (input held over each tick of `dt` seconds, the
    dead time split into m whole ticks and a fraction), expressed as a difference equation so
    that scipy.signal.lfilter can run it over a whole record at once.
    """
    a_c, b_c, c_c, d_c = scipy.signal.tf2ss(tf.num, tf.den)
    n = a_c.shape[0]
    m, frac = _delay_ticks(tf.delay, dt)
    d0 = float(d_c[0, 0]) if d_c.size else 0.0
    if n == 0:
        b = np.array([0.0, d0]) if frac > 0 else np.array([d0])
        return b, np.array([1.0]), m
    phi1, gam1 = _zoh(a_c, b_c, frac) if frac > 0 else (np.eye(n), np.zeros((n, 1)))
    phi2, gam2 = _zoh(a_c, b_c, dt - frac)
    phi = phi2 @ phi1
    g_early = phi2 @ gam1  # multiplies u[k-m-1]
    g_late = gam2  # multiplies u[k-m]
    a_poly = np.real(np.poly(phi))
    # C adj(zI - Phi) g as polynomials in z (descending), via ss2tf on the discrete system.
    num_late, _ = scipy.signal.ss2tf(phi, g_late, c_c, np.zeros((1, 1)))
    num_early, _ = scipy.signal.ss2tf(phi, g_early, c_c, np.zeros((1, 1)))
    num_late = np.real(num_late[0])
    num_early = np.real(num_early[0])
    # In powers of z^-1 (divide by z^n): b_late[i] z^-i, b_early shifted one tick more.
    b = np.zeros(n + 2)
    b[: n + 1] += num_late
    b[1 : n + 2] += num_early
    if d0 != 0.0:
        # direct feed-through of the input acting at t_k: u[k-m-1] with a fraction, else u[k-m]
        b[: n + 2] += d0 * (np.r_[0.0, a_poly] if frac > 0 else np.r_[a_poly, 0.0])
    return b, a_poly, m


def _delay_ticks(delay: float, dt: float) -> tuple[int, float]:
    """Dead time (s) as m whole ticks of dt (s) plus a fraction frac in [0, dt) seconds."""
    m, frac = divmod(delay, dt)
    m = int(m)
    if frac > dt * (1 - 1e-9):
        m, frac = m + 1, 0.0
    return m, frac


def _shift(u: np.ndarray, m: int) -> np.ndarray:
    """u delayed by m ticks (zeros before the record starts)."""
    if not m:
        return u
    return np.concatenate([np.zeros(min(m, u.size)), u[: max(u.size - m, 0)]])


def _zoh_equal_lags(a: np.ndarray, b: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form ZOH of the cascade of n equal lags 1/(T s + 1) (a, b as in cascade_states).

    e^{A h}[i, k] = e^{-h/T} (h/T)^(i-k) / (i-k)!; Gamma[i] = P(i + 1, h/T), the regularised
    lower incomplete gamma function.
    """
    n = a.shape[0]
    x = -a[0, 0] * h  # h / T
    j = np.arange(n)
    coef = np.exp(-x) * x**j / scipy.special.factorial(j)
    phi = np.zeros((n, n))
    for d in range(n):
        idx = np.arange(d, n)
        phi[idx, idx - d] = coef[d]
    gam = scipy.special.gammainc(j + 1, x).reshape(n, 1)
    return phi, gam


def sampled_response(tf: DelayedTF, u: np.ndarray, dt: float) -> np.ndarray:
    """y[k] = y(k dt) for u[k] held over [k dt, (k+1) dt), from rest; vectorised (lfilter).

    Equals DelayedTF.simulate_zoh(u, dt) (exact ZOH with the dead time, fractional ticks
    included); u in output units, y in PV units.
    """
    u = np.asarray(u, dtype=float)
    b, a, m = discrete_coefficients(tf, dt)
    return scipy.signal.lfilter(b, a, _shift(u, m))


def modal_response(poles: Sequence[float], residues: Sequence[float], delay: float,
                   u: np.ndarray, dt: float) -> np.ndarray:
    """Sampled response of sum_i r_i / (s - p_i) exp(-delay s) to u held over each tick.

    Distinct real poles p_i (1/s; 0 = integrator) and residues r_i; same mathematics as
    `sampled_response`, one first-order difference equation per mode, no matrix exponential:
    the fast path of the model fit. From rest; u in output units, dt and delay in seconds.
    """
    m, frac = _delay_ticks(delay, dt)
    u = _shift(np.asarray(u, dtype=float), m)
    h2 = dt - frac
    y = np.zeros(u.size)
    for p, r in zip(poles, residues, strict=True):
        if p == 0.0:
            g_late, g_early, lam = r * h2, r * frac, 1.0
        else:
            e2 = math.exp(p * h2)
            g_late = r * math.expm1(p * h2) / p
            g_early = e2 * r * math.expm1(p * frac) / p
            lam = e2 * math.exp(p * frac)
        y += scipy.signal.lfilter([0.0, g_late, g_early], [1.0, -lam], u)
    return y


def complex_modal_response(num: Sequence[float], den: Sequence[float], delay: float,
                           u: np.ndarray, dt: float) -> np.ndarray:
    """Sampled response of num(s)/den(s) exp(-delay s) (strictly proper, distinct poles, which
    may be complex) to u held over each tick, from rest: one first-order complex difference
    equation per pole (the mathematics of `modal_response`), the real part of their sum."""
    den_a = np.asarray(den, dtype=float)
    num_a = np.asarray(num, dtype=float)
    poles = np.roots(den_a)
    dden = np.polyder(den_a)
    m, frac = _delay_ticks(delay, dt)
    u = _shift(np.asarray(u, dtype=float), m)
    h2 = dt - frac
    y = np.zeros(u.size, dtype=complex)
    for p in poles:
        r = np.polyval(num_a, p) / np.polyval(dden, p)
        if abs(p) < 1e-14:
            g_late, g_early, lam = r * h2, r * frac, 1.0 + 0j
        else:
            e2 = np.exp(p * h2)
            g_late = r * np.expm1(p * h2) / p
            g_early = e2 * r * np.expm1(p * frac) / p
            lam = e2 * np.exp(p * frac)
        y += scipy.signal.lfilter(np.array([0.0, g_late, g_early]), np.array([1.0, -lam]),
                            u.astype(complex))
    return y.real


def cascade_response(time_constants: Sequence[float], delay: float, u: np.ndarray, dt: float
                     ) -> np.ndarray:
    """Sampled response of exp(-delay s) / prod_i (T_i s + 1) (see `cascade_states`)."""
    return cascade_states(time_constants, delay, u, dt)[-1]


def cascade_states(time_constants: Sequence[float], delay: float, u: np.ndarray, dt: float
                   ) -> list[np.ndarray]:
    """Sampled response of exp(-delay s) / prod_i (T_i s + 1) to u held over each tick.

    Returns the sampled output of every stage i (exp(-delay s) / prod_{j<=i} (T_j s + 1)).
    Exact (matrix-exponential ZOH of the cascade realisation, fractional dead time split as in
    `sampled_response`); the discrete state matrix is lower triangular, so each stage is one
    first-order difference equation driven by the earlier stages (stable for repeated lags).
    """
    u = np.asarray(u, dtype=float)
    n = len(time_constants)
    a = np.zeros((n, n))
    b = np.zeros((n, 1))
    for i, tc in enumerate(time_constants):
        a[i, i] = -1.0 / tc
        if i:
            a[i, i - 1] = 1.0 / tc
    b[0, 0] = 1.0 / time_constants[0]
    m, frac = _delay_ticks(delay, dt)
    u = _shift(u, m)
    u_early = np.concatenate([[0.0], u[:-1]])
    zoh = _zoh_equal_lags if len(set(time_constants)) == 1 else _zoh
    phi1, gam1 = zoh(a, b, frac) if frac > 0 else (np.eye(n), np.zeros((n, 1)))
    phi2, gam2 = zoh(a, b, dt - frac)
    phi = np.tril(phi2 @ phi1)
    g_e = (phi2 @ gam1)[:, 0]
    g_l = gam2[:, 0]
    states: list[np.ndarray] = []
    for i in range(n):
        drive = g_e[i] * u_early + g_l[i] * u
        for j in range(i):
            drive = drive + phi[i, j] * states[j]
        states.append(scipy.signal.lfilter([0.0, 1.0], [1.0, -phi[i, i]], drive))
    return states


def _modes(kind: str, shape: dict[str, float]) -> tuple[list[float], list[float]]:
    """Poles and residues of the unit-gain candidate (distinct poles; near-equal lags split)."""
    if kind == "fopdt":
        tc = shape["time_constant"]
        return [-1.0 / tc], [1.0 / tc]
    if kind in ("sopdt", "sopdt_zero"):
        ta, tb = shape["t1"], shape["t2"]
        tb = min(tb, ta * (1 - 1e-3))  # split a double pole (error far below any fit error)
        p1, p2 = -1.0 / ta, -1.0 / tb
        k = 1.0 / (ta * tb)
        return [p1, p2], [k / (p1 - p2), k / (p2 - p1)]
    if kind == "integrator_lag":
        tc = shape["time_constant"]
        return [0.0, -1.0 / tc], [1.0, -1.0]
    raise ValueError(f"unknown model kind {kind!r}")


# ---------------------------------------------------------------------------- fitted model
@dataclass(frozen=True)
class CandidateFit:
    """One candidate's least-squares result: params (units as in FittedModel), rms residual."""

    kind: str
    params: dict[str, float]
    tf: DelayedTF
    residual: float  # rms output error, PV units
    aic: float
    offset: float  # fitted PV offset (PV units)
    input_offset: float  # fitted input offset (output units; integrating models), else 0
    theta: tuple[float, ...] = ()  # the search vector it ended at (log time constants, delay)
    order: int = 1  # lag_n: the order


@dataclass(frozen=True)
class FittedModel:
    """The winning model and all candidates.

    kind: one of the candidate kinds; params: gain (PV units per output unit) or
    velocity_gain (PV units per output unit per second), time constants and delay (s), a
    mode's frequency (rad/s) and damping; tf: the DelayedTF (continuous plant, hold delay not
    included); residual: rms output error (PV units); candidates: every candidate's fit by
    kind; checks: each candidate's check (whatever `check` returned); reliable: the winner
    passed its check (True when no check was given).
    """

    kind: str
    params: dict[str, float]
    tf: DelayedTF
    residual: float
    candidates: dict[str, CandidateFit] = field(default_factory=dict)
    checks: dict[str, Any] = field(default_factory=dict)
    reliable: bool = True


def _shape(kind: str, theta: np.ndarray) -> dict[str, float]:
    """Time constants and delay (s) of a candidate from its search vector (log T..., L)."""
    if kind in ("fopdt", "integrator_lag", "lag_n"):
        return {"time_constant": math.exp(theta[0]), "delay": max(float(theta[1]), 0.0)}
    if kind in ("sopdt", "sopdt_zero"):
        ta, tb = sorted((math.exp(theta[0]), math.exp(theta[1])), reverse=True)
        return {"t1": ta, "t2": tb, "delay": max(float(theta[2]), 0.0)}
    if kind in MODE_KINDS:
        return {"time_constant": math.exp(theta[0]), "mode_frequency": math.exp(theta[1]),
                "mode_damping": float(theta[2]), "delay": max(float(theta[3]), 0.0)}
    raise ValueError(f"unknown model kind {kind!r}")


def _mode_den(shape: dict[str, float], integrating: bool) -> np.ndarray:
    """(T s + 1)(s^2 / wn^2 + 2 zeta s / wn + 1), times s when integrating."""
    wn, zeta = shape["mode_frequency"], shape["mode_damping"]
    den = np.polymul([shape["time_constant"], 1.0], [1.0 / wn**2, 2.0 * zeta / wn, 1.0])
    return np.polymul(den, [1.0, 0.0]) if integrating else den


def _build(kind: str, shape: dict[str, float], beta: np.ndarray) -> DelayedTF:
    """The DelayedTF for a candidate's shape and linear coefficients (gain first)."""
    gain, lag = float(beta[0]), shape["delay"]
    if kind == "fopdt":
        return fopdt(gain, shape["time_constant"], lag)
    if kind == "integrator_lag":
        return integrator_lag(gain, shape["time_constant"], lag)
    if kind == "lag_n":
        den = np.array([1.0])
        for _ in range(int(shape["order"])):
            den = np.polymul(den, [shape["time_constant"], 1.0])
        return DelayedTF((float(beta[2]), gain), tuple(den), lag)
    if kind in MODE_KINDS:
        return DelayedTF((gain,), tuple(_mode_den(shape, kind == "int_mode")), lag)
    tf = sopdt(gain, shape["t1"], shape["t2"], lag)
    if kind == "sopdt_zero":
        return DelayedTF((float(beta[2]), gain), tf.den, lag)
    return tf


class _Problem:
    """Variable-projection output-error problem for one candidate over a record."""

    def __init__(self, kind: str, u: np.ndarray, y: np.ndarray, dt: float, window: slice,
                 order: int = 1, free_response: bool = False, input_offset: bool = True):
        self.kind = kind
        self.input_offset = input_offset
        self.order = order
        self.free_response = free_response
        self.k = np.arange(u.size, dtype=float)
        self.u = u
        self.y = y
        self.dt = dt
        self.window = window
        self.yw = y[window]
        self.ones = np.ones_like(u)

    def solve(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
        shape = _shape(self.kind, theta)
        lag = shape["delay"]
        if self.kind == "lag_n":
            tc = shape["time_constant"]
            st = cascade_states([tc] * self.order, lag, self.u, self.dt)
            r = st[-1][self.window]
            # s / (T s + 1)^n = (1/(T s + 1)^(n-1) - 1/(T s + 1)^n) / T: the zero's column
            zero_col = ((st[-2] - st[-1]) / tc)[self.window]
            poles, res = [], []
        elif self.kind in MODE_KINDS:
            mode_den = _mode_den({**shape, "mode_damping": min(max(
                shape["mode_damping"], 1e-3), 0.999)}, self.kind == "int_mode")
            r = complex_modal_response([1.0], mode_den, lag, self.u, self.dt)[self.window]
            poles, res = [], []
        else:
            poles, res = _modes(self.kind, shape)
            r = modal_response(poles, res, lag, self.u, self.dt)[self.window]
        cols = [r, np.ones_like(r)]
        fixed = not self.input_offset and self.kind in ("integrator_lag", "int_mode")
        if fixed:
            pass  # the input offset is known to be 0 (0 is put in its place below)
        elif self.kind == "integrator_lag":
            cols.append(modal_response(poles, res, lag, self.ones, self.dt)[self.window])
        elif self.kind == "int_mode":
            cols.append(complex_modal_response([1.0], mode_den, lag, self.ones,
                                               self.dt)[self.window])
        elif self.kind == "lag_n":
            cols.append(zero_col)
        elif self.kind == "sopdt_zero":  # s / den: residues p_i r_i
            res_d = [p * q for p, q in zip(poles, res, strict=True)]
            cols.append(modal_response(poles, res_d, lag, self.u, self.dt)[self.window])
        if self.free_response:
            # unknown state at sample 0: the free response is a combination of the modes
            if self.kind == "lag_n":
                lam = math.exp(-self.dt / shape["time_constant"])
                base = lam ** self.k
                kn = self.k / max(self.k[-1], 1.0)
                cols += [(kn**j * base)[self.window] for j in range(self.order)]
            else:
                cols += [(math.exp(p * self.dt) ** self.k)[self.window] for p in poles
                         if p != 0.0]
        x = np.column_stack(cols)
        # normal equations, column-scaled (small systems: 2 or 3 unknowns)
        scale = np.sqrt(np.sum(x * x, axis=0))
        scale[scale == 0] = 1.0
        xs = x / scale
        if self.free_response:  # the modes can be nearly collinear: pivoted QR
            beta = scipy.linalg.lstsq(xs, self.yw, lapack_driver="gelsy", check_finite=False)[0]
            beta = beta / scale
        else:
            try:
                beta = np.linalg.solve(xs.T @ xs, xs.T @ self.yw) / scale
            except np.linalg.LinAlgError:
                beta = np.linalg.lstsq(xs, self.yw, rcond=None)[0] / scale
        resid = self.yw - x @ beta
        if fixed:
            beta = np.insert(beta, 2, 0.0)
        return resid, beta, shape

    def residual(self, theta: np.ndarray) -> np.ndarray:
        return self.solve(theta)[0]


def _start_grid(kind: str, w1: float, phase1: float, order: int = 1) -> list[np.ndarray]:
    """Starting points whose phase at w1 (rad/s) equals the measured phase1 (rad, < 0)."""
    lag_total = -phase1 - (math.pi / 2 if kind == "integrator_lag" else 0.0)
    lag_total = max(lag_total, 0.05)
    starts: list[np.ndarray] = []
    if kind == "lag_n":
        for q in (0.0, 0.15, 0.4):
            lag_phase = min((1 - q) * lag_total, order * math.pi / 2 * 0.97)
            tc = max(math.tan(lag_phase / order) / w1, 1e-6)
            delay = (lag_total - lag_phase) / w1 if q > 0 else 0.0
            for f in ((1.0, 0.6, 0.35) if q == 0.0 else (1.0,)):
                starts.append(np.array([math.log(tc * f), delay]))
        return starts
    lag_max = math.pi / 2 * (2 if kind in ("sopdt", "sopdt_zero") else 1) * 0.97
    for q in (0.05, 0.25, 0.5, 0.75, 0.95):
        lag_phase = min((1 - q) * lag_total, lag_max)
        delay = max(lag_total - lag_phase, 0.0) / w1
        if kind in ("sopdt", "sopdt_zero"):
            for share in (0.5, 0.8, 0.97):
                pa = min(share * lag_phase, math.pi / 2 * 0.97)
                pb = min(lag_phase - pa, math.pi / 2 * 0.97)
                ta = max(math.tan(pa) / w1, 1e-6)
                tb = max(math.tan(max(pb, 1e-4)) / w1, 1e-6)
                starts.append(np.array([math.log(ta), math.log(tb), delay]))
        else:
            tc = max(math.tan(lag_phase) / w1, 1e-6)
            starts.append(np.array([math.log(tc), delay]))
    return starts


def fit_models(
    t: np.ndarray,
    y: np.ndarray,
    u: np.ndarray,
    *,
    ts: float | None = None,
    w1: float,
    phase1: float,
    fit_from: int = 0,
    u_ref: float | None = None,
    candidates: Sequence[str] = CANDIDATES,
    noise_floor: float = 0.0,
    check: Callable[[DelayedTF], Any] | None = None,
    resonance: Callable[[Any], float | None] | None = None,
    input_offset: bool = True,
) -> FittedModel:
    """Fit each candidate to the sampled record by least squares; return the best.

    t: sample times (s, uniform tick); y: PV (PV units); u: applied output (output units), held
    over each tick; ts: tick (s), default the median sample spacing; w1, phase1: the measured
    first-harmonic frequency (rad/s) and plant phase there (rad, in (-2 pi, 0)), used to seed
    the search; fit_from: first sample index of the residual window (the model is simulated
    from sample 0 with input u_ref, default u[0], before it; from rest when fit_from is 0,
    else from an unknown state whose free response is fitted as well);
    candidates: model kinds to try (simplest first); noise_floor: PV noise std (PV units): once
    a candidate that passes its check has an rms residual within 5% of it (or of 1e-9 of the
    PV range) no richer candidate can do better, and the search stops there.
    check: a function of a candidate's DelayedTF returning an object with `passed` and
    `plausible` (autotune.core.validation.ModelCheck); None: every candidate passes.
    resonance: a function of a failed check returning the frequency (rad/s) where the measured
    response stands above the model (a lightly damped mode), or None; when it names one and no
    candidate passed, the mode candidates are fitted too (record from rest only).
    input_offset: fit an integrating model's input offset (a load); False where the record
    starts from rest with the PV still, which says the output at rest holds the PV.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    if ts is None:
        ts = float(np.median(np.diff(t)))
    ref = float(u[0]) if u_ref is None else float(u_ref)
    du = u - ref
    window = slice(int(fit_from), None)
    n_win = y.size - int(fit_from)
    if n_win < 8:
        raise ValueError("too few samples to fit a model")
    fits: dict[str, CandidateFit] = {}
    checks: dict[str, Any] = {}
    solved: dict[str, np.ndarray] = {}
    log_lo = math.log(ts * 1e-3)
    log_hi = math.log(max(t[-1] - t[0], ts) * 1e3)
    free = int(fit_from) > 0  # not from rest: the initial state is fitted too

    def optimise(prob: _Problem, starts: list[np.ndarray], tries: int = 1) -> np.ndarray:
        """Least squares from the `tries` best starts (by their cost); the best end wins
        (a short record's cost surface has local minima: a collapsed pair of lags, a dead
        time shifted by a half-period)."""
        costs = [float(np.sum(prob.residual(s) ** 2)) for s in starts]
        order = np.argsort(costs)[:max(tries, 1)]
        npar = starts[0].size
        lo = np.full(npar, log_lo)
        hi = np.full(npar, log_hi)
        lo[-1], hi[-1] = 0.0, max(t[-1] - t[0], ts)
        if prob.kind in MODE_KINDS:
            lo[2], hi[2] = ZETA_BOUNDS
        best_x, best_c = None, math.inf
        for i in order:
            x0 = np.clip(starts[int(i)], lo + 1e-9, hi - 1e-9)
            sol = scipy.optimize.least_squares(prob.residual, x0, bounds=(lo, hi), method="trf",
                                         x_scale=np.r_[np.ones(npar - 1), max(1.0 / w1, ts)],
                                         xtol=1e-8, ftol=1e-10, gtol=1e-10,
                                         max_nfev=120 if prob.kind in MODE_KINDS else 80)
            c = 2.0 * float(sol.cost)
            if c < best_c:
                best_x, best_c = np.asarray(sol.x), c
        assert best_x is not None
        return best_x

    def record(kind: str, prob: _Problem, x: np.ndarray, order: int) -> CandidateFit:
        solved[kind] = x
        res, beta, shape = prob.solve(x)
        if kind == "lag_n":
            shape = {**shape, "order": float(order)}
        tf = _build(kind, shape, beta)
        gain = float(beta[0])
        if kind in ("sopdt_zero", "lag_n"):
            shape = {**shape, "zero_time": float(beta[2] / gain) if gain else 0.0}
        integrating = kind in ("integrator_lag", "int_mode")
        params = {("velocity_gain" if integrating else "gain"): gain, **shape}
        rss = float(np.sum(res**2))
        npar_total = _N_NONLINEAR[kind] + _N_LINEAR[kind]
        aic = n_win * math.log(max(rss / n_win, 1e-300)) + 2 * npar_total
        input_offset = float(beta[2] / gain) if integrating and gain else 0.0
        fit = CandidateFit(kind, params, tf, math.sqrt(rss / n_win), aic, float(beta[1]),
                           input_offset, tuple(float(v) for v in x), order)
        fits[kind] = fit
        if check is not None:
            checks[kind] = check(tf)
        return fit

    def passed(kind: str) -> bool:
        return check is None or bool(getattr(checks[kind], "passed", False))

    for kind in candidates:
        if kind == "lag_n":
            # rank the orders by their best start, then optimise the two most promising
            ranked = []
            for n in LAG_ORDERS:
                prob_n = _Problem(kind, du, y, ts, window, n, free, input_offset)
                starts_n = _start_grid(kind, w1, phase1, n)
                c = min(float(np.sum(prob_n.residual(st) ** 2)) for st in starts_n)
                ranked.append((c, n, prob_n, starts_n))
            ranked.sort(key=lambda r: r[0])
            trials = []
            for _, n, prob_n, starts_n in ranked[:2]:
                # the delay-free starts separately: a right-half-plane zero (inverse response)
                # and a dead time compete, and sit in different basins
                groups = [starts_n, [st for st in starts_n if st[-1] == 0.0]]
                for group in groups:
                    if group:
                        x = optimise(prob_n, group)
                        trials.append((float(np.sum(prob_n.residual(x) ** 2)), n, prob_n, x))
            _, order, prob, x = min(trials, key=lambda r: r[0])
        else:
            order = 1
            prob = _Problem(kind, du, y, ts, window, 1, free, input_offset)
            starts = _start_grid(kind, w1, phase1)
            if kind == "sopdt_zero" and "sopdt" in solved:
                starts.append(solved["sopdt"])
                starts.append(solved["sopdt"] + np.array([0.0, 0.0, -0.5 * solved["sopdt"][2]]))
            x = optimise(prob, starts, tries=3 if kind in ("sopdt", "sopdt_zero") else 2)
        fit = record(kind, prob, x, order)
        if fit.residual <= max(1.05 * noise_floor, 1e-9 * float(np.ptp(y))) and passed(kind):
            break
    if check is not None and resonance is not None and not free and \
            not any(passed(k) for k in fits):
        best = min(fits.values(), key=lambda f: f.aic)
        w_res = resonance(checks[best.kind])
        if w_res is not None:
            for kind in MODE_KINDS:
                base = solved.get("integrator_lag" if kind == "int_mode" else "fopdt")
                if base is None:
                    continue
                prob = _Problem(kind, du, y, ts, window, 1, False, input_offset)
                starts = [np.array([base[0], math.log(w_res * f), z, 0.5 * base[1]])
                          for f in (0.85, 1.0, 1.2) for z in (0.1, 0.3)]
                record(kind, prob, optimise(prob, starts), 1)
    pool = [f for f in fits.values() if passed(f.kind)]
    reliable = bool(pool)
    if not pool and check is not None:
        pool = [f for f in fits.values() if getattr(checks[f.kind], "plausible", False)]
    if not pool:
        pool = list(fits.values())
    winner = min(pool, key=lambda f: f.aic)
    return FittedModel(winner.kind, dict(winner.params), winner.tf, winner.residual, fits,
                       checks, reliable)


def refit_residual(fit: CandidateFit, t: np.ndarray, y: np.ndarray, u: np.ndarray, *,
                   ts: float, fit_from: int = 0, input_offset: bool = True,
                   u_ref: float | None = None) -> tuple[float, CandidateFit]:
    """The rms residual (PV units) of the candidate kind of `fit` refitted to another output
    record `u` (output units), the search started where `fit` ended (a smooth function of
    small changes to u: for a search over a parameter of the input, e.g. a dead zone), and the
    refitted candidate (its time constants and delay; gains as refitted)."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    ref = float(u[0]) if u_ref is None else float(u_ref)
    window = slice(int(fit_from), None)
    prob = _Problem(fit.kind, u - ref, y, ts, window, fit.order, int(fit_from) > 0,
                    input_offset)
    x0 = np.asarray(fit.theta, dtype=float)
    log_lo = math.log(ts * 1e-3)
    log_hi = math.log(max(t[-1] - t[0], ts) * 1e3)
    lo = np.full(x0.size, log_lo)
    hi = np.full(x0.size, log_hi)
    lo[-1], hi[-1] = 0.0, max(t[-1] - t[0], ts)
    if fit.kind in MODE_KINDS:
        lo[2], hi[2] = ZETA_BOUNDS
    sol = scipy.optimize.least_squares(prob.residual, np.clip(x0, lo + 1e-9, hi - 1e-9),
                                 bounds=(lo, hi), method="trf", xtol=1e-10, ftol=1e-12,
                                 gtol=1e-12, max_nfev=60)
    res, beta, shape = prob.solve(np.asarray(sol.x))
    if fit.kind == "lag_n":
        shape = {**shape, "order": float(fit.order)}
    rms = float(np.sqrt(np.mean(res**2)))
    tf = _build(fit.kind, shape, beta)
    new = CandidateFit(fit.kind, {**fit.params, **shape}, tf, rms, fit.aic, float(beta[1]),
                       fit.input_offset, tuple(float(v) for v in sol.x), fit.order)
    return rms, new
