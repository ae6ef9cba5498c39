"""Checks before any relay motion: pure evaluators over recorded arrays, and the output profiles
the runner plays while recording them.

Units: t in seconds (device time), PV in PV units, output in output units. Sign convention:
positive output makes the PV rise for a loop with `sign = +1`; `expected_sign` below is the PV
direction expected for a positive output step (the runner passes +1 after applying its `sign`).

1. Rest: output held at bias; noise (standard deviation after removing a straight-line drift),
   drift (PV units/s), resolution (smallest non-zero PV step seen), suggested hysteresis
   max(3 x noise, resolution) (common practice, no source; `relay_hysteresis`).
2. Direction: one small output pulse; the PV must move the expected way by more than 5 x noise
   within the timeout.
3. Breakaway: a slow output ramp; the output at which the PV first moves beyond the noise bounds
   the deadband (output units) from above (`assess_breakaway`); two ramps at different rates
   measure it exactly, lag and dead time cancelling (`deadband_from_two_ramps`).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "MSG_NO_RESPONSE",
    "MSG_SIGN_DISAGREE",
    "BreakawayReport",
    "DirectionReport",
    "PrecheckFailed",
    "RestReport",
    "assess_breakaway",
    "assess_direction",
    "assess_rest",
    "breakaway_ramp",
    "breakaway_ramp_duration",
    "crossing_time",
    "deadband_from_two_ramps",
    "TwoRampReport",
    "direction_pulse",
    "direction_threshold",
    "pv_resolution",
    "relay_hysteresis",
    "smallest_step",
    "trailing_median3",
    "weak_response",
]

DIRECTION_MIN_FRACTION = 0.1  # the pulse must move the PV by a tenth of the target amplitude
#                               at least (common practice, no source)

MSG_SIGN_DISAGREE = "actuator and sensor signs disagree; flip `sign` in the config"
MSG_NO_RESPONSE = "no response: check power, wiring, deadband; try a larger pulse"


class PrecheckFailed(Exception):
    """A precheck stopped the run: `check` ("rest", "direction", "breakaway") and the message."""

    def __init__(self, check: str, message: str) -> None:
        super().__init__(message)
        self.check = check
        self.message = message


def _arrays(*xs: ArrayLike) -> list[np.ndarray]:
    arrs = [np.asarray(x, dtype=float).ravel() for x in xs]
    n = arrs[0].size
    if any(a.size != n for a in arrs):
        raise ValueError("arrays must have the same length")
    return arrs


def _median3(x: np.ndarray) -> np.ndarray:
    """Running median of three (ends kept): one-sample spikes do not count as motion."""
    if x.size < 3:
        return x.copy()
    y = x.copy()
    y[1:-1] = np.median(np.stack([x[:-2], x[1:-1], x[2:]]), axis=0)
    return y


def trailing_median3(x: ArrayLike) -> np.ndarray:
    """Causal running median of three (PV units in, PV units out): y[k] = median(x[k-2..k]),
    the first two samples kept. A one-sample spike never counts as motion, on the last sample
    either, and the value at sample k is known when sample k arrives: the live check during a
    pulse and the assessment after it decide on the same numbers."""
    xa = np.asarray(x, dtype=float).ravel()
    if xa.size < 3:
        return xa.copy()
    y = xa.copy()
    y[2:] = np.median(np.stack([xa[:-2], xa[1:-1], xa[2:]]), axis=0)
    return y


# ---------------------------------------------------------------------------------- rest
@dataclass(frozen=True)
class RestReport:
    """noise_std (PV units), drift (PV units/s), resolution (PV units; 0 when no step was seen),
    mean (PV units), suggested_hysteresis (PV units), output_mean (output units), duration (s),
    samples, ok and message (fails when the PV window is narrower than the noise), and
    drift_stderr (PV units/s): the standard error of the drift slope."""

    noise_std: float
    drift: float
    resolution: float
    mean: float
    suggested_hysteresis: float
    output_mean: float = 0.0
    duration: float = 0.0
    samples: int = 0
    ok: bool = True
    message: str = ""
    drift_stderr: float = 0.0

    @property
    def significant_drift(self) -> float:
        """The drift (PV units/s) where it stands above three standard errors, else 0.

        A short or noisy rest gives a slope that is mostly noise; extrapolating it over the
        direction pulse could fake a wrong direction, so only a real drift (a load on an
        integrating loop) is taken out (3 sigma: common practice, no source).
        """
        return self.drift if abs(self.drift) > 3.0 * self.drift_stderr else 0.0

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def smallest_step(pv: ArrayLike) -> float:
    """Smallest non-zero |difference| between consecutive PV samples (PV units), 0 if none.

    Differences below float32 rounding of the values are not steps.
    """
    x = np.asarray(pv, dtype=float).ravel()
    if x.size < 2:
        return 0.0
    d = np.abs(np.diff(x))
    floor = 4 * float(np.finfo(np.float32).eps) * max(float(np.max(np.abs(x))), 1e-30)
    d = d[d > floor]
    return float(d.min()) if d.size else 0.0


OUTLIER_SIGMAS = 5.0  # residuals beyond this many robust sigmas are outliers (common
#                      practice, no source)


def _inliers(resid: np.ndarray, resolution: float) -> np.ndarray:
    """Mask of the residuals within OUTLIER_SIGMAS robust standard deviations: 1.4826 x the
    median absolute deviation (the standard deviation for Gaussian noise), at least the
    sensor's `resolution` (PV units): a quantised sensor resting mostly on one level has a MAD
    near zero, and its flicker by a count is its noise, never an outlier. All are kept when
    no scale is known or fewer than 3 would remain."""
    centre = float(np.median(resid))
    scale = max(1.4826 * float(np.median(np.abs(resid - centre))), resolution)
    if not scale > 0:
        return np.ones(resid.size, dtype=bool)
    keep = np.abs(resid - centre) <= OUTLIER_SIGMAS * scale
    return keep if int(keep.sum()) >= 3 else np.ones(resid.size, dtype=bool)


def assess_rest(t: ArrayLike, pv: ArrayLike, out: ArrayLike, *,
                pv_window: float | None = None) -> RestReport:
    """Noise, drift and resolution of the PV while the output is held (at least 3 samples).

    The drift is the slope of a least-squares line through (t, pv); the noise is the standard
    deviation of the residuals (ddof=2) once outliers are set aside (`_inliers`: one-sample
    spikes of a corrupt reading are not sensor noise, and counting them would widen the relay
    hysteresis and every noise-based threshold). With `pv_window` (PV units) the check fails
    when 6 x noise (a +/-3 sigma band) does not fit inside the window.
    """
    ta, pa, oa = _arrays(t, pv, out)
    if ta.size < 3:
        raise ValueError("the rest check needs at least 3 samples")
    if not (np.all(np.isfinite(ta)) and np.all(np.isfinite(pa))):
        raise ValueError("rest samples contain values that are not numbers")
    tc = ta - ta.mean()
    span = float(ta[-1] - ta[0])
    if np.ptp(pa) == 0:
        slope, noise = 0.0, 0.0
    elif span > 0:
        slope, intercept = np.polyfit(tc, pa, 1)
        keep = _inliers(pa - (slope * tc + intercept), smallest_step(pa))
        if not np.all(keep):  # the line again without the outliers
            slope, intercept = np.polyfit(tc[keep], pa[keep], 1)
        resid = (pa - (slope * tc + intercept))[keep]
        noise = float(np.sqrt(np.sum(resid**2) / max(resid.size - 2, 1)))
    else:
        slope, noise = 0.0, float(np.std(pa, ddof=1))
    res = smallest_step(pa)
    hyst = relay_hysteresis(noise, res)
    # slope standard error; quantisation counts as noise of at least resolution / sqrt(12)
    spread = float(np.sum(tc**2))
    noise_eff = max(noise, res / math.sqrt(12.0))
    drift_se = noise_eff / math.sqrt(spread) if spread > 0 else float("inf")
    ok, msg = True, ""
    if pv_window is not None and 6.0 * noise >= pv_window:
        ok = False
        msg = (f"PV noise (std {noise:.3g}) is too large for the PV window of +/-{pv_window:g}:"
               " widen the window or reduce the sensor noise")
    return RestReport(noise_std=noise, drift=float(slope), resolution=res, mean=float(pa.mean()),
                      suggested_hysteresis=hyst, output_mean=float(np.mean(oa)),
                      duration=span, samples=int(ta.size), ok=ok, message=msg,
                      drift_stderr=drift_se)


def pv_resolution(board: float = 0.0, rest: float = 0.0, pulse: float = 0.0) -> float:
    """The PV quantisation step (PV units) to work with: the board's declared resolution when
    it declares one (> 0), else the smallest PV step seen at rest, else the smallest step seen
    while the direction pulse moved the PV (a sensor that reads exactly constant at rest shows
    its step only once the PV moves); 0 when none is known (an ideal or unquantised sensor)."""
    for r in (board, rest, pulse):
        if r > 0 and math.isfinite(r):
            return float(r)
    return 0.0


def relay_hysteresis(noise_std: float, resolution: float) -> float:
    """Relay hysteresis (PV units) from the PV noise std and resolution: max(3 x noise,
    1 x resolution) (common practice, no source); never 0 on a quantised sensor.

    One step is enough against quantisation: a PV that flickers between the two levels around
    the centre spans one step, and the relay switches only a full step beyond it. A wider
    hysteresis costs time: the oscillation then sits arcsin(eps / a) before -180 degrees and
    its period grows (for an integrating loop at a = 3 eps, by about half)."""
    return max(3.0 * noise_std, resolution)


def direction_threshold(noise_std: float, target_amplitude: float) -> float:
    """PV change (PV units) the direction pulse must cause: 5 x the noise, and at least a tenth
    of the relay's target amplitude (common practice, no source)."""
    return max(5.0 * noise_std, DIRECTION_MIN_FRACTION * target_amplitude)


