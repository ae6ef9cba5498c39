"""Ultimate gain and period from a recorded relay oscillation, with uncertainty and a model.

Inputs are plain arrays from the device tick: t (s, device time), y = PV (PV units) read at
tick k, u = output (output units) decided from it and held over [t_k, t_k+1). Sign convention:
positive output makes the PV rise; relay state +1 = high output.

What is computed (see `analyse_relay`):
- cycles from the relay's own switch instants (output changes), transient cycles dropped;
- the classic describing-function figures (Åström and Hägglund 1984): identified point
  G(j w) = (pi a / 4 d) exp(j(-pi + arcsin(eps / a))), Ku = 4 d / (pi a), Tu = the period;
- Fourier points G(j k w), k = 1, 3, 5 (autotune.core.harmonics), the plant's exact response;
- a low-order model fitted to the sampled record (autotune.core.model); Ku, Tu at phase -180 deg
  of the fitted model, cross-checked against the Fourier points.

Delays in the figures (`delays_included`): the refined `ku`, `tu` and the model are those of the
continuous plant. The device tick's sample-and-hold (about ts/2 of extra delay) is modelled
exactly in the fit and taken *out*; `ku_with_hold`, `tu_with_hold` put it back (the loop a PID
running at that tick sees). The classic figures are read straight off the oscillation, so they
hold the hold's delay and the hysteresis shift.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from autotune.core.harmonics import FourierPoint, fourier_coefficients, fourier_points
from autotune.core.lti import DelayedTF
from autotune.core.model import CANDIDATES, FittedModel, fit_models
from autotune.core.prechecks import smallest_step
from autotune.core.relay import measurement_tolerances, steady_converged

DELAYS_INCLUDED = "plant"
FIT_SAMPLES = 3000  # records longer than this ...
FIT_CYCLES = 10  # ... have the model fitted through this many steady cycles only
DELAYS_NOTE = ("ultimate_gain, ultimate_period and model are the continuous plant's: the device "
               "tick's sample-and-hold (about ts/2) is modelled and excluded; "
               "*_with_hold figures include it; the classic figures include it and the "
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


def steady_tolerances(period: float, amplitude_pp: float, *, tick: float = 0.0,
                      noise_std: float = 0.0, resolution: float = 0.0,
                      hysteresis: float = 0.0) -> tuple[float, float]:
    """Relative (period, amplitude) differences steady cycles can show from measurement alone.

    period (s), amplitude_pp (PV units, peak to peak), tick (s), noise_std, resolution,
    hysteresis (PV units). autotune.core.relay.measurement_tolerances (switching jitter of the
    period; peak-reading error of the amplitude); the amplitude tolerance is at least the
    period's, since the jitter that moves a switch moves the swing with it (for an integrating
    plant the swing grows in proportion to the half-period; common practice, no source).
    """
    tol_p, tol_a = measurement_tolerances(period, amplitude_pp, hysteresis=hysteresis,
                                          tick=tick, noise_std=noise_std,
                                          resolution=resolution)
    if not (math.isfinite(tol_p) and math.isfinite(tol_a)):
        return 0.0, 0.0
    return tol_p, max(tol_a, tol_p)


def converged_cycles(cycles: Sequence[Any], tol: float = 0.02) -> bool:
    """True when the last two cycles agree within `tol` (relative) in period and amplitude.

    Takes this module's Cycle or autotune.core.relay's CycleFigures (anything with `period` and
    `amplitude_h1` or `amplitude_pp`); the first-harmonic amplitude is used when present
    (robust to noise).
    """
    if len(cycles) < 2:
        return False
    a, b = cycles[-2], cycles[-1]

    def amp(c: Any) -> float:
        return float(getattr(c, "amplitude_h1", None) or c.amplitude_pp)

    def close(x: float, z: float) -> bool:
        return abs(x - z) <= tol * max(abs(x), abs(z), 1e-300)

    return close(a.period, b.period) and close(amp(a), amp(b))


def cycles_to_converge(cycles: Sequence[Any], tol: float = 0.02) -> int | None:
    """Number of cycles (counted from the first given) after which converged_cycles holds."""
    for n in range(2, len(cycles) + 1):
        if converged_cycles(cycles[:n], tol):
            return n
    return None


# ---------------------------------------------------------------------------- classic figures
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


def classic_estimate(cycles: Sequence[Cycle], amplitude_d: float | None = None,
                     hysteresis: float = 0.0) -> tuple[float, float]:
    """Plain describing-function Ku = 4 d / (pi a) (output/PV units) and Tu = mean period (s).

    a is the mean half peak-to-peak, d the mean relay half-step (or `amplitude_d`); the
    hysteresis only turns the identified point's phase, not its magnitude.
    """
    if not cycles:
        raise AnalysisError("no complete relay cycle")
    a = float(np.mean([c.amplitude_pp for c in cycles])) / 2
    d = float(np.mean([c.amplitude_d for c in cycles])) if amplitude_d is None else amplitude_d
    return classic_ultimate_gain(d, a, hysteresis), float(np.mean([c.period for c in cycles]))


def classic_ultimate_gain(amplitude_d: float, a: float, hysteresis: float = 0.0) -> float:
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


# ---------------------------------------------------------------------------- result
@dataclass(frozen=True)
class RelayAnalysis:
    """Everything the analysis found. Gains output units per PV unit, periods s.

    ku, tu: refined (continuous plant, hold excluded); ku_classic, tu_classic: plain
    describing function; ku_with_hold, tu_with_hold: refined with the tick's ts/2 hold delay;
    uncertainty: relative, per figure (cycle spread, noise and a heuristic model-extrapolation
    term from the model's miss at the Fourier points); fourier: plant points at w, 3w, 5w;
    estimates: per cycle, that cycle's classic figures and its refined ones (the cycle's
    classic figures times the whole record's refined/classic ratio); warnings: actionable
    one-line messages.
    """

    ku: float
    tu: float
    ku_classic: float
    tu_classic: float
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


def _phase_below_zero(g: complex) -> float:
    ph = float(np.angle(g))
    return ph - 2 * math.pi if ph > 0 else ph


def _rest_at_start(y: np.ndarray, u: np.ndarray, switches: np.ndarray, noise: float,
                   pp: float, bias: float | None, step: float) -> bool:
    """True when the record starts at rest: output constant at the operating point, PV still.

    The first output level must be the bias (settings known) or, without settings, last
    longer than 1.5 relay half-periods: a record that opens on a relay level whose effect has
    not yet passed the dead time is not at rest. The still stretch must span at least a
    quarter of a relay half-period (a PV still for a few ticks says nothing about the plant's
    state, e.g. just after a precheck; common practice, no source).
    """
    first = int(switches[0])
    halves = np.diff(switches)
    if first < 3 or (halves.size > 0 and first < 0.25 * float(np.median(halves))):
        return False
    seg = y[:first]
    still = bool(np.all(u[:first] == u[0]) and
                 float(seg.max() - seg.min()) <= max(6 * noise, 0.02 * pp))
    if not still:
        return False
    if bias is not None:
        return abs(float(u[0]) - bias) <= 0.01 * max(step, 1e-300)
    return halves.size > 0 and first > 1.5 * float(np.median(halves))


def analyse_relay(t: np.ndarray, y: np.ndarray, u: np.ndarray,
                  settings: RelaySettingsLike | None = None, *, noise_std: float | None = None,
                  ts: float | None = None, centre: float | None = None,
                  hysteresis: float | None = None, output_limit: float | None = None,
                  state: np.ndarray | None = None, drop_transient: int = 1,
                  converge_tol: float = 0.02, candidates: Sequence[str] = CANDIDATES,
                  min_snr: float = 5.0, resolution: float | None = None) -> RelayAnalysis:
    """Analyse a relay experiment: Ku, Tu (refined and classic), model, uncertainty, warnings.

    t (s), y (PV units), u (output units, as applied and held over each tick); settings: the
    relay settings as finally used (centre, bias, amplitude, hysteresis) or give `centre` and
    `hysteresis` (PV units) directly; noise_std: PV noise (PV units), estimated from the record
    when None; ts: tick (s), default the median sample spacing; output_limit: for the
    saturation warning; state: recorded relay state (+1/-1) if available; resolution: PV
    quantisation step (PV units), the smallest PV step in the record when None (noise and
    resolution set how far steady cycles may differ: `extract_cycles`, convergence).
    Raises AnalysisError when there is no complete steady relay cycle.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    u = np.asarray(u, dtype=float)
    if not (t.size == y.size == u.size) or t.size < 10:
        raise AnalysisError("need at least 10 samples with t, pv and out of equal length")
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
    g1 = fourier[0].g
    ku_c, tu_c = classic_estimate(cycles, hysteresis=eps)
    a = float(np.mean([c.amplitude_pp for c in cycles])) / 2
    d = float(np.mean([c.amplitude_d for c in cycles]))
    bias = float(np.mean([c.bias for c in cycles]))

    at_rest = _rest_at_start(y, u, switch_indices(u, state)[0], noise, 2 * a,
                             settings.bias if settings is not None else None, d)
    end = t.size
    if t.size > FIT_SAMPLES and n_cyc > FIT_CYCLES:
        # long record: the model is fitted to its head, from the start through FIT_CYCLES
        # steady cycles (the rest repeats the same oscillation); the cycle figures, Fourier
        # points and uncertainty still use every steady cycle
        end = cycles[FIT_CYCLES - 1].i_end
    sl = slice(0, end)
    model = fit_models(t[sl], y[sl], u[sl], ts=ts, w1=w1, phase1=_phase_below_zero(g1),
                       fit_from=0 if at_rest else i0, candidates=candidates,
                       noise_floor=noise)
    tf = model.tf
    up = tf.ultimate_point()
    mismatch = {p.harmonic: float(abs(complex(tf.freq_response(p.w)) - p.g) / abs(p.g))
                for p in fourier}
    if up is None:
        warnings.append("the fitted model never reaches -180 degrees of phase: the refined "
                        "figures fall back to the classic ones")
        ku, tu = ku_c, tu_c
        w180 = w1
    else:
        ku, tu = up
        w180 = 2 * math.pi / tu
    hold = DelayedTF(tf.num, tf.den, tf.delay + ts / 2)
    up_h = hold.ultimate_point()
    ku_h, tu_h = up_h if up_h is not None else (ku_c, tu_c)

    # ---- per-cycle estimates (the model's correction applied to each cycle's measurement)
    scale_k = ku / ku_c
    scale_t = tu / tu_c
    estimates = []
    for c in cycles:
        kc = 4 * c.amplitude_d / (math.pi * c.amplitude_pp / 2)
        estimates.append({"cycle": c.index, "t_end": c.t_end, "period": c.period,
                          "amplitude_pp": c.amplitude_pp, "ku_classic": kc,
                          "tu_classic": c.period, "ku": kc * scale_k, "tu": c.period * scale_t})
    if n_cyc >= 4:  # the relay's own criterion (pairs of cycles, measurement tolerances)
        converged = steady_converged(cycles, converge_tol, min_cycles=4, hysteresis=eps,
                                     tick=ts, noise_std=noise, resolution=res)
    else:
        converged = converged_cycles(cycles, max(converge_tol, 6 * noise / max(a, 1e-300) /
                                                 math.sqrt(max(cycles[-1].i_end -
                                                               cycles[-1].i_start, 1))))

    # ---- uncertainty (relative): cycle spread, noise, model extrapolation (heuristic)
    kcs = np.array([e["ku_classic"] for e in estimates])
    pcs = np.array([c.period for c in cycles])
    h1s = np.array([c.amplitude_h1 for c in cycles])
    if n_cyc >= 2:
        stat_mag = float(np.std(h1s, ddof=1) / np.mean(h1s)) / math.sqrt(n_cyc)
        stat_per = float(np.std(pcs, ddof=1) / np.mean(pcs)) / math.sqrt(n_cyc)
    else:
        stat_mag, stat_per = 0.05, 0.03
    noise_rel = noise / max(a, 1e-300) * math.sqrt(2.0 / max(i1 - i0, 1))
    m1 = mismatch.get(1, 0.0)
    higher = [v for k, v in mismatch.items() if k > 1]
    shift = abs(math.log(w180 / w1))
    model_err = (m1 + abs(max(higher) - m1) * shift / math.log(3.0)) if higher else \
        m1 + 0.25 * shift
    dphi = math.sqrt(noise_rel**2 + model_err**2)
    slope_ph = abs(float(tf.phase(w180 * 1.001) - tf.phase(w180 * 0.999)) / (0.002 * w180))
    slope_mag = abs(math.log(abs(complex(tf.freq_response(w180 * 1.001))) /
                             abs(complex(tf.freq_response(w180 * 0.999)))) / (0.002 * w180))
    dw = dphi / max(slope_ph, 1e-300)
    unc_tu = math.sqrt((dw / w180) ** 2 + stat_per**2) + 1e-3
    unc_ku = math.sqrt(stat_mag**2 + noise_rel**2 + model_err**2 + (slope_mag * dw) ** 2) + 1e-3
    unc_c_ku = float(np.std(kcs, ddof=1) / np.mean(kcs)) / math.sqrt(n_cyc) if n_cyc > 1 else 0.05
    uncertainty = {"ultimate_gain": unc_ku, "ultimate_period": unc_tu,
                   "ultimate_gain_classic": unc_c_ku + noise_rel + 1e-3,
                   "ultimate_period_classic": stat_per + 1e-3}

    # ---- warnings a user can act on
    if n_cyc < 3:
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
                            "fundamental): the classic describing-function figures are "
                            "unreliable here; use the refined ones")
    asym = float(np.mean([c.asymmetry for c in cycles]))
    if abs(asym) > 0.05:
        hi_t = float(np.mean([c.high_time for c in cycles]))
        lo_t = float(np.mean([c.low_time for c in cycles]))
        warnings.append(f"half-periods differ by {100 * abs(asym):.0f}% (high {hi_t:.3g} s, low "
                        f"{lo_t:.3g} s): a static load (gravity, friction, a slope) offsets the "
                        "loop; let bias balancing finish or set the relay bias")
    if output_limit is not None and float(np.max(np.abs(u))) >= output_limit * (1 - 1e-9):
        warnings.append(f"the output reached the output limit ({output_limit:g}) during the "
                        "experiment (saturation): lower the relay amplitude or bias")
    elif settings is not None and settings.amplitude > 0 and \
            abs(d - settings.amplitude) > 0.02 * settings.amplitude:
        warnings.append(f"the output steps ({d:.4g}) differ from the relay amplitude "
                        f"({settings.amplitude:.4g}): the output saturated or was clamped")
    if not converged:
        warnings.append("the last two cycles still differ (period or amplitude): the "
                        "oscillation had not settled; run more cycles")
    if m1 > 0.05:
        warnings.append(f"the fitted model misses the measured response at the oscillation by "
                        f"{100 * m1:.0f}%: check for backlash, friction or a changing load")
    if eps > 0.5 * a:
        warnings.append(f"the hysteresis ({eps:.3g}) is over half the oscillation amplitude: "
                        "raise the relay amplitude")

    return RelayAnalysis(ku=float(ku), tu=float(tu), ku_classic=float(ku_c),
                         tu_classic=float(tu_c), ku_with_hold=float(ku_h),
                         tu_with_hold=float(tu_h), uncertainty=uncertainty, model=model,
                         cycles_used=n_cyc, converged=converged, estimates=estimates,
                         warnings=warnings, fourier=fourier, delays_included=DELAYS_INCLUDED,
                         ts=ts, noise_std=noise, hysteresis=eps, amplitude_d=d, bias=bias,
                         centre=c0, amplitude=a, model_mismatch=mismatch, cycles=cycles)


