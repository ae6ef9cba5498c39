"""Frequency-response points from the harmonics of a sampled relay limit cycle.

In periodic steady state the ratio of the PV's and the output's k-th Fourier coefficients is
the plant's frequency response G(j k w). The output is recorded as samples u[n] held over
[t_n, t_n + ts) (zero-order hold), so its continuous Fourier coefficient is taken exactly,
hold included; the PV is the plant output sampled at t_n. The points are therefore the
continuous plant's response, without the hold's delay of about ts/2.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

POINT_FLOOR = 0.01  # relative: what a record that is periodic to the eye still leaves
#                     (transient remnant, jitter), per point; common practice, no source


@dataclass(frozen=True)
class FourierPoint:
    """G(j w) of the plant at w (rad/s), harmonic number k, its signal-to-noise ratio and its
    relative uncertainty (one standard deviation of |G - G_true| / |G|: noise, the spread over
    the cycles and a floor)."""

    harmonic: int
    w: float
    g: complex
    snr: float
    uncertainty: float = 0.0

    def as_dict(self) -> dict[str, float]:
        return {"harmonic": self.harmonic, "w": self.w, "magnitude": float(abs(self.g)),
                "phase_deg": float(np.degrees(np.angle(self.g))), "snr": self.snr,
                "re": float(self.g.real), "im": float(self.g.imag),
                "uncertainty": self.uncertainty}


def fourier_coefficients(t: np.ndarray, y: np.ndarray, u: np.ndarray, w: float, ts: float
                         ) -> tuple[complex, complex]:
    """(Y, U): Fourier coefficients at w (rad/s) of the sampled y and of the held u.

    Y = (1/n) sum y[n] e^{-j w t_n}; U = (1/n) sum u[n] e^{-j w t_n} (1 - e^{-j w ts})/(j w ts),
    the exact coefficient of the piecewise-constant output over the window.
    """
    ph = w * (t - t[0])
    c, s = np.cos(ph), np.sin(ph)
    n = t.size
    hold = (1 - np.exp(-1j * w * ts)) / (1j * w * ts)
    # element-wise products and sums, not BLAS dot: threaded BLAS stalls on a busy machine
    yk = complex(float(np.sum(y * c)), -float(np.sum(y * s))) / n
    uk = complex(float(np.sum(u * c)), -float(np.sum(u * s))) / n
    return yk, complex(uk * hold)


def fourier_points(t: np.ndarray, y: np.ndarray, u: np.ndarray, w: float, ts: float,
                   noise_std: float, harmonics: tuple[int, ...] = (1, 2, 3, 4, 5),
                   min_snr: float = 5.0) -> list[FourierPoint]:
    """Plant frequency response at k w for each harmonic k whose PV component beats the noise.

    t, y, u: samples over a whole number of cycles (s, PV units, output units); w: the
    oscillation's angular frequency (rad/s); ts: tick (s); noise_std: PV noise (PV units);
    harmonics: which k to try (even ones stand out only under an asymmetric relay); min_snr:
    keep a point when |Y_k| / (noise_std / sqrt(n / 2)) reaches this (the first harmonic is
    always kept). The uncertainty is 1 / snr and the floor POINT_FLOOR (`with_spread` adds
    the spread over the cycles).
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float) - float(np.mean(y))
    u = np.asarray(u, dtype=float) - float(np.mean(u))
    n = t.size
    floor = max(noise_std, 1e-12 * max(float(np.max(np.abs(y))), 1e-300)) / np.sqrt(n / 2)
    points: list[FourierPoint] = []
    for k in harmonics:
        wk = k * w
        if wk * ts >= np.pi:  # at or above Nyquist
            break
        yk, uk = fourier_coefficients(t, y, u, wk, ts)
        snr = float(abs(yk) / floor)
        if abs(uk) == 0.0 or (k != harmonics[0] and snr < min_snr):
            continue
        unc = math.hypot(1.0 / snr if snr > 0 else math.inf, POINT_FLOOR)
        points.append(FourierPoint(k, wk, yk / uk, snr, unc))
    return points


def with_spread(points: list[FourierPoint], t: np.ndarray, y: np.ndarray, u: np.ndarray,
                bounds: list[tuple[int, int]], ts: float) -> list[FourierPoint]:
    """The points with the spread over cycles added to their uncertainty.

    bounds: (i_start, i_end) sample indices of each steady cycle (one cycle each). The point is
    computed over each cycle alone at the same frequency; the rms difference of those values
    from the point, over the square root of the number of cycles and relative to the point, is
    added in quadrature. Fewer than two cycles: the points are returned as they are.
    """
    if len(bounds) < 2:
        return points
    out = []
    for p in points:
        vals = []
        for i0, i1 in bounds:
            yk, uk = fourier_coefficients(t[i0:i1], y[i0:i1] - float(np.mean(y[i0:i1])),
                                          u[i0:i1] - float(np.mean(u[i0:i1])), p.w, ts)
            if abs(uk) > 0:
                vals.append(yk / uk)
        if len(vals) < 2:
            out.append(p)
            continue
        arr = np.array(vals)
        se = float(np.sqrt(np.mean(np.abs(arr - p.g) ** 2))) / math.sqrt(arr.size)
        rel = se / max(abs(p.g), 1e-300)
        out.append(replace(p, uncertainty=math.hypot(p.uncertainty, rel)))
    return out