# ---------------------------------------------------------------------------------- direction
@dataclass(frozen=True)
class DirectionReport:
    """ok: moved the expected way. moved: beyond threshold at all. sign_ok: the way it moved
    agrees with the expected direction. change: the largest PV excursion from the baseline after
    the pulse start (PV units, signed, spikes removed by a median of three). threshold: PV units.
    t_response: first time (s) the excursion passed the threshold, None if never.
    resolution: the smallest step of the raw PV during the pulse (PV units, 0 if none; the
    caller fills it in with `smallest_step`, since `pv` here may be detrended)."""

    ok: bool
    moved: bool
    sign_ok: bool
    change: float
    message: str
    threshold: float = 0.0
    t_response: float | None = None
    resolution: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def assess_direction(t: ArrayLike, pv: ArrayLike, pulse_start_t: float, pulse_sign: int,
                     noise_std: float, expected_sign: int = +1, *, timeout: float | None = None,
                     threshold_factor: float = 5.0, min_change: float = 0.0) -> DirectionReport:
    """Did the PV move the expected way after an output pulse of sign `pulse_sign` at
    `pulse_start_t` (s)?

    The baseline is the mean PV before the pulse start (the first sample if there is none).
    Samples from the pulse start up to pulse_start_t + timeout (all, when timeout is None) are
    looked at, through a causal median of three over the whole record (`trailing_median3`:
    what a live check sees as each sample arrives); the PV counts as moved when it leaves the
    baseline by more than max(threshold_factor x noise_std, min_change). The direction is that
    of the largest excursion, so a brief inverse response (non-minimum-phase plant) does not
    decide it.
    Messages: MSG_SIGN_DISAGREE, MSG_NO_RESPONSE, or "" when ok.
    """
    if pulse_sign not in (-1, 1) or expected_sign not in (-1, 1):
        raise ValueError("pulse_sign and expected_sign must be +1 or -1")
    ta, pa = _arrays(t, pv)
    before = ta < pulse_start_t
    if np.any(before):
        baseline = float(np.mean(pa[before]))
    elif ta.size:
        baseline = float(pa[0])
    else:
        baseline = 0.0
    sel = ta >= pulse_start_t
    if timeout is not None:
        sel &= ta <= pulse_start_t + timeout
    threshold = max(threshold_factor * noise_std, min_change)
    tw, pw = ta[sel], trailing_median3(pa)[sel]
    dev = pw - baseline
    dev = np.where(np.isfinite(dev), dev, 0.0)
    if dev.size == 0:
        return DirectionReport(False, False, False, 0.0, MSG_NO_RESPONSE, threshold, None)
    k = int(np.argmax(np.abs(dev)))
    change = float(dev[k])
    beyond = np.nonzero(np.abs(dev) > threshold)[0]
    moved = beyond.size > 0
    t_resp = float(tw[beyond[0]]) if moved else None
    sign_ok = moved and math.copysign(1.0, change) == pulse_sign * expected_sign
    if not moved:
        msg = MSG_NO_RESPONSE
    elif not sign_ok:
        msg = MSG_SIGN_DISAGREE
    else:
        msg = ""
    return DirectionReport(ok=moved and sign_ok, moved=moved, sign_ok=sign_ok, change=change,
                           message=msg, threshold=threshold, t_response=t_resp)


