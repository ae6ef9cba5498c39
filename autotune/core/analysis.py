"""Ultimate gain and period from a recorded relay oscillation, with uncertainty and a model.

Inputs are plain arrays from the device tick: t (s, device time), y = PV (PV units) read at
tick k, u = output (output units) decided from it and held over [t_k, t_k+1). Sign convention:
positive output makes the PV rise; relay state +1 = high output.

What is computed (see `analyse_relay`):
- cycles from the relay's own switch instants (output changes), transient cycles dropped;
- the plain describing-function figures (Åström and Hägglund 1984): identified point
  G(j w) = (pi a / 4 d) exp(j(-pi + arcsin(eps / a))), Ku = 4 d / (pi a), Tu = the period;
- Fourier points G(j k w), k = 1, 3, 5 (autotune.core.harmonics), the plant's exact response;
- a low-order model fitted to the sampled record (autotune.core.model); Ku, Tu at phase -180 deg
  of the fitted model, cross-checked against the Fourier points.

Delays in the figures (`delays_included`): the refined `ku`, `tu` and the model are those of the
continuous plant. The device tick's sample-and-hold (about ts/2 of extra delay) is modelled
exactly in the fit and taken *out*; `ku_with_hold`, `tu_with_hold` put it back (the loop a PID
running at that tick sees). The plain figures are read straight off the oscillation, so they
hold the hold's delay and the hysteresis shift.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from autotune.core.convergence import (
    cycles_to_converge,
    steady_converged,
    steady_tolerances,
    switch_jitter,
)
from autotune.core.harmonics import (
    FourierPoint,
    fourier_coefficients,
    fourier_points,
    local_ultimate,
    with_spread,
)
from autotune.core.lti import DelayedTF
from autotune.core.model import CANDIDATES, FittedModel, fit_models
from autotune.core.prechecks import smallest_step
from autotune.core.validation import DcPoint, check_model, point_allowance

DELAYS_INCLUDED = "plant"
FIT_SAMPLES = 3000  # records longer than this ...
FIT_CYCLES = 10  # ... have the model fitted through this many steady cycles only
DELAYS_NOTE = ("ultimate_gain, ultimate_period and model are the continuous plant's: the device "
               "tick's sample-and-hold (about ts/2) is modelled and excluded; "
               "*_with_hold figures include it; the plain describing-function figures include it and the "
               "hysteresis shift")


class AnalysisError(ValueError):
    """The record cannot be analysed (e.g. no complete relay cycle); message is actionable."""


class RelaySettingsLike(Protocol):
    """What the analysis reads from autotune.core.relay.RelaySettings (duck-typed)."""

    centre: float
    bias: float
    amplitude: float
    hysteresis: float


# ---------------------------------------------------------------------------- cycles
@dataclass(frozen=True)
class Cycle:
    """One relay cycle from an upward switch to the next (times s, PV units, output units).

    i_start, i_end: sample indices of the two upward switches (the cycle is [i_start, i_end));
    amplitude_pp: PV peak-to-peak; amplitude_h1: PV first-harmonic amplitude over the cycle;
    high_time / low_time: time at the high / low output; asymmetry: (high - low) / period;
    mean_pv, offset = mean_pv - centre; amplitude_d: half the output step; bias: mean of the
    two output levels.
    """

    index: int
    i_start: int
    i_end: int
    t_start: float
    t_end: float
    period: float
    amplitude_pp: float
    amplitude_h1: float
    high_time: float
    low_time: float
    asymmetry: float
    mean_pv: float
    offset: float
    amplitude_d: float
    bias: float


def switch_indices(u: np.ndarray, state: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Sample indices where the relay switched, and the new state (+1 high, -1 low).

    From a recorded relay state when given, else from the output: a rise is a switch to high,
    a fall a switch to low; repeated changes the same way (amplitude steps) are not switches.
    """
    if state is not None:
        s = np.sign(np.nan_to_num(np.asarray(state, dtype=float)))
    else:
        u = np.asarray(u, dtype=float)
        du = np.diff(u)
        idx = np.nonzero(du != 0)[0] + 1
        s = np.zeros(u.size)
        cur = 0.0
        last = 0
        for i in idx:
            s[last:i] = cur
            cur = 1.0 if u[i] > u[i - 1] else -1.0
            last = i
        s[last:] = cur
    change = np.nonzero(np.diff(s) != 0)[0] + 1
    change = change[s[change] != 0]
    return change, s[change]