def result_fields(analysis: RelayAnalysis) -> dict[str, Any]:
    """The result.json fields this analysis owns (contract names; extra fields welcome)."""
    m = analysis.model
    return {
        "ultimate_gain": analysis.ku,
        "ultimate_period": analysis.tu,
        "ultimate_gain_classic": analysis.ku_classic,
        "ultimate_period_classic": analysis.tu_classic,
        "ultimate_gain_with_hold": analysis.ku_with_hold,
        "ultimate_period_with_hold": analysis.tu_with_hold,
        "uncertainty": dict(analysis.uncertainty),
        "model": {"kind": m.kind, "params": dict(m.params), "residual": m.residual,
                  "num": list(m.tf.num), "den": list(m.tf.den), "delay": m.tf.delay,
                  "candidates": {k: {"params": dict(c.params), "residual": c.residual}
                                 for k, c in m.candidates.items()}},
        "cycles_used": analysis.cycles_used,
        "converged": analysis.converged,
        "relay": {"amplitude": analysis.amplitude_d, "hysteresis": analysis.hysteresis,
                  "bias": analysis.bias},
        "oscillation": {"amplitude": analysis.amplitude, "period": analysis.tu_classic,
                        "noise_std": analysis.noise_std, "tick": analysis.ts},
        "fourier": [p.as_dict() for p in analysis.fourier],
        "delays_included": analysis.delays_included,
        "delays_note": DELAYS_NOTE,
        "estimates": list(analysis.estimates),
        "warnings": list(analysis.warnings),
    }