WEAK_FRACTION = 0.5  # a pulse that moved the PV half the threshold showed a response too
#                     small to decide on (common practice, no source)


def weak_response(report: DirectionReport) -> bool:
    """True when the pulse moved the PV less than the threshold but at least WEAK_FRACTION of
    it: a larger pulse should decide (a coarse sensor two counts from its threshold, a pulse
    not far beyond a dead zone)."""
    return (not report.moved and report.threshold > 0
            and abs(report.change) >= WEAK_FRACTION * report.threshold)


# ---------------------------------------------------------------------------------- breakaway
@dataclass(frozen=True)
class BreakawayReport:
    """deadband: |output - baseline output| (output units) when the PV first moved beyond the
    noise, None if it never did; t_move (s), output_at_move (output units), threshold (PV units).
    The estimate is an upper bound: the plant's lag and dead time let the ramp run on before the
    PV shows motion (`response_lag` corrects for a known lag)."""

    deadband: float | None
    message: str
    t_move: float | None = None
    output_at_move: float | None = None
    threshold: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def assess_breakaway(t: ArrayLike, pv: ArrayLike, out: ArrayLike, noise_std: float, *,
                     threshold_factor: float = 5.0, min_change: float = 0.0,
                     response_lag: float = 0.0) -> BreakawayReport:
    """Deadband estimate from an output ramp.

    The baseline PV is the mean over the samples before the output first leaves its initial
    value (the first sample if the ramp starts at once). The PV has moved when it leaves the
    baseline by more than max(threshold_factor x noise_std, min_change) (median of three
    against spikes). The deadband is |out - out[0]| at the sample `response_lag` seconds before
    that moment (the first sample if earlier).
    """
    ta, pa, oa = _arrays(t, pv, out)
    threshold = max(threshold_factor * noise_std, min_change)
    if ta.size == 0:
        return BreakawayReport(None, "no samples recorded during the breakaway ramp",
                               threshold=threshold)
    u0 = float(oa[0])
    moving = np.nonzero(np.abs(oa - u0) > 0)[0]
    k0 = int(moving[0]) if moving.size else ta.size
    baseline = float(np.mean(pa[:k0])) if k0 > 0 else float(pa[0])
    dev = _median3(pa) - baseline
    dev = np.where(np.isfinite(dev), dev, 0.0)
    beyond = np.nonzero((np.abs(dev) > threshold) & (np.arange(ta.size) >= k0))[0]
    if beyond.size == 0:
        peak = float(np.max(np.abs(oa - u0)))
        return BreakawayReport(None, f"the PV did not move up to an output step of {peak:g}:"
                               " check power and wiring, or raise the ramp's end value",
                               threshold=threshold)
    k = int(beyond[0])
    t_move = float(ta[k])
    j = int(np.searchsorted(ta, t_move - response_lag, side="right")) - 1
    j = max(0, min(j, k))
    deadband = float(abs(oa[j] - u0))
    return BreakawayReport(deadband, "", t_move=t_move, output_at_move=float(oa[k]),
                           threshold=threshold)


