"""Loop frequency response, margins, closed-loop stability and the robust PI/PID optimum (pure).

The loop is L = C G: G a `DelayedTF` plant (PV units per output unit), C the PID's feedback
path (parallel gains, derivative through the filter Tf = kd/(kp N)). With a loop period `ts`
the controller is the discrete `DiscretePid` (C evaluated at z = exp(j w ts)) and the plant is
preceded by the zero-order hold, taken as (1 - exp(-j w ts))/(j w ts) (this neglects aliasing of
the plant's response above the Nyquist frequency pi/ts; it is close when the plant gain there is
small). Without `ts` everything is continuous time. Frequencies in rad/s.

The robust optimum maximises the integral gain ki (load-disturbance rejection) subject to a
maximum sensitivity Ms = max |1/(1 + L)| of at most a target, the criterion of Åström,
Panagopoulos and Hägglund ("Design of PI controllers based on non-convex optimization",
Automatica 34, 1998), for PI and for PID with derivative filter.
"""

from __future__ import annotations

import cmath
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core.lti import DelayedTF
from autotune.core.pid import PidGains, filter_time

# ---------------------------------------------------------------- frequency responses


_REF_CACHE: dict[tuple[DelayedTF, float | None], float] = {}


def reference_frequency(plant: DelayedTF, ts: float | None = None) -> float:
    """A frequency (rad/s) that sets the scale of the loop: the plant's phase crossover at
    -180 degrees (hold included when sampled), else 1/delay, else 1/(sum of time constants).
    Memoised (pure function of its arguments)."""
    key = (plant, ts)
    if key not in _REF_CACHE:
        if len(_REF_CACHE) > 256:
            _REF_CACHE.clear()
        _REF_CACHE[key] = _reference_frequency(plant, ts)
    return _REF_CACHE[key]


def _reference_frequency(plant: DelayedTF, ts: float | None) -> float:
    w180 = plant.phase_crossover(-np.pi)
    if w180 is None and ts is not None:
        w180 = _sampled_phase_crossover(plant, ts)
    if w180 is not None:
        return w180
    if plant.delay > 0:
        return 1.0 / plant.delay
    return 1.0 / max(1e-6, abs(plant.den[-2] / plant.den[-1]) if len(plant.den) > 1 else 1.0)


def _sampled_phase_crossover(plant: DelayedTF, ts: float) -> float | None:
    w = np.linspace(1e-6, np.pi / ts, 4000)
    ph = plant.phase(w) - w * ts / 2.0  # the hold's phase is -w ts/2
    idx = np.nonzero(ph <= -np.pi)[0]
    return None if idx.size == 0 else float(w[idx[0]])


def frequency_grid(plant: DelayedTF, ts: float | None = None, points: int = 3000,
                   span: tuple[float, float] = (1e-3, 40.0)) -> np.ndarray:
    """Log-spaced grid around the reference frequency, capped at the Nyquist frequency."""
    wr = reference_frequency(plant, ts)
    lo, hi = wr * span[0], wr * span[1]
    if ts is not None:
        hi = min(hi, np.pi / ts * 0.999)
    return np.logspace(np.log10(lo), np.log10(hi), points)


def hold_response(w: np.ndarray, ts: float | None) -> np.ndarray:
    """Zero-order hold (1 - exp(-j w ts))/(j w ts); 1 without ts."""
    w = np.asarray(w, dtype=float)
    if ts is None:
        return np.ones(w.shape, dtype=complex)
    x = 1j * w * ts
    return (1.0 - np.exp(-x)) / x


