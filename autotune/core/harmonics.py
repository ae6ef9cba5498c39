"""Frequency-response points from the harmonics of a sampled relay limit cycle.

In periodic steady state the ratio of the PV's and the output's k-th Fourier coefficients is
the plant's frequency response G(j k w). The output is recorded as samples u[n] held over
[t_n, t_n + ts) (zero-order hold), so its continuous Fourier coefficient is taken exactly,
hold included; the PV is the plant output sampled at t_n. The points are therefore the
continuous plant's response, without the hold's delay of about ts/2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class FourierPoint:
    """G(j w) of the plant at w (rad/s), harmonic number k, and its signal-to-noise ratio."""

    harmonic: int
    w: float
    g: complex
    snr: float

    def as_dict(self) -> dict[str, float]:
        return {"harmonic": self.harmonic, "w": self.w, "magnitude": float(abs(self.g)),
                "phase_deg": float(np.degrees(np.angle(self.g))), "snr": self.snr}


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
                   noise_std: float, harmonics: tuple[int, ...] = (1, 3, 5),
                   min_snr: float = 5.0) -> list[FourierPoint]:
    """Plant frequency response at k w for each harmonic k whose PV component beats the noise.

    t, y, u: samples over a whole number of cycles (s, PV units, output units); w: the
    oscillation's angular frequency (rad/s); ts: tick (s); noise_std: PV noise (PV units);
    harmonics: which k to try; min_snr: keep a point when |Y_k| / (noise_std / sqrt(n / 2))
    reaches this (the first harmonic is always kept).
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
        points.append(FourierPoint(k, wk, yk / uk, snr))
    return points