# ---------------------------------------------------------------------------------- profiles
def direction_pulse(t_since_start: float, amplitude: float, duration: float, *,
                    bias: float = 0.0, sign: int = +1) -> float:
    """Output (output units) of the direction pulse at `t_since_start` (s): bias + sign *
    amplitude for 0 <= t < duration, bias otherwise."""
    if 0.0 <= t_since_start < duration:
        return bias + sign * amplitude
    return bias


def breakaway_ramp(t_since_start: float, rate: float, max_step: float, *, bias: float = 0.0,
                   sign: int = +1) -> float:
    """Output (output units) of the breakaway ramp at `t_since_start` (s): bias + sign *
    min(rate * t, max_step) for t >= 0 (rate in output units per second), bias before."""
    if t_since_start <= 0.0:
        return bias
    return bias + sign * min(rate * t_since_start, max_step)


def breakaway_ramp_duration(rate: float, max_step: float) -> float:
    """Seconds the ramp takes to reach max_step (output units) at `rate` (output units/s)."""
    if not rate > 0:
        raise ValueError("ramp rate must be > 0")
    return max_step / rate


# ---------------------------------------------------------------------------------- two ramps
def crossing_time(t: ArrayLike, dev: ArrayLike, level: float) -> float | None:
    """First time (s) the running maximum of `dev` (median of three against spikes) reaches
    `level` (PV units), linearly interpolated between samples; None if it never does."""
    ta, da = _arrays(t, dev)
    if ta.size < 2:
        return None
    env = np.maximum.accumulate(np.where(np.isfinite(da), _median3(da), -np.inf))
    k = np.nonzero(env >= level)[0]
    if k.size == 0 or k[0] == 0:
        return None if k.size == 0 else float(ta[0])
    i = int(k[0])
    lo, hi = env[i - 1], env[i]
    frac = (level - lo) / (hi - lo) if hi > lo else 1.0
    return float(ta[i - 1] + frac * (ta[i] - ta[i - 1]))