def controller_bases(w: np.ndarray, ts: float | None, tf: np.ndarray | float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Per unit ki and per unit kd responses (I, D) of the PID's feedback path: C = kp + ki I +
    kd D. Continuous: I = 1/(j w), D = j w/(1 + j w Tf). Discrete (DiscretePid): I = ts/(z - 1),
    D = (1 - 1/z)/((Tf + ts)(1 - ad/z)), ad = Tf/(Tf + ts)."""
    w = np.asarray(w, dtype=float)
    tf = np.asarray(tf, dtype=float)
    if ts is None:
        s = 1j * w
        return 1.0 / s, s / (1.0 + s * tf)
    zi = np.exp(-1j * w * ts)  # 1/z
    ad = tf / (tf + ts)
    return ts * zi / (1.0 - zi), (1.0 - zi) / ((tf + ts) * (1.0 - ad * zi))


def loop_response(plant: DelayedTF, gains: PidGains, w: np.ndarray, n: float = 10.0,
                  ts: float | None = None) -> np.ndarray:
    """L(j w) = C(j w) G(j w) (hold and discrete controller when `ts` is given)."""
    ib, db = controller_bases(w, ts, filter_time(gains, n))
    c = gains.kp + gains.ki * ib + gains.kd * db
    return c * plant.freq_response(w) * hold_response(w, ts)


# ---------------------------------------------------------------- margins and stability


@dataclass(frozen=True)
class LoopMargins:
    """ms: max |1/(1+L)|; gain_margin: factor at the phase crossover closest to 1 on a log
    scale (inf if none); phase_margin_deg: smallest |margin| among gain crossovers (inf if
    none); frequencies in rad/s."""

    ms: float
    w_ms: float
    gain_margin: float
    w_pc: float
    phase_margin_deg: float
    w_gc: float


def loop_margins(plant: DelayedTF, gains: PidGains, n: float = 10.0, ts: float | None = None,
                 w: np.ndarray | None = None) -> LoopMargins:
    """Ms, gain and phase margins of the loop, crossings refined by root finding.

    Selection as python-control's stability_margins: the gain margin closest to 1 in log, the
    phase margin smallest in magnitude.
    """
    w = frequency_grid(plant, ts, points=4000, span=(1e-4, 100.0)) if w is None else w

    def lf(x: float) -> complex:
        return complex(loop_response(plant, gains, np.array([x]), n, ts)[0])

    L = loop_response(plant, gains, w, n, ts)
    s_abs = np.abs(1.0 + L)
    i = int(np.argmin(s_abs))
    lo, hi = w[max(i - 1, 0)], w[min(i + 1, w.size - 1)]
    if hi > lo:
        res = scipy.optimize.minimize_scalar(lambda x: abs(1.0 + lf(x)), bounds=(lo, hi),
                                       method="bounded", options={"xatol": lo * 1e-10})
        smin, w_ms = (res.fun, res.x) if res.fun < s_abs[i] else (s_abs[i], w[i])
    else:
        smin, w_ms = s_abs[i], w[i]
    ms = math.inf if smin == 0 else 1.0 / float(smin)

    # phase crossovers: Im L changes sign with Re L < 0; refine the candidates nearest to the
    # selected one (grid estimate), python-control's rule then picks among the refined ones
    gms, wpcs = [], []
    im = L.imag
    cand = [j for j in np.nonzero(np.sign(im[:-1]) != np.sign(im[1:]))[0]
            if L.real[j] < 0 or L.real[j + 1] < 0]
    cand.sort(key=lambda j: abs(math.log(max(abs(L[j]), 1e-300))))
    for j in cand[:3]:
        x = scipy.optimize.brentq(lambda v: lf(v).imag, w[j], w[j + 1], xtol=w[j] * 1e-12)
        lx = lf(x)
        if lx.real < 0:
            gms.append(-1.0 / lx.real)
            wpcs.append(x)
    if gms:
        k = int(np.argmin(np.abs(np.log(gms))))
        gm, wpc = float(gms[k]), float(wpcs[k])
    else:
        gm, wpc = math.inf, math.nan

    # gain crossovers: |L| = 1
    pms, wgcs = [], []
    mag = np.abs(L) - 1.0
    cand = list(np.nonzero(np.sign(mag[:-1]) != np.sign(mag[1:]))[0])

    def pm_of(x: float) -> float:
        ang = math.degrees(np.angle(lf(x)))  # (-180, 180]
        return ang + 180.0 if ang <= 0 else ang - 180.0

    cand.sort(key=lambda j: abs(pm_of(w[j])))
    for j in cand[:3]:
        x = scipy.optimize.brentq(lambda v: abs(lf(v)) - 1.0, w[j], w[j + 1], xtol=w[j] * 1e-12)
        pms.append(pm_of(x))
        wgcs.append(x)
    if pms:
        k = int(np.argmin(np.abs(pms)))
        pm, wgc = float(pms[k]), float(wgcs[k])
    else:
        pm, wgc = math.inf, math.nan
    return LoopMargins(ms, float(w_ms), gm, wpc, pm, wgc)


def pade(delay: float, order: int) -> tuple[np.ndarray, np.ndarray]:
    """(num, den) of the [order/order] Padé approximant of exp(-delay s), highest power first.

    Coefficient of s^k: (2n - k)! n! / ((2n)! k! (n - k)!) (-delay)^k in the numerator, the
    same with +delay in the denominator (standard result).
    """
    n = order
    c = [math.factorial(2 * n - k) * math.factorial(n)
         / (math.factorial(2 * n) * math.factorial(k) * math.factorial(n - k)) for k in range(n + 1)]
    num = np.array([c[k] * (-delay) ** k for k in range(n + 1)])[::-1]
    den = np.array([c[k] * delay**k for k in range(n + 1)])[::-1]
    return num, den


def closed_loop_poles(plant: DelayedTF, gains: PidGains, n: float = 10.0,
                      ts: float | None = None, pade_order: int = 12) -> np.ndarray:
    """Closed-loop poles (rad/s) of the continuous loop with the dead time as a Padé approximant
    of `pade_order`; with `ts` the hold is counted as ts/2 of extra dead time. Time is scaled by
    the reference frequency before the roots are taken (conditioning)."""
    wr = reference_frequency(plant, ts)
    tau = 1.0 / wr

    def scaled(p: np.ndarray | tuple[float, ...]) -> np.ndarray:
        p = np.asarray(p, dtype=float)
        deg = p.size - 1
        return p * tau ** -np.arange(deg, -1, -1.0)  # p(s) with s = sigma / tau

    tf = filter_time(gains, n)
    # C(s) = (kp s (1 + Tf s) + ki (1 + Tf s) + kd s^2) / (s (1 + Tf s))
    cnum = np.polyadd(np.polyadd(gains.kp * np.array([tf, 1.0, 0.0]),
                                 gains.ki * np.array([tf, 1.0])), gains.kd * np.array([1.0, 0.0, 0.0]))
    cden = np.array([tf, 1.0, 0.0])
    if gains.ki == 0.0:
        cnum = np.polyadd(gains.kp * np.array([tf, 1.0]), gains.kd * np.array([1.0, 0.0]))
        cden = np.array([tf, 1.0])
    delay = plant.delay + (ts / 2.0 if ts is not None else 0.0)
    pn, pd = pade(delay, pade_order) if delay > 0 else (np.array([1.0]), np.array([1.0]))
    num = np.polymul(np.polymul(scaled(cnum), scaled(plant.num)), scaled(pn))
    den = np.polymul(np.polymul(scaled(cden), scaled(plant.den)), scaled(pd))
    char = np.polyadd(den, num)
    char = np.trim_zeros(char / np.max(np.abs(char)), "f")
    return np.roots(char) / tau


def is_stable(plant: DelayedTF, gains: PidGains, n: float = 10.0, ts: float | None = None,
              pade_order: int = 12) -> bool:
    """Closed-loop stability of the loop.

    Where it applies (plant without right-half-plane poles, at most one integrator, loop
    gain below 0.5 at the top of a grid reaching at most 1e4 times the reference frequency, or
    the Nyquist frequency when sampled), the Nyquist criterion is evaluated on the exact
    frequency response, dead time included (`nyquist_stable`); otherwise every closed-loop
    pole of the Padé approximation (`closed_loop_poles`) must have negative real part.
    """
    verdict = _nyquist_verdict(plant, gains, n, ts)
    if verdict is not None:
        return verdict
    return pade_stable(plant, gains, n, ts, pade_order)


def pade_stable(plant: DelayedTF, gains: PidGains, n: float = 10.0, ts: float | None = None,
                pade_order: int = 12) -> bool:
    """True when every closed-loop pole of the Padé approximation has negative real part."""
    poles = closed_loop_poles(plant, gains, n, ts, pade_order)
    wr = reference_frequency(plant, ts)
    return bool(np.all(poles.real < -1e-9 * wr))


def _nyquist_verdict(plant: DelayedTF, gains: PidGains, n: float, ts: float | None
                     ) -> bool | None:
    """Grid Nyquist count on the exact loop response; None where it does not apply."""
    if not _winding_test(plant):
        return None
    q0 = plant.integrators
    g0 = plant.velocity_gain if q0 == 1 else plant.static_gain
    if gains.ki != 0.0:
        q, theta0 = q0 + 1, float(np.angle(gains.ki * g0)) - (q0 + 1) * np.pi / 2.0
    elif q0 == 1:
        q, theta0 = 1, float(np.angle(gains.kp * g0)) - np.pi / 2.0
    else:
        q, theta0 = 0, float(np.angle(1.0 + gains.kp * g0))
    if q > 0 and g0 == 0.0:
        return None
    wr = reference_frequency(plant, ts)
    lo = 1e-4 * wr
    hi = 1e2 * wr if ts is None else np.pi / ts * 0.999
    while True:
        # steps small enough that 1 + L turns by well under pi between points, even where
        # the dead time turns L quickly (at most 0.2 rad of delay phase a step)
        step = min(0.003, 0.2 / max(hi * (plant.delay + (ts or 0.0)), 1e-9))
        pts = int(min(400_000, max(2000, math.log(hi / lo) / step)))
        w = np.logspace(np.log10(lo), np.log10(hi), pts)
        opl = 1.0 + loop_response(plant, gains, w, n, ts)
        if abs(opl[-1] - 1.0) < 0.5:
            return nyquist_stable(opl, q, theta0)
        if ts is not None or hi >= 1e4 * wr:
            return None
        hi *= 10.0


# ---------------------------------------------------------------- measured points


@dataclass(frozen=True)
class MeasuredPoint:
    """One measured point of the plant's frequency response.

    w: angular frequency (rad/s; 0 = the static gain); g: G(j w) of the continuous plant (PV
    units per output unit; the hold's delay not included, as the relay's harmonics give it);
    uncertainty: relative bound on its error, |G_true(j w) - g| <= uncertainty |g|.
    """

    w: float
    g: complex
    uncertainty: float = 0.0
    harmonic: int = 0  # which harmonic of the relay's square wave (0: the static gain)

    def as_dict(self) -> dict[str, Any]:
        return {"w": self.w, "re": float(self.g.real), "im": float(self.g.imag),
                "magnitude": float(abs(self.g)),
                "phase_deg": float(math.degrees(cmath.phase(self.g))),
                "uncertainty": self.uncertainty, "harmonic": self.harmonic}


# A point known no better than +/-50 % bounds nothing a design can use: left out of the design
# (common practice, no source). Its clearance is still reported.
MAX_POINT_UNCERTAINTY = 0.5


def point_loop(point: MeasuredPoint, gains: PidGains, n: float = 10.0,
               ts: float | None = None) -> complex:
    """L = C g H at the point (discrete controller and hold when `ts` is given); at w = 0 (the
    static gain) kp g without integral action, complex infinity with it."""
    if point.w == 0.0:
        return complex(math.inf) if gains.ki != 0.0 else complex(gains.kp * point.g)
    w = np.array([point.w])
    ib, db = controller_bases(w, ts, filter_time(gains, n))
    c = gains.kp + gains.ki * ib + gains.kd * db
    return complex((c * point.g * hold_response(w, ts))[0])


def point_clearance(point: MeasuredPoint, gains: PidGains, n: float = 10.0,
                    ts: float | None = None) -> float:
    """Worst-case distance of the loop from -1 at a measured point over its uncertainty:
    |1 + L| - u |L| (L = C g H there, u the relative uncertainty); +inf at the static gain with
    integral action. The point meets an Ms bound when its clearance is at least 1/Ms; a
    clearance <= 0 means -1 lies within the uncertainty (the loop may be unstable)."""
    L = point_loop(point, gains, n, ts)
    if not cmath.isfinite(L):
        return math.inf
    return float(abs(1.0 + L) - point.uncertainty * abs(L))


def points_sensitivity(points: Sequence[MeasuredPoint], gains: PidGains, n: float = 10.0,
                       ts: float | None = None) -> float:
    """Worst-case Ms over the measured points that bound anything (relative uncertainty below
    MAX_POINT_UNCERTAINTY): the largest 1/clearance (`point_clearance`), inf when a clearance
    is <= 0, nan without such points. A point known to +/-600 % (a fifth harmonic buried in a
    coarse encoder's steps) holds -1 inside its uncertainty for any gains; it says nothing."""
    points = informative(points)
    if not points:
        return math.nan
    worst = min(point_clearance(p, gains, n, ts) for p in points)
    return math.inf if worst <= 0.0 else 1.0 / worst


def informative(points: Sequence[MeasuredPoint]) -> list[MeasuredPoint]:
    """The points that say anything about a loop: relative uncertainty below
    MAX_POINT_UNCERTAINTY (beyond it the uncertainty holds -1 for any gains)."""
    return [p for p in points if 0.0 <= p.uncertainty < MAX_POINT_UNCERTAINTY]


def _usable(points: Sequence[MeasuredPoint]) -> list[MeasuredPoint]:
    """The points that can bind a design with integral action: `informative` ones with w > 0
    (the static gain never binds one: |L(0)| is infinite)."""
    return [p for p in informative(points) if p.w > 0.0]


def _point_exclusions(a: np.ndarray, b: np.ndarray, u: np.ndarray, r: float
                      ) -> list[tuple[float, float]]:
    """Intervals of ki >= 0 that break the bound at measured points.

    At a point, L = c + ki b with c = a - 1 (a = 1 + kp-and-kd part of L); the bound with the
    point's relative uncertainty u is |a + ki b| - u |c + ki b| >= r. Its boundary solves a
    quartic ((h - r^2 - u^2 g)^2 = 4 r^2 u^2 g with h = |a + ki b|^2, g = |c + ki b|^2, both
    quadratics in ki); the real roots split ki >= 0 into intervals, each tested at its middle.
    """
    out: list[tuple[float, float]] = []
    for ak, bk, uk in zip(np.atleast_1d(a), np.atleast_1d(b), np.atleast_1d(u), strict=True):
        ck = ak - 1.0
        bb = abs(bk) ** 2
        if bb == 0.0:
            continue
        h = np.array([bb, 2.0 * (ak * np.conj(bk)).real, abs(ak) ** 2])
        g = np.array([bb, 2.0 * (ck * np.conj(bk)).real, abs(ck) ** 2])
        q = h - uk * uk * g
        q[-1] -= r * r
        # without uncertainty the boundary is q = 0 (a quadratic, as on the model's grid)
        poly = q if uk == 0.0 else np.polysub(np.polymul(q, q), 4.0 * r * r * uk * uk * g)
        roots = np.roots(np.trim_zeros(poly, "f")) if np.any(poly != 0.0) else np.array([])
        # near-real roots (a double root splits into a pair) are kept: an extra edge only adds
        # an interval tested at its middle
        real = sorted(float(z.real) for z in roots
                      if abs(z.imag) <= 1e-4 * max(1.0, abs(z)) and z.real > 0.0)
        edges = [0.0, *real, 2.0 * real[-1] + 1.0 if real else 1.0]

        def margin(k: float, ak: complex = ak, bk: complex = bk, ck: complex = ck,
                   uk: float = uk) -> float:
            return abs(ak + k * bk) - uk * abs(ck + k * bk) - r

        for lo, hi in zip(edges[:-1], edges[1:], strict=True):
            if margin(0.5 * (lo + hi)) < 0.0:
                if out and out[-1][1] >= lo:
                    out[-1] = (out[-1][0], hi)
                else:
                    out.append((lo, hi))
        if margin(edges[-1] * 2.0) < 0.0:  # u >= 1 (left out by _usable): nothing beyond
            out.append((edges[-1], math.inf))
    return out


# ---------------------------------------------------------------- robust optimum


@dataclass(frozen=True)
class RobustDesign:
    """The optimum found: gains, Ms (the largest over the plants designed on), closed-loop
    stability on every plant; ms_each: Ms per plant, in their order; ms_points: worst-case Ms
    at the measured points over their uncertainty (`points_sensitivity`; nan without points)."""

    gains: PidGains
    ms: float
    stable: bool
    ms_each: tuple[float, ...] = ()
    ms_points: float = math.nan


def _winding_test(plant: DelayedTF) -> bool:
    """Whether the grid Nyquist count applies: no open-loop poles in the right half plane and
    at most one integrator in the plant (else the Padé closed-loop poles decide)."""
    den = np.array(plant.den[: len(plant.den) - plant.integrators])
    rhp = np.any(np.roots(den).real > 0) if den.size > 1 else False
    return plant.integrators <= 1 and not rhp


def nyquist_stable(one_plus_l: np.ndarray, q: int, theta0: float) -> bool:
    """Nyquist criterion on a grid (argument principle), for a loop without right-half-plane
    open-loop poles and with q poles at s = 0.

    one_plus_l: 1 + L(j w) on an increasing grid from below the loop's low-frequency
    asymptote's region to where |L| < 0.5; theta0: arg of 1 + L at w -> 0+ (arg K - q pi/2
    for L ~ K/s^q). The net phase change D over w in (0, inf) of 1 + L satisfies
    D = q pi/2 - pi Z, Z the number of closed-loop poles in the right half plane; stable iff
    Z = 0. Steps between grid points must be below pi (fine grid).
    """
    v = one_plus_l
    delta = (float(np.angle(v[0] * np.exp(-1j * theta0)))
             + float(np.sum(np.angle(v[1:] / v[:-1]))) - float(np.angle(v[-1])))
    z = (q * np.pi / 2.0 - delta) / np.pi
    return bool(abs(z) < 0.25)




def _ki_sup(a: np.ndarray, b: np.ndarray, r: float, stable: Callable[[float], bool],
            extra: Sequence[tuple[float, float]] = ()) -> float:
    """Largest ki >= 0 with |a + ki b| >= r at every grid frequency, in a stable component.

    At each frequency the condition excludes the interval of ki between the roots of a
    quadratic; `extra` adds excluded intervals of other origin (the measured points, see
    `_point_exclusions`). The admissible set is [0, inf) minus the union of these intervals,
    a union of components. Within a component the Nyquist curves never meet the disc around
    -1, so the number of encirclements (stability) is constant: one check per component
    decides it. The supremum of the highest stable bounded component is returned (-inf if
    there is none).
    """
    bb = np.abs(b) ** 2
    ab = (a * np.conj(b)).real
    c0 = np.abs(a) ** 2 - r * r
    disc = ab * ab - bb * c0
    sel = disc > 0
    sq = np.sqrt(disc[sel])
    k1 = (-ab[sel] - sq) / bb[sel]
    k2 = (-ab[sel] + sq) / bb[sel]
    if extra:
        k1 = np.concatenate([k1, [lo for lo, _ in extra]])
        k2 = np.concatenate([k2, [hi for _, hi in extra]])
    keep = k2 > 0
    if not np.any(keep):
        return -math.inf
    starts = np.maximum(k1[keep], 0.0)
    order = np.argsort(starts)
    st = starts[order]
    en = np.maximum.accumulate(k2[keep][order])
    comps: list[tuple[float, float]] = []
    if st[0] > 0:
        comps.append((0.0, float(st[0])))
    gaps = np.nonzero(st[1:] > en[:-1])[0]
    comps += [(float(en[i]), float(st[i + 1])) for i in gaps]
    for lo, hi in reversed(comps):
        if stable(0.5 * (lo + hi)):
            return hi
    return -math.inf


def _stability_test(plant: DelayedTF, ts: float | None, n: float
                    ) -> Callable[[np.ndarray, float, float, float], bool]:
    """stable(1 + L on the plant's grid, kp, ki, kd): the grid Nyquist count where it applies
    (ki > 0, |L| < 0.5 at the top of the grid, see `nyquist_stable`), else the Padé
    closed-loop poles."""
    winding = _winding_test(plant)
    q0 = plant.integrators
    g0 = plant.velocity_gain if q0 == 1 else (plant.static_gain if q0 == 0 else 0.0)

    def stable(opl: np.ndarray, kp: float, ki: float, kd: float) -> bool:
        if winding and ki > 0 and abs(opl[-1] - 1.0) < 0.5 and g0 != 0.0:
            q = q0 + 1
            theta0 = float(np.angle(ki * g0)) - q * np.pi / 2.0
            return nyquist_stable(opl, q, theta0)
        return is_stable(plant, PidGains(kp, ki, kd), n, ts)

    return stable


@dataclass(frozen=True)
class _Grids:
    """The plants' frequency grids side by side: w (rad/s), g = G H and b = g I (per unit ki)
    concatenated; `cuts` the end index of each plant's stretch, `tests` each plant's
    stability test (`_stability_test`)."""

    w: np.ndarray
    g: np.ndarray
    b: np.ndarray
    cuts: tuple[int, ...]
    tests: tuple[Callable[[np.ndarray, float, float, float], bool], ...]

    @classmethod
    def build(cls, plants: Sequence[DelayedTF], ts: float | None, n: float, points: int,
              span: tuple[float, float], step: int = 1) -> _Grids:
        ws = [frequency_grid(p, ts, points, span)[::step] for p in plants]
        gs = [p.freq_response(w) * hold_response(w, ts) for p, w in zip(plants, ws, strict=True)]
        w = np.concatenate(ws)
        g = np.concatenate(gs)
        ib, _ = controller_bases(w, ts, 0.0)
        cuts = tuple(int(c) for c in np.cumsum([x.size for x in ws]))
        return cls(w, g, g * ib, cuts, tuple(_stability_test(p, ts, n) for p in plants))

    def stretches(self) -> list[slice]:
        return [slice(lo, hi) for lo, hi in zip((0, *self.cuts[:-1]), self.cuts, strict=True)]

    def stable(self, opl: np.ndarray, kp: float, ki: float, kd: float) -> bool:
        """Closed loop stable on every plant (1 + L given on the concatenated grid)."""
        return all(test(opl[sl], kp, ki, kd)
                   for test, sl in zip(self.tests, self.stretches(), strict=True))

    def rolled(self, loop: np.ndarray) -> np.ndarray:
        """Per row of `loop` (L on the grid): |L| < 0.5 at the top of every plant's stretch."""
        tops = np.array(self.cuts) - 1
        return np.all(np.abs(loop[:, tops]) < 0.5, axis=1)

    def kp_upper(self, r: float) -> tuple[float, int]:
        """The smallest `_kp_upper` over the plants and which plant gives it."""
        ups = [_kp_upper(self.g[sl], r) for sl in self.stretches()]
        i = int(np.argmin(ups))
        return ups[i], i


def _kp_upper(g: np.ndarray, r: float) -> float:
    """kp beyond which the P loop leaves the disc at the phase crossover: Ku (1 - 1/Ms)."""
    im = g.imag
    idx = np.nonzero((np.sign(im[:-1]) != np.sign(im[1:])) & (g.real[:-1] < 0))[0]
    if idx.size:
        return float((1.0 - r) / abs(g[idx[0]]))
    return float(10.0 / np.min(np.abs(g)))


@dataclass(frozen=True)
class _Points:
    """The usable measured points as arrays: w, gh = g H, gb = g H I, u."""

    w: np.ndarray
    gh: np.ndarray
    gb: np.ndarray
    u: np.ndarray

    @classmethod
    def build(cls, points: Sequence[MeasuredPoint], ts: float | None) -> _Points:
        use = _usable(points)
        w = np.array([p.w for p in use], dtype=float)
        gh = np.array([p.g for p in use], dtype=complex) * hold_response(w, ts)
        ib, _ = controller_bases(w, ts, 0.0)
        return cls(w, gh, gh * ib, np.array([p.uncertainty for p in use], dtype=float))


def design_figures(plants: Sequence[DelayedTF], points: Sequence[MeasuredPoint],
                   gains: PidGains, n: float = 10.0, ts: float | None = None
                   ) -> tuple[tuple[float, ...], float]:
    """(Ms on each plant (inf where unstable is not decided here), worst-case Ms at the
    points (nan without points))."""
    return (tuple(loop_margins(p, gains, n, ts).ms for p in plants),
            points_sensitivity(points, gains, n, ts))


def _verify(plants: Sequence[DelayedTF], points: Sequence[MeasuredPoint], gains: PidGains,
            ms_target: float, n: float, ts: float | None) -> RobustDesign:
    """Exact Ms of the design on every plant and at the points; scale ki down until the largest
    is <= target (+0.002)."""

    def worst(g: PidGains) -> float:
        each, at_points = design_figures(plants, _usable(points), g, n, ts)
        return max(max(each), 0.0 if math.isnan(at_points) else at_points)

    if worst(gains) > ms_target + 0.002:
        lo, hi = 0.0, 1.0
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            if worst(PidGains(gains.kp, gains.ki * mid, gains.kd)) <= ms_target + 0.002:
                lo = mid
            else:
                hi = mid
        gains = PidGains(gains.kp, gains.ki * lo, gains.kd)
    each, at_points = design_figures(plants, points, gains, n, ts)
    stable = all(is_stable(p, gains, n, ts) for p in plants)
    return RobustDesign(gains, max(each), stable, each, at_points)


def robust_pi_set(plants: Sequence[DelayedTF], points: Sequence[MeasuredPoint] = (),
                  ms_target: float = 1.4, ts: float | None = None) -> RobustDesign:
    """PI with the largest ki subject to Ms <= ms_target on every plant and at every measured
    point (with margin for its uncertainty, see `point_clearance`), the criterion of Åström,
    Panagopoulos and Hägglund (1998) over a set of constraints.

    For each kp the largest admissible ki follows in closed form from the circle condition
    |1 + L(j w)| >= 1/Ms on every plant's grid (a quadratic in ki) and at the points (a
    quartic); the best kp is found on a grid and refined by a bounded scalar search. Closed-loop
    stability is required on every plant. Raises ValueError when no stable PI meets the bound.
    """
    plants = tuple(plants)
    if not plants:
        raise ValueError("a robust design needs at least one plant model")
    r = 1.0 / ms_target
    grid = _Grids.build(plants, ts, 10.0, 3000, (1e-3, 40.0))
    pts = _Points.build(points, ts)
    kp_hi, _ = grid.kp_upper(r)

    def f(kp: np.ndarray) -> np.ndarray:
        out = []
        for k in np.atleast_1d(kp):
            a = 1.0 + k * grid.g
            extra = _point_exclusions(1.0 + k * pts.gh, pts.gb, pts.u, r) if pts.w.size else ()
            out.append(_ki_sup(a, grid.b, r,
                               lambda ki, k=k, a=a: grid.stable(a + ki * grid.b, k, ki, 0.0),
                               extra))
        return np.array(out)

    kps = np.linspace(0.0, kp_hi, 81)[1:]
    kis = f(kps)
    j = int(np.argmax(kis))
    lo, hi = kps[max(j - 1, 0)], kps[min(j + 1, kps.size - 1)]
    res = scipy.optimize.minimize_scalar(lambda x: -float(f(np.array([x]))[0]), bounds=(lo, hi),
                                   method="bounded", options={"xatol": kp_hi * 1e-6})
    kp, ki = (res.x, -res.fun) if -res.fun > kis[j] else (kps[j], kis[j])
    if not (math.isfinite(ki) and ki > 0):
        where = "on every model and measured point" if len(plants) > 1 or points else \
            "on this model"
        raise ValueError(f"no stable PI reaches Ms <= {ms_target:g} {where}")
    return _verify(plants, points, PidGains(float(kp), float(ki), 0.0), ms_target, 10.0, ts)


def robust_pid_set(plants: Sequence[DelayedTF], points: Sequence[MeasuredPoint] = (),
                   ms_target: float = 1.4, n: float = 10.0, ts: float | None = None,
                   td_ti_max: float = 0.5, pi: RobustDesign | None = None) -> RobustDesign:
    """PID with derivative filter (Tf = Td/N) maximising ki subject to Ms <= ms_target on every
    plant and at every measured point (see `robust_pi_set`).

    For fixed (kp, kd) the largest ki follows in closed form (as for PI); (kp, kd) are searched
    on a grid, then refined by Nelder-Mead. Td/Ti is kept at most `td_ti_max` (Td = Ti/4 is the
    classical ratio; the bound keeps the optimiser off derivative-dominated designs whose gain
    rests on the filter). `pi`: the robust PI of the same problem if already computed (the
    PID never returns less than it). Raises ValueError when no stable PI meets the bound.
    """
    plants = tuple(plants)
    r = 1.0 / ms_target
    pi = robust_pi_set(plants, points, ms_target, ts) if pi is None else pi
    fine = _Grids.build(plants, ts, n, 2500, (1e-3, 200.0))
    coarse = _Grids.build(plants, ts, n, 2500, (1e-3, 200.0), step=4)
    pts = _Points.build(points, ts)
    ku_like, which = fine.kp_upper(0.0)  # ~ Ku of the most sensitive plant
    wr = reference_frequency(plants[which], ts)

    def f(kp: np.ndarray, kd: np.ndarray, use_coarse: bool = False) -> np.ndarray:
        grid = coarse if use_coarse else fine
        kp = np.atleast_1d(kp)[:, None]
        kd = np.atleast_1d(kd)[:, None]
        tf = np.where(kp > 0, kd / np.maximum(kp, 1e-300) / n, 0.0)
        _, db = controller_bases(grid.w[None, :], ts, tf)
        lpd = (kp + kd * db) * grid.g
        if pts.w.size:
            _, dbp = controller_bases(pts.w[None, :], ts, tf)
            apts = 1.0 + (kp + kd * dbp) * pts.gh
        # the disc condition only certifies designs whose loop has rolled off inside the grid
        # (else crossings beyond it go unseen): |L| < 0.5 at the top frequency, kp <= 4 Ku
        rolled = grid.rolled(lpd) & (kp[:, 0] > 0) & (kp[:, 0] <= 4.0 * ku_like)
        ki = np.full(kp.shape[0], -np.inf)
        for i in np.nonzero(rolled & (kd[:, 0] >= 0))[0]:
            p_, d_ = float(kp[i, 0]), float(kd[i, 0])
            a_ = 1.0 + lpd[i]
            extra = _point_exclusions(apts[i], pts.gb, pts.u, r) if pts.w.size else ()
            ki[i] = _ki_sup(a_, grid.b, r, lambda k, p_=p_, d_=d_, a_=a_, grid=grid:
                            grid.stable(a_ + k * grid.b, p_, k, d_), extra)
        # Td/Ti = kd ki / kp^2 <= td_ti_max
        cap = np.where(kd[:, 0] > 0, td_ti_max * kp[:, 0] ** 2 / np.maximum(kd[:, 0], 1e-300),
                       np.inf)
        ok = (kp[:, 0] > 0) & (kd[:, 0] >= 0)
        return np.where(ok, np.minimum(ki, cap), -np.inf)

    kp_grid = np.linspace(0.05, 1.6, 20) * ku_like
    kd_grid = np.linspace(0.0, 1.2, 20) * ku_like / wr
    kpm, kdm = np.meshgrid(kp_grid, kd_grid, indexing="ij")
    vals = f(kpm.ravel(), kdm.ravel(), use_coarse=True)
    j = int(np.argmax(vals))
    x0 = np.array([kpm.ravel()[j] / ku_like, kdm.ravel()[j] * wr / ku_like])
    best = (vals[j], kpm.ravel()[j], kdm.ravel()[j])
    if pi.gains.ki > best[0]:
        best = (pi.gains.ki, pi.gains.kp, 0.0)
        x0 = np.array([pi.gains.kp / ku_like, 0.0])

    def obj(x: np.ndarray) -> float:
        v = float(f(np.array([x[0] * ku_like]), np.array([max(x[1], 0.0) * ku_like / wr]))[0])
        return -v if np.isfinite(v) else 1e300

    res = scipy.optimize.minimize(obj, x0, method="Nelder-Mead",
                            options={"xatol": 1e-5, "fatol": 1e-9 * max(best[0], 1e-300),
                                     "maxiter": 400, "initial_simplex": None})
    if -res.fun > best[0]:
        best = (-res.fun, res.x[0] * ku_like, max(res.x[1], 0.0) * ku_like / wr)
    gains = PidGains(float(best[1]), float(best[0]), float(best[2]))
    out = _verify(plants, points, gains, ms_target, n, ts)
    if not out.stable or out.gains.ki < pi.gains.ki:
        return pi  # PI is the PID with kd = 0; never return less than it
    return out


def robust_pi(plant: DelayedTF, ms_target: float = 1.4, ts: float | None = None,
              points: Sequence[MeasuredPoint] = ()) -> RobustDesign:
    """`robust_pi_set` on one plant (and its measured points)."""
    return robust_pi_set((plant,), points, ms_target, ts)


def robust_pid(plant: DelayedTF, ms_target: float = 1.4, n: float = 10.0,
               ts: float | None = None, td_ti_max: float = 0.5,
               pi: RobustDesign | None = None,
               points: Sequence[MeasuredPoint] = ()) -> RobustDesign:
    """`robust_pid_set` on one plant (and its measured points)."""
    return robust_pid_set((plant,), points, ms_target, n, ts, td_ti_max, pi)
