"""Actuator dead zone from the PV swing at two or more relay amplitudes.

Behind a dead zone of half-width D (output units; |u| <= D moves nothing, beyond it the plant
sees u - sign(u) D) a relay of amplitude d drives the plant with d - D: a linear plant's
oscillation then scales with d - D (describing function of a relay with dead zone; Åström and
Hägglund, Advanced PID Control, ISA 2006, from memory). Every relay amplitude the experiment
ran at ("stage") gives the plant's response at its own oscillation frequency w_s as
G_s(D) = Y1 / U1(D), the first harmonics of the PV and of the output passed through the dead
zone. The same plant answers every stage, so D is the value that makes the stages agree once
the small change of frequency between them is allowed for (along the measured log-magnitude
slope). Pure functions over recorded arrays: t (s), y (PV units), u (output units, applied).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core.harmonics import fourier_coefficients

SIGNIFICANT_SIGMAS = 2.5  # a dead zone counts when it stands this many standard errors above 0
NEGLIGIBLE_FRACTION = 0.01  # ... and above this fraction of the relay amplitude (common
#                             practice, no source: below it Ku moves by less than 1 %)


def dead_zone(u: np.ndarray, width: float) -> np.ndarray:
    """What the plant sees behind a dead zone of half-width `width` (output units): 0 where
    |u| <= width, else u - sign(u) width (continuous dead zone)."""
    u = np.asarray(u, dtype=float)
    if width <= 0:
        return u
    return np.where(np.abs(u) <= width, 0.0, u - np.sign(u) * width)


@dataclass(frozen=True)
class Stage:
    """The steady cycles at one relay amplitude: sample indices [i_start, i_end) over whole
    cycles, each cycle's bounds, the relay's half-step d and bias (output units), the PV's
    first-harmonic amplitude (PV units) and the oscillation frequency w (rad/s)."""

    i_start: int
    i_end: int
    bounds: tuple[tuple[int, int], ...]
    amplitude_d: float
    bias: float
    amplitude_h1: float
    w: float


@dataclass(frozen=True)
class DeadZoneEstimate:
    """value: the dead zone (output units, >= 0; 0 when none was found), raw: the unclamped
    estimate, sigma: its standard error (output units), significant: it stands out from 0
    and matters, stages: the amplitudes (output units) it was measured at, note: how."""

    value: float
    raw: float
    sigma: float
    significant: bool
    stages: tuple[float, ...] = ()
    note: str = ""
    detail: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"value": self.value, "raw": self.raw, "uncertainty": self.sigma,
                "significant": self.significant, "stages": list(self.stages),
                "note": self.note, **self.detail}


def stages_from_cycles(t: np.ndarray, cycles: Sequence[Any]) -> list[Stage]:
    """Group consecutive relay cycles (objects with i_start, i_end, amplitude_d, bias,
    amplitude_h1, as autotune.core.analysis.Cycle) by their relay levels; each group's first
    cycle (the transient of the change) is left out, groups left empty are dropped."""
    groups: list[list[Any]] = []
    for c in cycles:
        if groups:
            last = groups[-1][-1]
            tol = 0.01 * max(abs(last.amplitude_d), 1e-12)
            if (abs(c.amplitude_d - last.amplitude_d) <= tol and abs(c.bias - last.bias) <= tol
                    and c.i_start == last.i_end):
                groups[-1].append(c)
                continue
        groups.append([c])
    out = []
    for g in groups:
        kept = g[1:]
        if not kept:
            continue
        i0, i1 = kept[0].i_start, kept[-1].i_end
        span = float(t[i1] - t[i0]) if i1 < t.size else float(t[-1] - t[i0])
        if not span > 0:
            continue
        out.append(Stage(i0, i1, tuple((c.i_start, c.i_end) for c in kept),
                         float(np.mean([c.amplitude_d for c in kept])),
                         float(np.mean([c.bias for c in kept])),
                         float(np.mean([c.amplitude_h1 for c in kept])),
                         2.0 * math.pi * len(kept) / span))
    return out


def _log_gain(t: np.ndarray, y: np.ndarray, u: np.ndarray, i0: int, i1: int, w: float,
              ts: float, width: float, simulate: Any = None,
              cache: dict[float, np.ndarray] | None = None) -> float:
    """ln |Y1 / U1| over [i0, i1) at w; with `simulate`, ln |Y1 / Y1_model| instead, the
    model driven by the output behind the dead zone from the record's start."""
    if simulate is None:
        yk, uk = fourier_coefficients(t[i0:i1], y[i0:i1] - float(np.mean(y[i0:i1])),
                                      dead_zone(u[i0:i1], width), w, ts)
        return math.log(max(abs(yk), 1e-300) / max(abs(uk), 1e-300))
    key = round(width, 15)
    ym = cache.get(key) if cache is not None else None
    if ym is None:
        ym = np.asarray(simulate(dead_zone(u, width)), dtype=float)
        if cache is not None:
            cache[key] = ym
    yk, _ = fourier_coefficients(t[i0:i1], y[i0:i1] - float(np.mean(y[i0:i1])),
                                 u[i0:i1], w, ts)
    mk, _ = fourier_coefficients(t[i0:i1], ym[i0:i1] - float(np.mean(ym[i0:i1])),
                                 u[i0:i1], w, ts)
    return math.log(max(abs(yk), 1e-300) / max(abs(mk), 1e-300))