@dataclass(frozen=True)
class TwoRampReport:
    """deadband (output units, None when not measurable), its spread (output units: half the
    range of the middle half of the per-level estimates), the per-level estimates, the levels
    used (PV units, of the first ramp) and a message."""

    deadband: float | None
    spread: float
    estimates: tuple[float, ...]
    levels: tuple[float, ...]
    message: str

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def deadband_from_two_ramps(t_a: ArrayLike, dev_a: ArrayLike, rate_a: float,
                            t_b: ArrayLike, dev_b: ArrayLike, rate_b: float, *,
                            level_min: float, level_max: float,
                            n_levels: int = 9) -> TwoRampReport:
    """Deadband from two output ramps at different rates (exact for a linear plant behind a
    continuous dead zone).

    Ramp k starts at t = 0 (each `t_*` counts from its ramp's start, s) and rises at `rate_k`
    (output units/s); `dev_k` is the PV motion in the ramp's direction from its baseline (PV
    units). Past the dead zone of half-width D the plant sees rate_k (t - D/rate_k), so its
    response is rate_k Y(t - D/rate_k) with Y the plant's unit-ramp response, whatever its lag,
    dead time or order. Ramp a reaches the level h when ramp b reaches h rate_b/rate_a after the
    same time past breakaway, hence D = (t_a(h) - t_b(h rate_b/rate_a)) / (1/rate_a - 1/rate_b)
    for every level h (analytic; the estimate is the median over `n_levels` levels between
    level_min and level_max, PV units of ramp a).
    """
    if not (rate_a > 0 and rate_b > 0 and rate_a != rate_b):
        raise ValueError("two different positive ramp rates are needed")
    if not 0 < level_min < level_max:
        raise ValueError("need 0 < level_min < level_max")
    ratio = rate_b / rate_a
    inv = 1.0 / rate_a - 1.0 / rate_b
    levels = np.linspace(level_min, level_max, max(2, n_levels))
    est: list[float] = []
    used: list[float] = []
    for h in levels:
        ta = crossing_time(t_a, dev_a, float(h))
        tb = crossing_time(t_b, dev_b, float(h) * ratio)
        if ta is None or tb is None:
            continue
        est.append((ta - tb) / inv)
        used.append(float(h))
    if len(est) < 2:
        return TwoRampReport(None, math.inf, tuple(est), tuple(used),
                             "the PV did not move far enough during the breakaway ramps: check "
                             "power and wiring, or raise the ramps' end value")
    arr = np.array(est)
    d = max(0.0, float(np.median(arr)))
    q1, q3 = np.percentile(arr, [25, 75])
    return TwoRampReport(d, float(0.5 * (q3 - q1)), tuple(est), tuple(used), "")