def phase_crossing(points: list[FourierPoint]) -> tuple[float, float] | None:
    """Ultimate gain (output units per PV unit) and period (s) from measured points alone.

    The fundamental and the next point above it in frequency, the phase taken as falling with
    frequency between them, interpolated (or extrapolated by up to half the stretch) linearly
    in log frequency for -180 degrees, the magnitude in log magnitude. The fundamental of a
    relay oscillation sits just below the phase crossover (hysteresis), so the stretch is
    short. None without a second point or when -180 degrees lies outside that range.
    """
    p1 = next((p for p in points if p.harmonic == 1), None)
    above = sorted((p for p in points if p1 is not None and p.w > p1.w), key=lambda p: p.w)
    if p1 is None or not above:
        return None
    p2 = above[0]
    ph1, dph = _falling_phases(p1, p2)
    if dph == 0.0:
        return None
    frac = (-math.pi - ph1) / dph
    if not -0.5 <= frac <= 1.0:
        return None
    la, lb = math.log(p1.w), math.log(p2.w)
    lw = la + frac * (lb - la)
    lg = (1 - frac) * math.log(abs(p1.g)) + frac * math.log(abs(p2.g))
    return math.exp(-lg), 2.0 * math.pi / math.exp(lw)


def local_ultimate(p1: FourierPoint, p2: FourierPoint | None = None) -> tuple[float, float]:
    """Ultimate gain (output units per PV unit) and period (s) extrapolated from the
    fundamental `p1` of a relay oscillation to -180 degrees along the log-magnitude and phase
    slopes between p1 and a higher point `p2` (per unit of log frequency; the phase taken as
    falling with frequency; slopes clamped to what low-order loops show, magnitude slope in
    [-4, 0], phase slope in [-3 pi, -0.05]). Without p2 the fundamental itself is returned.

    The fundamental sits close below the crossover (hysteresis turns it by arcsin(eps / a)),
    so the extrapolation spans a short stretch and the slopes' errors matter little. A
    model-free figure, cheap enough for every live cycle.
    """
    w1 = p1.w
    if p2 is None or not abs(p2.g) > 0 or not p2.w > w1:
        return 1.0 / abs(p1.g), 2.0 * math.pi / w1
    ph1, dph = _falling_phases(p1, p2)
    span = math.log(p2.w / w1)
    q = min(max(dph / span, -3.0 * math.pi), -0.05)
    m = min(max(math.log(abs(p2.g) / abs(p1.g)) / span, -4.0), 0.0)
    dlw = (-math.pi - ph1) / q
    return 1.0 / (abs(p1.g) * math.exp(m * dlw)), 2.0 * math.pi / (w1 * math.exp(dlw))


def cycle_estimate(t: np.ndarray, y: np.ndarray, u: np.ndarray, ts: float,
                   noise_std: float = 0.0, cycles: int = 1) -> tuple[float, float] | None:
    """(Ku, Tu) of a stretch of whole relay cycles from its own harmonics (`local_ultimate`
    over the fundamental and the point at 3w, or 2w when that stands out more clearly; t, y, u
    over `cycles` whole cycles, s, PV units, output units); None for fewer than 8 samples."""
    t = np.asarray(t, dtype=float)
    if t.size < 8:
        return None
    period = float(t[-1] - t[0] + ts) / max(int(cycles), 1)
    pts = fourier_points(t, y, u, 2.0 * math.pi / period, ts, noise_std, harmonics=(1, 2, 3),
                         min_snr=5.0)
    higher = {p.harmonic: p for p in pts if p.harmonic > 1}
    p2 = higher.get(3)
    if 2 in higher and (p2 is None or higher[2].snr > 2.0 * p2.snr):
        p2 = higher[2]
    return local_ultimate(pts[0], p2)


def _falling_phases(p1: FourierPoint, p2: FourierPoint) -> tuple[float, float]:
    """The phase of p1 (rad, in (-2 pi, 0]) and the phase change from p1 to p2 (rad, <= 0):
    a loop's phase taken as falling with frequency."""
    ph1 = float(np.angle(p1.g))
    if ph1 > 0:
        ph1 -= 2.0 * math.pi
    dph = float(np.angle(p2.g / p1.g))
    if dph > 0:
        dph -= 2.0 * math.pi
    return ph1, dph