def estimate_dead_zone(t: np.ndarray, y: np.ndarray, u: np.ndarray, stages: Sequence[Stage],
                       ts: float, gain_at: Any = None, slope: float = -1.0,
                       simulate: Any = None) -> DeadZoneEstimate | None:
    """Dead zone from the stages (see the module docstring); None with fewer than two stages
    whose amplitudes differ by 5 % or more.

    Every stage's response is brought to the last stage's frequency w_ref: with `gain_at`
    (a function w (rad/s) -> |G(j w)|, e.g. a fitted model's) by ln|G(w_ref)| - ln|G(w_s)|,
    else along `slope`, the log-magnitude slope d ln|G| / d ln w near the oscillation (from
    the measured harmonics; -1 when unknown). The standard error comes from the cycle-to-cycle
    scatter of each stage's response and a third of the frequency correction (a tenth with a
    model; common practice, no source).

    simulate: a function from an output record (output units, the whole record) to the PV a
    fitted linear model predicts (PV units, from the record's start). When given, each stage's
    response is measured against the model's prediction for the output behind the trial dead
    zone instead of against the output itself: the model carries the stages' transients and
    their frequencies, and only its shape matters (a wrong gain is common to all stages).
    """
    st = [s for s in stages if s.amplitude_d > 0]
    if len(st) < 2:
        return None
    ds = [s.amplitude_d for s in st]
    if max(ds) - min(ds) < 0.05 * max(ds):
        return None
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    w_ref = st[-1].w
    cache: dict[float, np.ndarray] = {}
    if simulate is not None:
        corr = [0.0 for _ in st]
    elif gain_at is not None:
        g_ref = math.log(float(gain_at(w_ref)))
        corr = [g_ref - math.log(float(gain_at(s.w))) for s in st]
    else:
        corr = [slope * math.log(w_ref / s.w) for s in st]
    # the dead zone cannot swallow a relay level of any stage
    levels = [min(abs(s.bias + s.amplitude_d), abs(s.bias - s.amplitude_d)) for s in st]
    hi = 0.95 * min(levels + [min(ds)])

    def spread(width: float) -> float:
        g = [_log_gain(t, y, u, s.i_start, s.i_end, s.w, ts, width, simulate, cache) + c
             for s, c in zip(st, corr, strict=True)]
        return float(np.var(g))

    def diff(width: float) -> float:  # two-stage form: largest minus smallest amplitude
        a, b = st[int(np.argmax(ds))], st[int(np.argmin(ds))]
        ca, cb = corr[st.index(a)], corr[st.index(b)]
        return (_log_gain(t, y, u, a.i_start, a.i_end, a.w, ts, width, simulate, cache) + ca
                - _log_gain(t, y, u, b.i_start, b.i_end, b.w, ts, width, simulate, cache) - cb)

    if hi <= 0:
        return None
    # assuming too small a dead zone leaves the small stage's response low (its true drive,
    # d - D, is the smaller share of d): diff falls as the assumed width grows, through 0 at D
    f0, f1 = diff(0.0), diff(hi)
    if len(st) > 2:
        res = scipy.optimize.minimize_scalar(spread, bounds=(0.0, hi), method="bounded",
                                       options={"xatol": 1e-6 * max(ds)})
        raw = float(res.x)
    elif f0 > 0 > f1:
        raw = float(scipy.optimize.brentq(diff, 0.0, hi, xtol=1e-9 * max(ds), maxiter=100))
    elif f0 > 0:
        return None  # no dead zone below the smaller relay level explains the stages
    else:  # no dead zone: the estimate lies below 0; extrapolate the relation linearly
        h = 1e-3 * max(ds)
        der = (diff(h) - f0) / h
        raw = -f0 / der if der < 0 else 0.0
    # standard error: cycle scatter of each stage's ln|G| and a third of the frequency term
    var = 0.0
    for s in st:
        per = [_log_gain(t, y, u, i0, i1, s.w, ts, max(raw, 0.0), simulate, cache)
               for i0, i1 in s.bounds]
        var += float(np.var(per, ddof=1)) / len(per) if len(per) >= 2 else 0.01 ** 2
    if simulate is None:
        var += (max(abs(c) for c in corr) / (10.0 if gain_at is not None else 3.0)) ** 2
    h = 1e-3 * max(ds)
    x = max(raw, 0.0)
    der = abs(diff(x + h) - diff(x)) / h
    sigma = math.sqrt(var) / der if der > 0 else math.inf
    value = max(raw, 0.0)
    significant = (value > SIGNIFICANT_SIGMAS * sigma and
                   value > NEGLIGIBLE_FRACTION * max(ds))
    note = (f"from the PV swing at {len(st)} relay amplitudes "
            f"({', '.join(f'{d:.3g}' for d in ds)})")
    return DeadZoneEstimate(value if significant else 0.0, raw, sigma, significant,
                            tuple(ds), note, {"measured": value, "slope": slope})