def _segment_reduce(ufunc: np.ufunc, a: np.ndarray, starts: np.ndarray,
                    ends: np.ndarray) -> np.ndarray:
    """ufunc reduced over each a[starts[i]:ends[i]] (non-empty segments, ends <= a.size)."""
    ind = np.empty(2 * starts.size, dtype=np.intp)
    ind[0::2], ind[1::2] = starts, ends
    if ind[-1] == a.size:  # reduceat needs indices inside the array: the last end is implied
        return ufunc.reduceat(a, ind[:-1])[0::2]
    return ufunc.reduceat(a, ind)[0::2]


def _levels(u: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Median output (output units) of each u[starts[i]:ends[i]]; constant segments directly."""
    hi = _segment_reduce(np.maximum, u, starts, ends)
    lo = _segment_reduce(np.minimum, u, starts, ends)
    out = u[starts].astype(float)
    for k in np.nonzero(hi != lo)[0]:
        out[k] = float(np.median(u[starts[k]:ends[k]]))
    return out


def _raw_cycles(t: np.ndarray, y: np.ndarray, u: np.ndarray, ups: np.ndarray,
                downs: np.ndarray, centre: float) -> list[Cycle]:
    """Every cycle between consecutive upward switches with exactly one downward switch."""
    if ups.size < 2:
        return []
    i0s, i1s = ups[:-1], ups[1:]
    first_down = np.searchsorted(downs, i0s, side="right")
    n_down = np.searchsorted(downs, i1s, side="left") - first_down
    ok = n_down == 1
    if not ok.any():
        return []
    js = np.nonzero(ok)[0]
    i0, i1 = i0s[ok], i1s[ok]
    i_d = downs[first_down[ok]]
    n = (i1 - i0).astype(float)
    period = t[i1] - t[i0]
    high_time = t[i_d] - t[i0]
    mean = _segment_reduce(np.add, y, i0, i1) / n
    pp = _segment_reduce(np.maximum, y, i0, i1) - _segment_reduce(np.minimum, y, i0, i1)
    hi = _levels(u, i0, i_d)
    lo = _levels(u, i_d, i1)
    # first harmonic of each cycle's PV at its own frequency (autotune.core.harmonics'
    # coefficient, vectorised over the cycles)
    cid = np.repeat(np.arange(js.size), (i1 - i0))
    samp = np.concatenate([np.arange(a, b) for a, b in zip(i0, i1, strict=True)]) \
        if js.size < ups.size - 1 else np.arange(i0[0], i1[-1])
    ph = 2 * math.pi * (t[samp] - t[i0][cid]) / period[cid]
    yc = y[samp] - mean[cid]
    starts = np.concatenate([[0], np.cumsum(i1 - i0)[:-1]])
    re = np.add.reduceat(yc * np.cos(ph), starts) / n
    im = np.add.reduceat(yc * np.sin(ph), starts) / n
    h1 = 2 * np.hypot(re, im)
    return [Cycle(index=int(js[k]), i_start=int(i0[k]), i_end=int(i1[k]),
                  t_start=float(t[i0[k]]), t_end=float(t[i1[k]]), period=float(period[k]),
                  amplitude_pp=float(pp[k]), amplitude_h1=float(h1[k]),
                  high_time=float(high_time[k]), low_time=float(period[k] - high_time[k]),
                  asymmetry=float((2 * high_time[k] - period[k]) / period[k]),
                  mean_pv=float(mean[k]), offset=float(mean[k] - centre),
                  amplitude_d=float((hi[k] - lo[k]) / 2), bias=float((hi[k] + lo[k]) / 2))
            for k in range(js.size)]


def extract_cycles(t: np.ndarray, y: np.ndarray, u: np.ndarray, *, centre: float = 0.0,
                   state: np.ndarray | None = None, drop_transient: int = 1,
                   level_tol: float = 0.01, tick: float | None = None, noise_std: float = 0.0,
                   resolution: float = 0.0, hysteresis: float = 0.0) -> list[Cycle]:
    """Relay cycles from the switch instants, transients dropped.

    Drops the first `drop_transient` cycles of the record and every cycle that does not start
    after the output last left the final levels (within `level_tol` of the step: amplitude
    adaptation, bias balancing, the rest before the relay), as the relay's own "settled"
    cycles. Then leading
    cycles are dropped while their period or first-harmonic amplitude stands out from the
    later half's median by more than the measurement can explain (`steady_tolerances`: tick
    (s), PV noise std and resolution, hysteresis (PV units); default tick: the median sample
    spacing), so steady cycles that differ only by switching jitter or quantisation are kept.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    idx, new = switch_indices(u, state)
    ups = idx[new > 0]
    downs = idx[new < 0]
    raw = _raw_cycles(t, y, u, ups, downs, centre)
    if not raw:
        return []
    final_d, final_b = raw[-1].amplitude_d, raw[-1].bias
    scale = max(abs(final_d), 1e-300)
    keep_from = drop_transient
    # the last sample off the final output levels (rest before the relay, amplitude or bias
    # still changing): cycles from then on must start after the new levels took effect
    tol_u = level_tol * scale
    head = u[:raw[-1].i_end]
    off = np.nonzero((np.abs(head - (final_b + final_d)) > tol_u) &
                     (np.abs(head - (final_b - final_d)) > tol_u))[0]
    if off.size:
        last_off = int(off[-1])
        keep_from = max(keep_from, next((k for k, c in enumerate(raw)
                                         if c.i_start > last_off + 1), len(raw)))
    kept = raw[keep_from:]
    # periodic steady state: drop leading cycles whose period or amplitude stand out from the
    # later half's median (tolerance: that half's own spread, at least 1%, widened to what
    # the tick, noise and resolution can resolve)
    if len(kept) >= 4:
        if tick is None:
            tick = float(np.median(np.diff(t))) if t.size > 1 else 0.0
        late = kept[len(kept) // 2:]
        tol_p, tol_a = steady_tolerances(float(np.median([c.period for c in late])),
                                         float(np.median([c.amplitude_pp for c in late])),
                                         tick=tick, noise_std=noise_std,
                                         resolution=resolution, hysteresis=hysteresis)
        lead = 0
        for attr, tol_m in (("period", tol_p), ("amplitude_h1", tol_a)):
            vals = np.array([getattr(c, attr) for c in late])
            ref = float(np.median(vals))
            spread = 1.4826 * float(np.median(np.abs(vals - ref))) / ref
            tol = max(0.01, 4 * spread, tol_m)
            k = 0
            while k < len(kept) // 2 and abs(getattr(kept[k], attr) - ref) > tol * ref:
                k += 1
            lead = max(lead, k)
        kept = kept[lead:]
    return kept


# ---------------------------------------------------------------------------- plain figures
def describing_function_point(amplitude_d: float, a: float, hysteresis: float = 0.0) -> complex:
    """Identified G(j w) of a relay oscillation (Åström and Hägglund 1984).

    amplitude_d: relay half-step (output units); a: PV oscillation amplitude, half the
    peak-to-peak (PV units); hysteresis: eps (PV units, < a). Returns
    (pi a / 4 d) exp(j(-pi + arcsin(eps / a))) = -1 / N(a) for the relay with hysteresis.
    """
    if a <= 0 or amplitude_d <= 0:
        raise ValueError("amplitude and relay step must be positive")
    if hysteresis >= a:
        raise ValueError("hysteresis must be smaller than the oscillation amplitude")
    return complex(math.pi * a / (4 * amplitude_d) *
                   np.exp(1j * (-math.pi + math.asin(hysteresis / a))))


def df_estimate(cycles: Sequence[Cycle], amplitude_d: float | None = None,
                hysteresis: float = 0.0) -> tuple[float, float]:
    """Plain describing-function Ku = 4 d / (pi a) (output/PV units) and Tu = mean period (s).

    a is the mean half peak-to-peak, d the mean relay half-step (or `amplitude_d`); the
    hysteresis only turns the identified point's phase, not its magnitude.
    """
    if not cycles:
        raise AnalysisError("no complete relay cycle")
    a = float(np.mean([c.amplitude_pp for c in cycles])) / 2
    d = float(np.mean([c.amplitude_d for c in cycles])) if amplitude_d is None else amplitude_d
    return df_ultimate_gain(d, a, hysteresis), float(np.mean([c.period for c in cycles]))


def df_ultimate_gain(amplitude_d: float, a: float, hysteresis: float = 0.0) -> float:
    """Plain describing-function Ku = 4 d / (pi a) (output units per PV unit) of one
    oscillation: d the relay half-step, a half the PV peak-to-peak (NaN when a <= 0)."""
    if a <= 0:
        return math.nan
    return 1.0 / abs(describing_function_point(amplitude_d, a, min(hysteresis, 0.999 * a)))


# ---------------------------------------------------------------------------- noise
def estimate_noise(y: np.ndarray) -> float:
    """PV noise standard deviation (PV units) from the second differences (robust: MAD)."""
    d2 = np.diff(np.asarray(y, dtype=float), 2)
    if d2.size < 4:
        return 0.0
    mad = float(np.median(np.abs(d2 - np.median(d2))))
    return 1.4826 * mad / math.sqrt(6.0)


def relay_cycles(t: np.ndarray, y: np.ndarray, u: np.ndarray, *, centre: float = 0.0,
                 state: np.ndarray | None = None) -> list[Cycle]:
    """Every complete relay cycle of the record (transients included), in order."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    idx, new = switch_indices(u, state)
    return _raw_cycles(t, y, u, idx[new > 0], idx[new < 0], centre)


# ---------------------------------------------------------------------------- static gain
def dc_point(t: np.ndarray, y: np.ndarray, u: np.ndarray, cycles: Sequence[Cycle],
             operating_point: tuple[float, float], *, ts: float, noise_std: float,
             resolution: float = 0.0) -> DcPoint:
    """Static gain from the mean PV and output over whole steady periods (asymmetric relay).

    In periodic steady state the mean PV change from the operating point (y_op, PV units) over
    whole periods is the static gain times the mean output change from u_op (output units):
    K = mean(y - y_op) / mean(u - u_op) (Berner, Hägglund and Åström, "Asymmetric relay
    autotuning - practical features for industrial use", Control Engineering Practice 54,
    2016). The output's mean is known to within the switching jitter (`switch_jitter`), the
    PV's to within its noise and its cycle-to-cycle scatter; a mean PV still drifting between
    the first and the second half of the cycles (a slow lag not yet settled) widens the
    uncertainty by that drift and marks the point unsettled.
    """
    y_op, u_op = operating_point
    i0, i1 = cycles[0].i_start, cycles[-1].i_end
    span = float(t[i1] - t[i0]) if i1 < t.size else float(t[-1] - t[i0] + ts)
    du = float(np.mean(u[i0:i1])) - u_op
    dy = float(np.mean(y[i0:i1])) - y_op
    n = len(cycles)
    per_y = np.array([float(np.mean(y[c.i_start:c.i_end])) for c in cycles])
    step = float(np.mean([2.0 * c.amplitude_d for c in cycles]))
    # the output is known exactly; its mean over the window is off only by where the window
    # ends: each edge sits on a switch known to within a tick (uniform)
    du_sigma = max(step * ts / (span * math.sqrt(6.0)), 1e-12 * max(abs(u_op), step))
    dy_sigma = max(noise_std / math.sqrt(max(i1 - i0, 1)),
                   float(np.std(per_y, ddof=1)) / math.sqrt(n) if n > 1 else 0.0)
    if n >= 2:
        half = n // 2
        drift = abs(float(np.mean(per_y[n - half:]) - np.mean(per_y[:half])))
    else:
        drift = 0.0
    settled = n >= 2 and drift <= 3.0 * dy_sigma * math.sqrt(2.0) + 0.5 * resolution
    dy_sigma = math.hypot(dy_sigma, 0.0 if settled else 2.0 * drift)
    gain = None
    sigma = math.inf
    if abs(du) > 4.0 * du_sigma:
        gain = dy / du
        sigma = abs(gain) * math.hypot(dy_sigma / max(abs(dy), 1e-300), du_sigma / abs(du))
        sigma = max(sigma, dy_sigma / abs(du))
    return DcPoint(gain, sigma, du, du_sigma, settled,
                   {"mean_pv_shift": dy, "mean_pv_shift_uncertainty": dy_sigma,
                    "mean_pv_drift": drift, "cycles": n}, dy=dy, dy_sigma=dy_sigma)


def normalized_dead_time(cycles: Sequence[Cycle], amp_high: float, amp_low: float,
                         ts: float, noise_std: float = 0.0, resolution: float = 0.0,
                         hysteresis: float = 0.0) -> tuple[float, float] | None:
    """tau = L / (L + T) of a first-order-plus-dead-time picture of the loop, from the
    half-period ratio rho of an asymmetric relay with output steps gamma = amp_high / amp_low
    > 1 (output units, effective steps): tau = (gamma - rho) / ((gamma - 1)(0.35 rho + 0.65))
    with rho = low half / high half (Berner, Hägglund and Åström, "Improved relay autotuning
    using normalized time delay", ACC 2016). Returns (tau clamped to [0, 1], its standard
    error from the switching jitter), or None for a relay too close to symmetric.
    """
    if not (amp_low > 0 and amp_high > amp_low * 1.05):
        return None
    gamma = amp_high / amp_low
    high = float(np.mean([c.high_time for c in cycles]))
    low = float(np.mean([c.low_time for c in cycles]))
    if not (high > 0 and low > 0):
        return None
    rho = low / high

    def tau_of(r: float) -> float:
        return (gamma - r) / ((gamma - 1.0) * (0.35 * r + 0.65))

    a = float(np.mean([c.amplitude_pp for c in cycles])) / 2
    sd = switch_jitter(a, high + low, hysteresis, noise_std, resolution, ts)
    # rho = low / high; each half is two switches apart, the means over the cycles
    n = len(cycles)
    sd_rho = rho * math.sqrt(2.0) * sd / math.sqrt(n) * math.hypot(1.0 / high, 1.0 / low)
    if n >= 2:
        rhos = np.array([c.low_time / c.high_time for c in cycles if c.high_time > 0])
        if rhos.size >= 2:
            sd_rho = max(sd_rho, float(np.std(rhos, ddof=1)) / math.sqrt(rhos.size))
    tau = tau_of(rho)
    sd_tau = abs(tau_of(rho + sd_rho) - tau_of(rho - sd_rho)) / 2.0
    return min(max(tau, 0.0), 1.0), sd_tau


# ---------------------------------------------------------------------------- result
@dataclass(frozen=True)
class RelayAnalysis:
    """Everything the analysis found. Gains output units per PV unit, periods s.

    ku, tu: refined (continuous plant, hold excluded): from the model when it reproduces what
    was measured (`model.reliable`), else from the measured points alone
    (autotune.core.harmonics.local_ultimate); ku_df, tu_df: plain describing function;
    ku_with_hold, tu_with_hold: refined with the tick's ts/2 hold delay; uncertainty:
    relative, per figure (cycle spread, noise and a heuristic model-extrapolation term from
    the model's miss at the Fourier points); fourier: plant points at w, 2w .. 5w with their
    uncertainty; dc: the static gain measured from the mean PV and output (asymmetric relay;
    None without an operating point); estimates: per cycle, that cycle's plain figures and its
    refined ones (the cycle's plain figures times the whole record's refined/plain ratio);
    warnings: actionable one-line messages; cycles_to_converge: steady cycles the
    convergence test needed (None: it never held).
    """

    ku: float
    tu: float
    ku_df: float
    tu_df: float
    ku_with_hold: float
    tu_with_hold: float
    uncertainty: dict[str, float]
    model: FittedModel
    cycles_used: int
    converged: bool
    estimates: list[dict[str, float]]
    warnings: list[str]
    fourier: list[FourierPoint]
    delays_included: str
    ts: float
    noise_std: float
    hysteresis: float
    amplitude_d: float
    bias: float
    centre: float
    amplitude: float  # PV oscillation amplitude, half peak-to-peak (PV units)
    model_mismatch: dict[int, float] = field(default_factory=dict)
    cycles: list[Cycle] = field(default_factory=list)
    dc: DcPoint | None = None
    tau: tuple[float, float] | None = None
    cycles_to_converge: int | None = None
    resolution: float = 0.0
    record_span: float = 0.0
    likely_cause: str | None = None
    fit_from: int = 0  # first sample of the fit's residual window (0: the record from rest)


def _phase_below_zero(g: complex) -> float:
    ph = float(np.angle(g))
    return ph - 2 * math.pi if ph > 0 else ph


def _rest_at_start(y: np.ndarray, u: np.ndarray, noise: float, pp: float,
                   bias: float | None, step: float, half_period: float) -> bool:
    """True when the record starts at rest: output constant at the operating point, PV still.

    The first output level must be the bias (settings known) or, without settings, last
    longer than 1.5 relay half-periods (`half_period`, in samples): a record that opens on a
    relay level whose effect has not yet passed the dead time is not at rest. The still
    stretch must span at least a quarter of a relay half-period (a PV still for a few ticks
    says nothing about the plant's state, e.g. just after a precheck; common practice, no
    source).
    """
    moved = np.nonzero(u != u[0])[0]
    if moved.size == 0:
        return False
    first = int(moved[0])
    if first < 3 or first < 0.25 * half_period:
        return False
    seg = y[:first]
    if float(seg.max() - seg.min()) > max(6 * noise, 0.02 * pp):
        return False
    if bias is not None:
        return abs(float(u[0]) - bias) <= 0.01 * max(step, 1e-300)
    return first > 1.5 * half_period


def _resonance(points: Sequence[FourierPoint]) -> Any:
    """For fit_models: the frequency of the higher harmonic where the measured response
    stands most above a failed model (beyond what the point allows), or None."""

    def find(check: Any) -> float | None:
        best, w = 0.0, None
        for p in points:
            if p.harmonic < 2:
                continue
            miss = check.misses.get(p.harmonic) if check is not None else None
            if miss is None or miss <= point_allowance(p):
                continue
            if miss > best:
                best, w = miss, p.w
        return w

    return find


def analyse_relay(t: np.ndarray, y: np.ndarray, u: np.ndarray,
                  settings: RelaySettingsLike | None = None, *, noise_std: float | None = None,
                  ts: float | None = None, centre: float | None = None,
                  hysteresis: float | None = None, output_limit: float | None = None,
                  state: np.ndarray | None = None, drop_transient: int = 1,
                  converge_tol: float = 0.02, min_cycles: int = 2,
                  candidates: Sequence[str] = CANDIDATES, min_snr: float = 5.0,
                  resolution: float | None = None,
                  operating_point: tuple[float, float] | None = None,
                  modes: bool = True, at_rest: bool | None = None) -> RelayAnalysis:
    """Analyse a relay experiment: Ku, Tu (refined and plain), model, uncertainty, warnings.

    t (s), y (PV units), u (output units, as applied and held over each tick; the record may
    start with the rest and the direction pulse before the relay: a record from rest lets the
    model fit use every sample); settings: the relay settings as finally used (centre, bias,
    amplitude, hysteresis) or give `centre` and `hysteresis` (PV units) directly; noise_std:
    PV noise (PV units), estimated from the record when None; ts: tick (s), default the median
    sample spacing; output_limit: for the saturation warning; state: recorded relay state
    (+1/-1, NaN or 0 outside the relay) if available; resolution: PV quantisation step (PV
    units), the smallest PV step in the record when None (noise and resolution set how far
    steady cycles may differ: `extract_cycles`, convergence); converge_tol, min_cycles: the
    convergence test's (autotune.core.convergence); operating_point: (PV, output) at rest
    (PV units, output units), for the static gain measured from an asymmetric relay; modes:
    try the candidates with a lightly damped mode when nothing simpler reproduces the points;
    at_rest: the record starts at rest (the rest check saw the PV still at the first output),
    None: judged from the record (`_rest_at_start`).
    Raises AnalysisError when there is no complete steady relay cycle.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    if not (t.size == y.size == u.size) or t.size < 10:
        raise AnalysisError("need at least 10 samples with t, pv and out of equal length")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(y)) and np.all(np.isfinite(u))):
        raise AnalysisError("the record holds samples that are not numbers")
    if ts is None:
        ts = float(np.median(np.diff(t)))
    eps = float(hysteresis if hysteresis is not None else
                (settings.hysteresis if settings is not None else 0.0))
    c0 = float(centre if centre is not None else
               (settings.centre if settings is not None else np.median(y)))
    noise = float(estimate_noise(y) if noise_std is None else noise_std)
    res = float(smallest_step(y) if resolution is None else resolution)
    cycles = extract_cycles(t, y, u, centre=c0, state=state, drop_transient=drop_transient,
                            tick=ts, noise_std=noise, resolution=res, hysteresis=eps)
    if not cycles:
        raise AnalysisError("no complete steady relay cycle in the record: run the relay "
                            "longer (at least three cycles)")
    warnings: list[str] = []
    i0, i1 = cycles[0].i_start, cycles[-1].i_end
    n_cyc = len(cycles)
    w1 = 2 * math.pi * n_cyc / (t[i1] - t[i0])
    fourier = fourier_points(t[i0:i1], y[i0:i1], u[i0:i1], w1, ts, noise, min_snr=min_snr)
    fourier = with_spread(fourier, t, y, u, [(c.i_start, c.i_end) for c in cycles], ts)
    g1 = fourier[0].g
    ku_c, tu_c = df_estimate(cycles, hysteresis=eps)
    a = float(np.mean([c.amplitude_pp for c in cycles])) / 2
    d = float(np.mean([c.amplitude_d for c in cycles]))
    bias = float(np.mean([c.bias for c in cycles]))
    span = float(t[-1] - t[0] + ts)
    dc = (dc_point(t, y, u, cycles, operating_point, ts=ts, noise_std=noise, resolution=res)
          if operating_point is not None else None)

    half = 0.5 * float(np.mean([c.i_end - c.i_start for c in cycles]))
    if at_rest is None:
        at_rest = _rest_at_start(y, u, noise, 2 * a, settings.bias if settings is not None
                                 else None, d, half)
    end = t.size
    if t.size > FIT_SAMPLES and n_cyc > FIT_CYCLES:
        # long record: the model is fitted to its head, from the start through FIT_CYCLES
        # steady cycles (the rest repeats the same oscillation); the cycle figures, Fourier
        # points and uncertainty still use every steady cycle
        end = cycles[FIT_CYCLES - 1].i_end
    sl = slice(0, end)
    model = fit_models(t[sl], y[sl], u[sl], ts=ts, w1=w1, phase1=_phase_below_zero(g1),
                       fit_from=0 if at_rest else i0, candidates=candidates,
                       noise_floor=noise,
                       check=lambda tf: check_model(tf, fourier, dc, span),
                       resonance=_resonance(fourier) if modes else None,
                       input_offset=not at_rest)
    tf = model.tf
    mismatch = {p.harmonic: float(abs(complex(tf.freq_response(p.w)) - p.g) / abs(p.g))
                for p in fourier}
    higher = {p.harmonic: p for p in fourier if p.harmonic > 1}
    p2 = higher.get(3) or higher.get(2)
    ku_p, tu_p = local_ultimate(fourier[0], p2)
    up = tf.ultimate_point()
    likely_cause = None
    if not model.reliable:
        likely_cause = _likely_cause(model, fourier, dc)
        warnings.append(f"no model reproduces what was measured ({likely_cause}): the "
                        "ultimate gain and period come from the measured points alone and the "
                        "predicted figures are unreliable")
        ku, tu = ku_p, tu_p
        w180 = 2 * math.pi / tu
    elif up is None:
        warnings.append("the fitted model never reaches -180 degrees of phase: the refined "
                        "figures come from the measured points alone")
        ku, tu = ku_p, tu_p
        w180 = 2 * math.pi / tu
    else:
        ku, tu = up
        w180 = 2 * math.pi / tu
    hold = DelayedTF(tf.num, tf.den, tf.delay + ts / 2)
    up_h = hold.ultimate_point() if model.reliable else None
    if up_h is not None:
        ku_h, tu_h = up_h
    else:  # the hold's delay turns the phase by w ts / 2 at the crossover
        ku_h, tu_h = ku * (1.0 + 0.5 * w180 * ts / math.pi), tu * (1.0 + 0.5 * w180 * ts / math.pi)

    # ---- per-cycle estimates (the model's correction applied to each cycle's measurement)
    scale_k = ku / ku_c
    scale_t = tu / tu_c
    estimates = []
    for c in cycles:
        kc = 4 * c.amplitude_d / (math.pi * c.amplitude_pp / 2)
        estimates.append({"cycle": c.index, "t_end": c.t_end, "period": c.period,
                          "amplitude_pp": c.amplitude_pp, "ku_df": kc,
                          "tu_df": c.period, "ku": kc * scale_k, "tu": c.period * scale_t})
    measurement = {"hysteresis": eps, "tick": ts, "noise_std": noise, "resolution": res}
    converged = steady_converged(cycles, converge_tol, min_cycles=min_cycles, skip_first=False,
                                 **measurement)
    n_conv = cycles_to_converge(cycles, converge_tol, min_cycles=min_cycles, skip_first=False,
                                **measurement)

    # ---- uncertainty (relative): cycle spread, noise, model extrapolation (heuristic)
    kcs = np.array([e["ku_df"] for e in estimates])
    pcs = np.array([c.period for c in cycles])
    h1s = np.array([c.amplitude_h1 for c in cycles])
    if n_cyc >= 2:
        stat_mag = float(np.std(h1s, ddof=1) / np.mean(h1s)) / math.sqrt(n_cyc)
        stat_per = float(np.std(pcs, ddof=1) / np.mean(pcs)) / math.sqrt(n_cyc)
    else:
        stat_mag, stat_per = 0.05, 0.03
    noise_rel = noise / max(a, 1e-300) * math.sqrt(2.0 / max(i1 - i0, 1))
    m1 = mismatch.get(1, 0.0)
    higher_m = [v for k, v in mismatch.items() if k > 1]
    shift = abs(math.log(w180 / w1))
    model_err = (m1 + abs(max(higher_m) - m1) * shift / math.log(3.0)) if higher_m else \
        m1 + 0.25 * shift
    if not model.reliable:  # the points alone: the extrapolation's own error
        model_err = max(model_err, 0.5 * shift)
    dphi = math.sqrt(noise_rel**2 + model_err**2)
    slope_ph = abs(float(tf.phase(w180 * 1.001) - tf.phase(w180 * 0.999)) / (0.002 * w180))
    slope_mag = abs(math.log(abs(complex(tf.freq_response(w180 * 1.001))) /
                             abs(complex(tf.freq_response(w180 * 0.999)))) / (0.002 * w180))
    if not (math.isfinite(slope_ph) and slope_ph > 0):
        slope_ph = math.pi / w180
    if not math.isfinite(slope_mag):
        slope_mag = 1.0 / w180
    dw = dphi / max(slope_ph, 1e-300)
    unc_tu = math.sqrt((dw / w180) ** 2 + stat_per**2) + 1e-3
    unc_ku = math.sqrt(stat_mag**2 + noise_rel**2 + model_err**2 + (slope_mag * dw) ** 2) + 1e-3
    unc_c_ku = float(np.std(kcs, ddof=1) / np.mean(kcs)) / math.sqrt(n_cyc) if n_cyc > 1 else 0.05
    uncertainty = {"ultimate_gain": unc_ku, "ultimate_period": unc_tu,
                   "ultimate_gain_df": unc_c_ku + noise_rel + 1e-3,
                   "ultimate_period_df": stat_per + 1e-3}

    # ---- warnings a user can act on
    if n_cyc < 2:
        warnings.append(f"only {n_cyc} steady cycle(s) after the start-up: run more cycles "
                        "(raise max cycles or max time) for reliable figures")
    if noise > 0 and a / noise < 10:
        warnings.append(f"the oscillation (amplitude {a:.4g}) is only {a / noise:.1f} times the "
                        f"PV noise (std {noise:.3g}): raise the relay amplitude or the target "
                        "amplitude")
    y3 = [p for p in fourier if p.harmonic == 3]
    if y3:
        _, u1 = fourier_coefficients(t[i0:i1], y[i0:i1], u[i0:i1], w1, ts)
        _, u3 = fourier_coefficients(t[i0:i1], y[i0:i1], u[i0:i1], 3 * w1, ts)
        ratio = abs(y3[0].g * u3) / abs(g1 * u1)
        if ratio > 0.15:
            warnings.append(f"the PV carries a strong third harmonic ({100 * ratio:.0f}% of the "
                            "fundamental): the plain describing-function figures are "
                            "unreliable here; use the refined ones")
    asym = float(np.mean([c.asymmetry for c in cycles]))
    symmetric = settings is None or not getattr(settings, "asymmetry", 0.0)
    if abs(asym) > 0.05 and symmetric:
        hi_t = float(np.mean([c.high_time for c in cycles]))
        lo_t = float(np.mean([c.low_time for c in cycles]))
        warnings.append(f"half-periods differ by {100 * abs(asym):.0f}% (high {hi_t:.3g} s, low "
                        f"{lo_t:.3g} s): a static load (gravity, friction, a slope) offsets the "
                        "loop; let bias balancing finish or set the relay bias")
    planned = (settings.bias + settings.amplitude * (1 + getattr(settings, "asymmetry", 0.0))
               if settings is not None else -math.inf)
    if output_limit is not None and float(np.max(np.abs(u))) >= output_limit * (1 - 1e-9) \
            and planned > output_limit * (1 + 1e-9):
        warnings.append(f"the output reached the output limit ({output_limit:g}) during the "
                        "experiment (saturation): lower the relay amplitude or bias")
    elif settings is not None and settings.amplitude > 0 and \
            abs(d - settings.amplitude) > 0.02 * settings.amplitude:
        warnings.append(f"the output steps ({d:.4g}) differ from the relay amplitude "
                        f"({settings.amplitude:.4g}): the output saturated or was clamped")
    if not converged:
        warnings.append("the last cycles still differ (period or amplitude): the "
                        "oscillation had not settled; run more cycles")
    if model.reliable and m1 > 0.05:
        warnings.append(f"the fitted model misses the measured response at the oscillation by "
                        f"{100 * m1:.0f}%: check for backlash, friction or a changing load")
    if eps > 0.5 * a:
        warnings.append(f"the hysteresis ({eps:.3g}) is over half the oscillation amplitude: "
                        "raise the relay amplitude")
    tau = None
    if settings is not None and getattr(settings, "asymmetry", 0.0):
        s_asym = float(settings.asymmetry)
        tau = normalized_dead_time(cycles, d * (1 + s_asym), d * (1 - s_asym), ts, noise, res,
                                   eps)
    return RelayAnalysis(ku=float(ku), tu=float(tu), ku_df=float(ku_c), tu_df=float(tu_c),
                         ku_with_hold=float(ku_h), tu_with_hold=float(tu_h),
                         uncertainty=uncertainty, model=model, cycles_used=n_cyc,
                         converged=converged, estimates=estimates, warnings=warnings,
                         fourier=fourier, delays_included=DELAYS_INCLUDED, ts=ts,
                         noise_std=noise, hysteresis=eps, amplitude_d=d, bias=bias, centre=c0,
                         amplitude=a, model_mismatch=mismatch, cycles=cycles, dc=dc, tau=tau,
                         cycles_to_converge=n_conv, resolution=res, record_span=span,
                         likely_cause=likely_cause, fit_from=0 if at_rest else i0)


def _likely_cause(model: FittedModel, points: Sequence[FourierPoint], dc: DcPoint | None) -> str:
    """In words, why no candidate reproduced the measurement: a resonance near a harmonic
    (the measured response stands above every model there), a PV that still drifts, or a
    nonlinearity (friction, backlash, saturation)."""
    best = model.checks.get(model.kind)
    w = _resonance(points)(best) if best is not None else None
    if w is not None:
        k = next(p.harmonic for p in points if p.w == w)
        return (f"probably a lightly damped mode near {k} x the oscillation frequency "
                f"({w / (2 * math.pi):.3g} Hz): a compliant belt, coupling or a flexible "
                "structure")
    if dc is not None and not dc.settled:
        return "probably a drift: the mean PV was still moving (a changing load or an " \
               "operating point that had not settled)"
    return "probably a nonlinearity: friction, backlash or saturation changes the response " \
           "with the amplitude"