def holding_dead_zone(u: np.ndarray, stages: Sequence[Stage], u_hold: float,
                      ts: float) -> DeadZoneEstimate | None:
    """Dead zone of an integrating loop from the mean output at each relay amplitude.

    An integrating loop oscillates steadily only when the mean drive the plant sees equals the
    output that holds its PV still (u_hold, output units: the output at rest when the PV did
    not drift). Behind a dead zone D an asymmetric relay's mean output is not that (its steps
    shrink by D each), so at every stage D solves mean(dead_zone(u, D)) = u_hold. Stages that
    agree (within 3 standard errors: the cycles' scatter of the mean, or a switch moved by a
    tick) give the estimate; stages that disagree, or have no solution, say the loop is not
    integrating (or not behind a plain dead zone): None. The first cycle of a stage is left
    out (stages_from_cycles).
    """
    u = np.asarray(u, dtype=float)
    if len(stages) < 2:
        return None
    ests: list[tuple[float, float]] = []
    for s in stages:
        seg = u[s.i_start:s.i_end]
        hi = 0.95 * min(abs(s.bias + s.amplitude_d), abs(s.bias - s.amplitude_d),
                        s.amplitude_d)
        if not hi > 0 or seg.size < 4:
            return None
        span = seg.size * ts
        per = [(i0, i1) for i0, i1 in s.bounds]

        def f(x: float, seg: np.ndarray = seg) -> float:
            return float(np.mean(dead_zone(seg, x))) - u_hold

        # the window's two ends sit on switches, each known to within a tick (uniform)
        sig_mean = 2.0 * s.amplitude_d * ts / (span * math.sqrt(6.0))
        if len(per) >= 2:
            means = [float(np.mean(dead_zone(u[i0:i1], 0.0))) for i0, i1 in per]
            sig_mean = max(sig_mean, float(np.std(means, ddof=1)) / math.sqrt(len(means)))
        f0, f1 = f(0.0), f(hi)
        h = 1e-3 * s.amplitude_d
        if abs(f0) <= 3.0 * sig_mean:
            x = 0.0
        elif f0 * f1 < 0:
            x = float(scipy.optimize.brentq(f, 0.0, hi, xtol=1e-9 * s.amplitude_d))
        else:
            return None
        der = abs(f(x + h) - f(max(x - h, 0.0))) / (x + h - max(x - h, 0.0))
        if not der > 0:
            return None
        ests.append((x, sig_mean / der))
    for i in range(len(ests)):
        for j in range(i + 1, len(ests)):
            if abs(ests[i][0] - ests[j][0]) > 3.0 * math.hypot(ests[i][1], ests[j][1]):
                return None
    wts = [1.0 / max(sg, 1e-12) ** 2 for _, sg in ests]
    value = sum(w * x for (x, _), w in zip(ests, wts, strict=True)) / sum(wts)
    sigma = 1.0 / math.sqrt(sum(wts))
    ds = tuple(s.amplitude_d for s in stages)
    significant = value > SIGNIFICANT_SIGMAS * sigma and value > NEGLIGIBLE_FRACTION * max(ds)
    return DeadZoneEstimate(value if significant else 0.0, value, sigma, significant, ds,
                            f"from the mean output at {len(stages)} relay amplitudes "
                            "(integrating loop)", {"measured": value})
