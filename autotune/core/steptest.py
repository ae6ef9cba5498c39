"""The confirmation step: hold at rest, step the setpoint, record, judge, return to the start.

Pure part of the step (no I/O, no clock; time comes in as device timestamps in seconds). The
powered part, `run_step`, lives in autotune.job.step.

- `plan_step`: the plan from what is known before the step (predicted figures, Tu, the rest
  check's noise and drift, the config's step and spec, the powered time left): how long to
  record after each setpoint change and why, when the loop counts as at rest, the settling
  band and the noise filter;
- `choose_band`: the fixed, labelled settling band (2 % of the step by default) and the
  moving average that keeps the noise inside it; the noisy band (5 %) when the noise alone
  exceeds it;
- `check_setpoints`: every setpoint and the allowed overshoot against the PV window loaded in
  the board, before power;
- `StepExperiment`: a state machine fed one sample at a time; it says which setpoint, device
  offset or held output applies now, stops a step that oscillates, and says when it is done;
- `step_figures` / `load_figures` / `finish_outcome`: the measured figures and the verdict.

Phases: HOLD (loop closed at the start value until the PV has been at rest for the rest
window) -> STEP (setpoint = start + size, recorded for the plan's record length; a sustained
oscillation stops it early) -> optional LOAD (offset added at the plant input while the loop
holds the stepped setpoint) -> UNLOAD -> RETURN (setpoint back to the start value) -> DONE.
A step stopped for oscillation goes to RECOVER instead (the output held at the output that
held the PV at rest before the step, until the PV is at rest again) -> DONE.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np

from autotune.core.closedloop import simulate_closed_loop
from autotune.core.lti import DelayedTF
from autotune.core.metrics import (
    Extremum,
    RunningMean,
    StepMetrics,
    SwingTracker,
    decay_ratios,
    last_decay,
    moving_average,
    step_metrics,
)
from autotune.core.pid import PidSettings
from autotune.core.prechecks import assess_rest
from autotune.core.verdict import StepSpec, compare, judge, spec_from_config

DEFAULT_WINDOW_FRACTION = 0.6  # step at most this fraction of the PV window (common practice, no source)
DEFAULT_SETTLE_BAND = 0.02  # settling band, fraction of the step size (2% band, as step_info)
DEFAULT_NOISY_BAND = 0.05  # the band when the noise alone exceeds the 2 % band
NOISE_SIGMAS = 4.0  # noise amplitude = 4 standard deviations (+ one count): over a record of
#   hundreds of independent samples a 3-sigma excursion is expected once, a 4-sigma one
#   hardly ever (normal distribution tail, analytic); common practice, no source
RECORD_SETTLING_FACTOR = 3.0  # record >= 3 x the predicted settling time (issue spec)
RECORD_TU_FACTOR = 4.0  # record >= 4 x Tu
FILTER_TU_FRACTION = 1.0 / 20.0  # moving average at most Tu/20 long: attenuates a swing at the
#   ultimate period by sinc(pi/20), 0.4 % (analytic)
FILTER_DEFAULT_TIME = 0.05  # s, longest moving average when Tu is unknown (common practice, no source)
SWING_START = 0.5  # swings are counted once the response has covered half the step (an
#   inverse response at the start of a non-minimum-phase loop is no swing)


class StepPhase(StrEnum):
    """Where a confirmation step stands."""

    HOLD = "hold"
    STEP = "step"
    LOAD = "load"
    UNLOAD = "unload"
    RETURN = "return"
    RECOVER = "recover"
    DONE = "done"


# ---------------------------------------------------------------------- the settling band
@dataclass(frozen=True)
class BandChoice:
    """The settling band of a step and the filter that keeps the noise inside it.

    fraction: half-width as a fraction of |size|; half_width: PV units; window: samples of the
    centred moving average the figures are measured on (1 = none); noise: PV units, the noise
    amplitude left after the filter (`noise_amplitude`); label: "2 % band";
    note: why this band (empty for the normal case); judged: False when the noise exceeds even
    the noisy band (settling is then not judged).
    """

    fraction: float
    half_width: float
    window: int
    noise: float
    label: str
    note: str = ""
    judged: bool = True

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def band_label(fraction: float) -> str:
    return f"{fraction * 100:g} % band"


def _odd(n: float) -> int:
    k = max(1, int(math.floor(n)))
    return k if k % 2 else k - 1 if k > 1 else 1


def choose_band(size: float, ts: float, *, noise_std: float, resolution: float = 0.0,
                settle_band: float = DEFAULT_SETTLE_BAND,
                noisy_band: float | None = DEFAULT_NOISY_BAND,
                tu: float | None = None) -> BandChoice:
    """The settling band for a step of `size` PV units with PV noise `noise_std` and
    quantisation `resolution` (PV units), sampled every `ts` s.

    The band is never widened to fit the noise: the PV is smoothed by a centred moving average
    of at most Tu/20 (FILTER_DEFAULT_TIME without Tu), the shortest that brings the noise
    (`noise_amplitude`) within half the band. When the noise left still reaches the
    `settle_band`, the `noisy_band` is used and labelled so; when it reaches that too,
    settling is not judged (and the note says which step would do).
    """
    if not ts > 0:
        raise ValueError("ts must be > 0 s")
    sigma = max(0.0, float(noise_std))
    q = max(0.0, float(resolution))
    w_max = filter_limit(ts, tu)
    step = abs(size)

    def pick(frac: float) -> tuple[int, float]:
        half = frac * step
        w = 1
        while w < w_max and noise_amplitude(sigma, q, w) > 0.5 * half:
            w += 2
        return w, noise_amplitude(sigma, q, w)

    w, amp = pick(settle_band)
    what = f"noise std {sigma:.3g}" + (f", resolution {q:.3g}" if q > 0 else "")
    if amp < settle_band * step:
        note = (f"PV smoothed over {w} samples ({w * ts:.3g} s) for the figures ({what})"
                if w > 1 else "")
        return BandChoice(settle_band, settle_band * step, w, amp, band_label(settle_band), note)
    wide = settle_band if noisy_band is None else max(noisy_band, settle_band)
    w5, amp5 = pick(wide)
    base = (f"the PV noise alone ({what}: {amp:.3g} after smoothing) exceeds the "
            f"{band_label(settle_band)} (+/-{settle_band * step:.3g})")
    if amp5 < wide * step and wide > settle_band:
        return BandChoice(wide, wide * step, w5, amp5, band_label(wide),
                          f"{base}: settling measured on the {band_label(wide)}")
    need = smallest_step(sigma, q, ts, tu, wide)
    return BandChoice(wide, wide * step, w5, amp5, band_label(wide),
                      f"{base} and the {band_label(wide)}: settling not judged; a step of at "
                      f"least {need:.3g} PV units would be needed", judged=False)


def noise_amplitude(sigma: float, resolution: float, window: int) -> float:
    """How far the PV's noise reaches after a moving average of `window` samples (PV units).

    NOISE_SIGMAS standard deviations, plus one count of the quantisation: a quantised loop with
    integral action dithers by a count about the setpoint; when the noise is at least half a
    count it dithers the quantiser itself and the quantisation averages out like noise of
    std resolution / sqrt(12) (uniform quantisation error, analytic)."""
    w = max(1, int(window))
    if resolution > 0 and sigma >= 0.5 * resolution:
        return NOISE_SIGMAS * math.sqrt(sigma * sigma + resolution * resolution / 12.0) / \
            math.sqrt(w)
    return NOISE_SIGMAS * sigma / math.sqrt(w) + resolution


def filter_limit(ts: float, tu: float | None) -> int:
    """Longest moving average (odd samples) the figures may use: Tu/20, FILTER_DEFAULT_TIME
    without Tu."""
    span = FILTER_TU_FRACTION * tu if tu is not None and tu > 0 else FILTER_DEFAULT_TIME
    return _odd(span / ts)


def smallest_step(noise_std: float, resolution: float, ts: float, tu: float | None,
                  fraction: float) -> float:
    """The smallest step (PV units) whose band of `fraction` x the step the noise does not
    reach after the longest filter allowed (`noise_amplitude`, `filter_limit`)."""
    return noise_amplitude(noise_std, resolution, filter_limit(ts, tu)) / fraction


# ---------------------------------------------------------------------- at rest
@dataclass(frozen=True)
class RestCriteria:
    """When the loop counts as at rest (before the step, and after a stopped one).

    window: s the PV must have been at rest for (at least one Tu); timeout: s of holding after
    which the hold gives up and says what keeps the PV moving; noise_std, resolution (PV
    units) and drift_stderr (PV units/s): what the rest check measured (noise_std None: the
    noise is estimated from the hold itself, from successive differences); spread_floor (PV
    units) and drift_floor (PV units/s): spread and drift small enough not to matter to the
    step (a tenth of the band; a quarter of the band over the record); offset_limit (PV units):
    how far the PV's mean may sit from the setpoint held (None: anywhere, as a loop without
    integral action may).
    """

    window: float
    timeout: float
    noise_std: float | None = None
    resolution: float = 0.0
    drift_stderr: float = 0.0
    spread_floor: float = 0.0
    drift_floor: float = 0.0
    offset_limit: float | None = None

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class RestState:
    """The PV over the last rest window: spread (PV units, std about a straight line), drift
    (PV units/s), their limits, and whether both are within them."""

    at_rest: bool
    spread: float
    spread_limit: float
    drift: float
    drift_limit: float
    noise: float  # PV units: measurement noise std (rest check, else from the hold)
    mean: float  # PV units
    output: float | None  # output units: mean output over the window (None: not known)
    offset: float | None = None  # PV units: mean minus the setpoint held (None: not checked)
    offset_limit: float | None = None  # PV units

    def as_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def difference_noise(pv: Sequence[float]) -> float:
    """Measurement-noise std (PV units) from successive differences: std(diff) / sqrt(2).

    Slow motion (drift, a decaying swing) hardly changes successive samples, white noise
    doubles its variance in them, so this reads the noise even while the PV moves."""
    a = np.asarray(pv, dtype=float)
    if a.size < 3:
        return 0.0
    return float(np.std(np.diff(a)) / math.sqrt(2.0))


def rest_state(t: Sequence[float], pv: Sequence[float], criteria: RestCriteria,
               out: Sequence[float] | None = None, setpoint: float | None = None) -> RestState:
    """Is the PV at rest over these samples (the last rest window)?

    spread (residual std about a straight line) at most max(2 x noise, resolution,
    spread_floor); |drift| (slope of the line) at most max(3 standard errors of that slope,
    3 x the rest check's drift standard error, drift_floor) (3 sigma: common practice, no
    source); with a `setpoint` (PV units) and criteria.offset_limit, the mean within that of
    the setpoint. The noise is the rest check's, or from successive differences of these
    samples.
    """
    ta, pa = np.asarray(t, dtype=float), np.asarray(pv, dtype=float)
    rep = assess_rest(ta, pa, np.zeros_like(pa) if out is None else np.asarray(out, float))
    noise = criteria.noise_std if criteria.noise_std is not None else difference_noise(pa)
    res = max(criteria.resolution, rep.resolution if criteria.noise_std is None else 0.0)
    spread_limit = max(2.0 * noise, res, criteria.spread_floor)
    drift_se = rep.drift_stderr if math.isfinite(rep.drift_stderr) else 0.0
    drift_limit = max(3.0 * drift_se, 3.0 * criteria.drift_stderr, criteria.drift_floor)
    ok = rep.noise_std <= spread_limit and abs(rep.drift) <= drift_limit
    offset = None
    if setpoint is not None and criteria.offset_limit is not None:
        offset = rep.mean - setpoint
        ok = ok and abs(offset) <= criteria.offset_limit
    return RestState(ok, rep.noise_std, spread_limit, rep.drift, drift_limit, noise, rep.mean,
                     None if out is None else rep.output_mean, offset, criteria.offset_limit)


def moving_cause(t: Sequence[float], pv: Sequence[float], state: RestState,
                 out: Sequence[float] | None = None, output_limit: float | None = None
                 ) -> tuple[str, dict[str, float] | None]:
    """What keeps the PV from coming to rest (one line), and the oscillation when it is one
    (period s, amplitude PV units), from the last rest window."""
    ta, pa = np.asarray(t, dtype=float), np.asarray(pv, dtype=float)
    if out is not None and output_limit is not None and len(out) and \
            float(np.mean(np.abs(np.asarray(out)) >= output_limit * (1 - 1e-9))) > 0.5:
        return (f"the output sits at its limit ({output_limit:g}) most of the time: the loop "
                "cannot hold the start value (a load beyond the output limit, or the axis "
                "against a stop)"), None
    line = np.polyval(np.polyfit(ta - ta[0], pa, 1), ta - ta[0]) if ta.size > 2 else pa
    tracker = SwingTracker(max(state.spread_limit, 1e-12), start_kind=1)
    for ti, yi in zip(ta, pa - line, strict=True):
        tracker.update(float(ti), float(yi))
    ex = tracker.extrema
    if len(ex) >= 3 and state.spread > state.spread_limit:
        period = 2.0 * float(np.mean(np.diff([e.t for e in ex])))
        amp = 0.5 * float(np.mean([abs(b.y - a.y) for a, b in zip(ex, ex[1:], strict=False)]))
        return (f"the PV oscillates about the start value (period {period:.3g} s, amplitude "
                f"{amp:.3g}, spread {state.spread:.3g} above {state.spread_limit:.3g}): the "
                "gains are too aggressive for this loop"), {"period": period, "amplitude": amp}
    if state.offset is not None and state.offset_limit is not None and \
            abs(state.offset) > state.offset_limit:
        moving = (f" and moves at {state.drift:+.3g} PV units/s"
                  if abs(state.drift) > state.drift_limit else " and stays there")
        return (f"the PV sits {abs(state.offset):.3g} PV units "
                f"{'above' if state.offset > 0 else 'below'} the start value{moving}: the "
                "integral action is too slow for the load, or the output cannot reach it"), None
    if abs(state.drift) > state.drift_limit:
        return (f"the PV drifts at {state.drift:+.3g} PV units/s (at rest means at most "
                f"{state.drift_limit:.3g}): the loop does not hold the load yet (too little "
                "integral action?) or something moves the axis"), None
    return (f"the PV spread {state.spread:.3g} is above {state.spread_limit:.3g} (twice the "
            f"noise {state.noise:.3g} the rest check measured): the loop amplifies the noise "
            "(derivative or gain too high) or the sensor is noisier than at rest"), None


# ---------------------------------------------------------------------- the plan
@dataclass(frozen=True)
class StepPlan:
    """What the confirmation step does (build it with `plan_step`).

    size: setpoint step, PV units (signed). hold_time: s at rest at the start value before the
    step, at least (without `rest`: exactly). timeout: s after each setpoint/offset change at
    most (the record length). settle_band: half-width of the settling band as a fraction of
    |size|; noisy_band: the fraction used instead when the noise measured in the hold alone
    exceeds it (None: never). band_window: samples of the moving average the figures and the
    settled test use; band_label / band_note / band_judged: see BandChoice. settle_hold: s the
    PV must stay inside the band to count as settled (0 -> automatic: as long as the transient
    took, at least `min_hold`). min_record: s to record after the step at least.
    load_offset: output units added at the device while the loop holds the stepped setpoint
    (0 -> no load test). return_to_start: step back at the end. rest: when the PV counts as at
    rest (None: a fixed hold of hold_time). ts: loop period (s; None: from the samples).
    tu: ultimate period (s) if known. response: predicted PV after the step, normalised
    (0 -> 1), one value a tick of ts from the step on (empty: none). max_decay_ratio:
    successive swings at or above it stop the step (None: never); deviation_allowance:
    fraction of the step the PV may stray beyond the predicted response before the step is
    stopped as oscillating. why: why the record is as long as it is; notes: other lines for the
    screen (band, caps). max_size: the largest |size| (PV units) the step may be raised to when
    the noise measured in the hold would hide even the noisy band (inf: as far as the board's
    PV window allows with the overshoot the spec allows; None: never raised).
    """

    size: float
    hold_time: float = 0.5
    timeout: float = 10.0
    settle_band: float = DEFAULT_SETTLE_BAND
    settle_hold: float = 0.0
    min_hold: float = 0.2
    min_record: float = 0.0
    load_offset: float = 0.0
    return_to_start: bool = True
    noisy_band: float | None = DEFAULT_NOISY_BAND
    band_window: int = 1
    band_label: str = ""
    band_note: str = ""
    band_judged: bool = True
    rest: RestCriteria | None = None
    ts: float | None = None
    tu: float | None = None
    response: tuple[float, ...] = ()
    max_decay_ratio: float | None = 0.5
    deviation_allowance: float = 0.05
    why: str = ""
    notes: tuple[str, ...] = ()
    max_size: float | None = math.inf

    def __post_init__(self) -> None:
        if not math.isfinite(self.size) or self.size == 0.0:
            raise ValueError("step size must be a non-zero number (PV units)")
        for name in ("hold_time", "timeout", "settle_hold", "min_hold", "min_record"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0.0):
                raise ValueError(f"{name} must be >= 0 s, got {v!r}")
        if self.timeout <= 0.0:
            raise ValueError("timeout must be > 0 s")
        if not 0.0 < self.settle_band < 1.0:
            raise ValueError("settle_band must lie between 0 and 1 (fraction of the step)")
        if self.noisy_band is not None and not self.settle_band <= self.noisy_band < 1.0:
            raise ValueError("noisy_band must lie between settle_band and 1")
        if not math.isfinite(self.load_offset):
            raise ValueError("load_offset must be a finite number (output units)")
        if self.band_window < 1 or self.band_window % 2 == 0:
            raise ValueError("band_window must be an odd number of samples")

    @property
    def band(self) -> float:
        """Settling band half-width, PV units."""
        return self.settle_band * abs(self.size)

    @property
    def label(self) -> str:
        """The band's label ("2 % band")."""
        return self.band_label or band_label(self.settle_band)

    def summary(self) -> list[str]:
        """Lines for the screen: record length and why, the band, the notes."""
        lines = [self.why] if self.why else []
        lines.append(f"settling on the {self.label} (+/-{self.band:.3g} PV units)"
                     + (f": {self.band_note}" if self.band_note else ""))
        return lines + list(self.notes)


def _fin(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def plan_step(
    size: float,
    *,
    ts: float,
    predicted: Mapping[str, Any] | None = None,
    tu: float | None = None,
    noise_std: float | None = None,
    resolution: float = 0.0,
    drift: float = 0.0,
    drift_stderr: float = 0.0,
    duration: float = 5.0,
    hold: float = 1.0,
    max_duration: float = math.inf,
    spec: StepSpec | None = None,
    response: Sequence[float] | None = None,
    load_offset: float = 0.0,
    return_to_start: bool = True,
    integral: bool = True,
) -> StepPlan:
    """The plan of a confirmation step from what is known before it.

    size: setpoint step (PV units, signed); ts: loop period (s); predicted: the candidate's
    predicted figures (overshoot %, settling_time s on the 2 % band; autotune.core.design
    Proposal.predicted); tu: ultimate period (s); noise_std, resolution (PV units), drift and
    drift_stderr (PV units/s): the rest check's figures (noise_std None: not measured, the
    hold estimates it); duration: step.duration, the shortest record (s); hold: step.settle_time,
    the shortest rest before the step (s); max_duration: powered time left for the step
    (safety.max_duration minus what the run has used, s); spec: the step's spec (None: the
    default); response: the predicted PV after the step normalised to the step, a tick apart
    (`predicted_response`; empty: none); integral: the gains have integral action (then the
    PV must come to rest at the start value, not just anywhere).

    Record after each change: max(duration, 3 x predicted settling time, 4 x Tu), capped so
    that the hold, the step and the return fit in `max_duration`. Before the step the PV must
    be at rest for max(hold, Tu). The band is chosen by `choose_band` when the noise is known.
    """
    spec = StepSpec() if spec is None else spec
    if not ts > 0:
        raise ValueError("ts must be > 0 s")
    pred = dict(predicted or {})
    settle = _fin(pred.get("settling_time"))
    tu_ = _fin(tu) if tu is not None and tu > 0 else None
    terms = [(duration, f"step.duration {duration:g} s")]
    if settle is not None and settle > 0:
        terms.append((RECORD_SETTLING_FACTOR * settle,
                      f"{RECORD_SETTLING_FACTOR:g} x predicted settling time {settle:.3g} s"))
    if tu_ is not None:
        terms.append((RECORD_TU_FACTOR * tu_, f"{RECORD_TU_FACTOR:g} x Tu {tu_:.3g} s"))
    want, because = max(terms, key=lambda x: x[0])
    window = max(hold, tu_ or 0.0, 20 * ts)
    notes: list[str] = []
    record = want
    why = (f"records {record:.3g} s after each setpoint change ({because}; the longest of "
           + ", ".join(f"{v:.3g} s" for v, _ in terms) + ")")
    if math.isfinite(max_duration):
        cap = 0.5 * (max_duration - window)
        if cap < want:
            record = max(cap, 10 * ts)
            why = (f"records {record:.3g} s after each setpoint change: {because} would be "
                   f"{want:.3g} s, capped by safety.max_duration ({max_duration:.3g} s left "
                   "for the hold, the step and the return)")
            if settle is not None and spec.settling_factor is not None and \
                    record < spec.settling_factor * settle:
                notes.append("the record is shorter than the settling limit: settling may "
                             "not be judged; raise safety.max_duration")
    if noise_std is not None:
        band = choose_band(size, ts, noise_std=noise_std, resolution=resolution,
                           settle_band=spec.settle_band, noisy_band=spec.noisy_band, tu=tu_)
    else:
        band = BandChoice(spec.settle_band, spec.settle_band * abs(size), 1, 0.0,
                          band_label(spec.settle_band))
    if noise_std is not None and drift_stderr > 0 and abs(drift) > 3 * drift_stderr:
        notes.append(f"at rest the PV drifted {drift:+.3g} PV units/s: the loop must hold that "
                     "load before the step")
    half = band.half_width
    rest = RestCriteria(window=window, timeout=window + record, noise_std=noise_std,
                        resolution=resolution, drift_stderr=drift_stderr,
                        spread_floor=0.1 * half, drift_floor=0.25 * half / record,
                        offset_limit=max(0.5 * half, resolution) if integral else None)
    margin = spec.overshoot_margin if spec.overshoot_margin is not None else 5.0
    return StepPlan(
        size=size, hold_time=window, timeout=record, settle_band=band.fraction,
        min_hold=max(0.2, 0.5 * (tu_ or 0.0), 10 * ts), min_record=record,
        load_offset=load_offset, return_to_start=return_to_start,
        noisy_band=spec.noisy_band, band_window=band.window, band_label=band.label,
        band_note=band.note, band_judged=band.judged, rest=rest, ts=ts, tu=tu_,
        response=tuple(float(v) for v in (response if response is not None else ())),
        max_decay_ratio=spec.max_decay_ratio, deviation_allowance=margin / 100.0,
        why=why, notes=tuple(notes))


def fit_step_to_window(
    size: float, pv_window: float | None, fraction: float = DEFAULT_WINDOW_FRACTION
) -> tuple[float, str | None]:
    """Step size (PV units) kept to at most `fraction` of the PV window, with a message if reduced.

    The remaining part of the window leaves room for overshoot; the safety guard and the device
    still stop the run if the PV leaves the window.
    """
    if pv_window is None or not math.isfinite(pv_window) or pv_window <= 0:
        return size, None
    cap = fraction * pv_window
    if abs(size) <= cap:
        return size, None
    new = math.copysign(cap, size)
    return new, (
        f"step reduced from {size:g} to {new:g} PV units to stay inside the PV window "
        f"(+/-{pv_window:g}, step at most {fraction:.0%} of it)"
    )


RAISE_ROOM = 0.95  # a step raised for the noise keeps its peak within this fraction of the
#   window's room (the PV's own noise rides on the peak; common practice, no source)


def raise_cap(pv_window: float, spec: StepSpec, predicted_overshoot: float | None) -> float:
    """The largest |step| (PV units) a step may be raised to for the noise: its peak, with the
    overshoot the spec allows for the prediction (`StepSpec.overshoot_limit`; the absolute cap
    when nothing is predicted), stays within RAISE_ROOM of the PV window (+/- pv_window around
    the run's start; the job narrows it to the room from where the PV stands)."""
    if not math.isfinite(pv_window) or pv_window <= 0:
        return math.inf
    allowed, _ = spec.overshoot_limit(predicted_overshoot)
    return RAISE_ROOM * largest_step(0.0, 1.0, -pv_window, pv_window, allowed or 0.0)


def largest_step(start: float, size: float, pv_low: float, pv_high: float,
                 overshoot: float) -> float:
    """The largest |step| (PV units) in the direction of `size` from `start` whose peak with
    `overshoot` percent stays inside [pv_low, pv_high] (0 when the start is outside)."""
    room = (pv_high - start) if size > 0 else (start - pv_low)
    return max(0.0, room) / (1.0 + max(overshoot, 0.0) / 100.0)


def check_setpoints(start: float, size: float, pv_low: float, pv_high: float,
                    overshoot: float) -> str | None:
    """None when the start value, the stepped setpoint and the peak the spec allows
    (`overshoot` percent beyond it) all lie inside the board's PV window [pv_low, pv_high]
    (PV units); else one line saying which does not and what would fit."""
    window = f"the PV window loaded in the board ({pv_low:.4g} .. {pv_high:.4g})"
    if not pv_low < start < pv_high:
        return (f"the PV is at {start:.4g}, outside {window}: the axis has moved since the "
                "run started; bring it back and start again")
    target = start + size
    peak = start + size * (1.0 + max(overshoot, 0.0) / 100.0)
    if pv_low <= target <= pv_high and pv_low <= peak <= pv_high:
        return None
    fit = largest_step(start, size, pv_low, pv_high, overshoot)
    what = "setpoint" if not pv_low <= target <= pv_high else \
        f"peak with the {overshoot:.3g} % overshoot the spec allows"
    value = target if what == "setpoint" else peak
    return (f"the step from {start:.4g} by {size:+.4g} puts the {what} at {value:.4g}, "
            f"outside {window}: use a step of at most {math.copysign(fit, size):+.3g} PV "
            "units from here, or bring the axis back towards where the run started")


# ---------------------------------------------------------------------- the state machine
@dataclass(frozen=True)
class StepEvent:
    """Something the state machine decided at device time t (s)."""

    t: float
    kind: str  # "hold", "at_rest", "band", "step", "settled", "timeout", "oscillating",
    #            "load", "recovered", "unload", "return", "recover", "not_at_rest", "done", ...
    detail: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StepCommand:
    """What should apply after this sample: setpoint (PV units), device offset (output units);
    hold_output (output units): when not None, hold the output at this value with the loop open
    (the PID no longer runs: RECOVER after a stopped step)."""

    setpoint: float
    offset: float
    phase: StepPhase
    events: tuple[StepEvent, ...] = ()
    done: bool = False
    hold_output: float | None = None


@dataclass(frozen=True)
class Segment:
    """One phase of the run on the device time axis: [t_start, t_end] in s.

    t_start is the first sample at which the new setpoint/offset was in effect. sp_before and
    sp_after in PV units, offset in output units; settled False when the phase hit its timeout
    (or, for STEP, was stopped early).
    """

    phase: StepPhase
    t_start: float
    t_end: float
    sp_before: float
    sp_after: float
    offset: float
    settled: bool
    t_settled: float | None = None  # device time the settling hold began (PV entered the band)

    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["phase"] = self.phase.value
        return d


def resolution_of(pv: Sequence[float]) -> float:
    """Quantisation step of PV samples (PV units): the smallest gap between distinct values
    when the values repeat (fewer distinct values than half the samples), else 0."""
    a = np.asarray(pv, dtype=float)
    if a.size < 3:
        return 0.0
    levels = np.unique(a)
    return float(np.min(np.diff(levels))) if 1 < levels.size <= a.size // 2 else 0.0


def envelope_of(response: Sequence[float]) -> np.ndarray:
    """E[k] = max over j >= k of |1 - y[j]|: the largest deviation from the target the
    normalised predicted response still has ahead of tick k (non-increasing)."""
    dev = np.abs(1.0 - np.asarray(response, dtype=float))
    return np.maximum.accumulate(dev[::-1])[::-1] if dev.size else dev


class StepExperiment:
    """State machine of the confirmation step, one sample at a time.

    `update(t, pv, sp_applied, offset_applied, out)` takes the device time (s), the PV, the
    setpoint and offset that were in effect at that sample (as the device reports them, or the
    host's own values in host loop; NaN while the loop is not running yet: the device not in its
    PID mode, or the host's first output not applied yet) and the applied output (output units;
    optional: it gives the output that held the PV at rest); it returns what should apply from
    now on. A phase (the hold too) starts counting only once its setpoint/offset shows up in
    the samples, so the link's turnaround and samples queued before a command do not count.

    `bias` (output units) is the output the loop is at when the step starts; it stands in for
    the output that held the PV at rest until the hold has measured that. `output_limit`
    (output units) lets the hold say when the output sits at its limit.
    """

    def __init__(self, plan: StepPlan, start_value: float, bias: float = 0.0,
                 output_limit: float | None = None) -> None:
        self.plan = plan
        self.start_value = float(start_value)
        self.size = plan.size  # PV units: the step made (raised when the noise demands it)
        self.target = self.start_value + plan.size
        self.output_limit = output_limit
        self.phase = StepPhase.HOLD
        self.segments: list[Segment] = []
        self.settled_step: bool | None = None
        self.band = BandChoice(plan.settle_band, plan.band, plan.band_window, 0.0, plan.label,
                               plan.band_note, plan.band_judged)
        self.detect_band = plan.band  # PV units, band used to decide "settled"
        self.noise_std = 0.0  # PV units, measured in the hold
        self.resolution = 0.0  # PV units, quantisation step seen in the hold (0: none)
        self.rest_output = float(bias)  # output units that held the PV at rest before the step
        self.hold_state: RestState | None = None
        self.oscillation: dict[str, Any] | None = None
        self.decay_ratio: float | None = None  # largest decay ratio of swings beyond the band
        self.failure: str | None = None  # why the sequence ended early, if it did
        self.failure_kind: str | None = None  # "not_applied", "not_at_rest"
        self.extrema: list[Extremum] = []
        self._t0: float | None = None
        self._sp_cmd = self.start_value
        self._off_cmd = 0.0
        self._hold_out: float | None = None
        self._phase_start: float | None = None  # first sample with the phase's command in effect
        self._in_band_since: float | None = None
        self._sp_before = self.start_value
        self._cmd_t: float | None = None  # first sample after a command not yet in effect
        self._buf: tuple[list[float], list[float], list[float]] = ([], [], [])
        self._since_eval = 0
        self._filter: RunningMean | None = None
        self._tracker: SwingTracker | None = None
        self._envelope = envelope_of(plan.response)

    # ------------------------------------------------------------------ helpers
    def _criteria(self) -> RestCriteria:
        if self.plan.rest is not None:
            return self.plan.rest
        return RestCriteria(window=max(self.plan.hold_time, 1e-9), timeout=self.plan.timeout,
                            spread_floor=0.1 * self.plan.band)

    def _ts(self) -> float:
        if self.plan.ts is not None:
            return self.plan.ts
        t = self._buf[0]
        return float(np.median(np.diff(t))) if len(t) > 2 else 0.01

    def _effective(self, sp: float, offset: float) -> bool:
        tol_sp = 1e-6 * max(1.0, abs(self._sp_cmd)) + 1e-4 * abs(self.size)
        tol_off = 1e-6 * max(1.0, abs(self._off_cmd))
        return abs(sp - self._sp_cmd) <= tol_sp and abs(offset - self._off_cmd) <= tol_off

    def _begin(self, phase: StepPhase, sp: float, offset: float) -> None:
        self._sp_before = self._sp_cmd
        self.phase = phase
        self._sp_cmd = sp
        self._off_cmd = offset
        self._phase_start = None
        self._in_band_since = None
        self._cmd_t = None

    def _close(self, t: float, settled: bool) -> None:
        assert self._phase_start is not None
        self.segments.append(
            Segment(self.phase, self._phase_start, t, self._sp_before, self._sp_cmd,
                    self._off_cmd, settled, self._in_band_since if settled else None)
        )
        if self.phase is StepPhase.STEP:
            self.settled_step = settled

    def _hold_needed(self) -> float:
        """Seconds the PV must stay in the band: settle_hold, or automatically as long as the
        transient before it entered the band for good (common practice, no source), at least
        min_hold."""
        if self.plan.settle_hold > 0:
            return self.plan.settle_hold
        assert self._phase_start is not None and self._in_band_since is not None
        return max(self.plan.min_hold, self._in_band_since - self._phase_start)

    def _next_after(self, phase: StepPhase) -> tuple[StepPhase, float, float]:
        order = [StepPhase.STEP]
        if self.plan.load_offset:
            order += [StepPhase.LOAD, StepPhase.UNLOAD]
        if self.plan.return_to_start:
            order.append(StepPhase.RETURN)
        order.append(StepPhase.DONE)
        nxt = order[order.index(phase) + 1] if phase in order else order[0]
        sp = self.start_value if nxt in (StepPhase.RETURN, StepPhase.DONE) else self.target
        if nxt is StepPhase.DONE and not self.plan.return_to_start:
            sp = self.target
        off = self.plan.load_offset if nxt is StepPhase.LOAD else 0.0
        return nxt, sp, off

    def _buffer(self, t: float, pv: float, out: float | None, keep: float) -> None:
        bt, bp, bo = self._buf
        bt.append(t)
        bp.append(pv)
        bo.append(math.nan if out is None else out)
        if len(bt) > 64 and bt[-1] - bt[0] > 3.0 * keep:  # keep two windows (for the cause)
            k = int(np.searchsorted(bt, bt[-1] - 2.0 * keep - 1e-9))
            for b in self._buf:
                del b[:k]

    def _window(self, t: float, span: float) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        bt, bp, bo = (np.asarray(b, dtype=float) for b in self._buf)
        k = int(np.searchsorted(bt, t - span - 1e-9))
        out = bo[k:]
        return bt[k:], bp[k:], None if np.any(np.isnan(out)) else out

    def _rest_now(self, t: float, elapsed: float, crit: RestCriteria) -> RestState | None:
        """The rest state over the last window when it is due for a look, else None."""
        self._since_eval += 1
        if elapsed + 1e-9 < crit.window:
            return None
        every = max(1, int(crit.window / self._ts() / 20))
        if self._since_eval < every and elapsed < crit.timeout:
            return None
        self._since_eval = 0
        wt, wp, wo = self._window(t, crit.window)
        if wt.size < 3:
            return None
        return rest_state(wt, wp, crit, wo, self._sp_cmd if self.phase is StepPhase.HOLD
                          else None)

    def _end_hold(self, t: float, state: RestState, events: list[StepEvent]) -> None:
        self.hold_state = state
        if state.output is not None:
            self.rest_output = state.output
        wt, wp, _ = self._window(t, self._criteria().window)
        self.noise_std = difference_noise(wp)
        self.resolution = resolution_of(wp)
        crit = self.plan.rest
        sigma = max(self.noise_std, crit.noise_std or 0.0) if crit is not None else self.noise_std
        q = max(self.resolution, crit.resolution if crit is not None else 0.0)
        noisy = self.plan.noisy_band
        noisy = noisy if noisy is not None and noisy > self.plan.settle_band else None

        def band_for(size: float) -> BandChoice:
            return choose_band(size, self._ts(), noise_std=sigma, resolution=q,
                               settle_band=self.plan.settle_band, noisy_band=noisy,
                               tu=self.plan.tu)

        choice = band_for(self.size)
        raised = False
        if not choice.judged and self.plan.max_size is not None and \
                math.isfinite(self.plan.max_size):
            need = 1.05 * smallest_step(sigma, q, self._ts(), self.plan.tu,
                                        noisy or self.plan.settle_band)
            if abs(self.size) < need <= self.plan.max_size:
                old_size = self.size
                self.size = math.copysign(need, self.size)
                self.target = self.start_value + self.size
                choice = band_for(self.size)
                raised = True
                events.append(StepEvent(t, "step_raised", {
                    "from": old_size, "to": self.size,
                    "why": f"the PV noise measured in the hold (std {sigma:.3g}, resolution "
                           f"{q:.3g}) would hide the {choice.label} of a {abs(old_size):g} "
                           f"step; raised to {abs(self.size):.3g} (at most {self.plan.max_size:.3g} "
                           "fits the PV window with the overshoot allowed)"}))
        old = self.band
        if raised:
            # the plan's band was for the smaller step: the raised step's band replaces it
            self.band = choice
            events.append(StepEvent(t, "band", self.band.as_dict()))
        elif (choice.fraction > old.fraction or choice.window > old.window
                or choice.judged != old.judged or choice.noise > old.noise):
            self.band = BandChoice(max(choice.fraction, old.fraction), choice.half_width,
                                   max(choice.window, old.window), choice.noise,
                                   choice.label, choice.note or old.note,
                                   choice.judged and old.judged)
            if self.band.fraction != old.fraction or self.band.judged != old.judged:
                events.append(StepEvent(t, "band", self.band.as_dict()))
        self.detect_band = self.band.half_width
        self._filter = RunningMean(self.band.window)
        events.append(StepEvent(t, "at_rest", {**state.as_dict(), "held": t - (self._t0 or t)}))
        self._buf = ([], [], [])

    def _oscillating(self, t: float, period: float, decay: float | None, cause: str,
                     events: list[StepEvent]) -> None:
        self.oscillation = {"period": period, "decay_ratio": decay, "cause": cause, "t": t}
        events.append(StepEvent(t, "oscillating", dict(self.oscillation)))
        if self.phase is StepPhase.STEP and self._phase_start is not None:
            self._close(t, False)
        self._begin(StepPhase.RECOVER, self._sp_cmd, 0.0)
        self._phase_start = t
        self._hold_out = self.rest_output
        self._buf = ([], [], [])
        self._since_eval = 0
        events.append(StepEvent(t, "recover", {"output": self._hold_out}))

    def _swings(self, t: float, pv_f: float, events: list[StepEvent]) -> None:
        """Turning points of the filtered step response; stops the step when they show a
        sustained oscillation or stray from the predicted response."""
        plan = self.plan
        if plan.max_decay_ratio is None or self._phase_start is None:
            return
        r = (pv_f - self.start_value) / self.size
        step = abs(self.size)
        noise = self.band.noise / step
        if self._tracker is None:
            if r < SWING_START:
                return
            self._tracker = SwingTracker(swing_threshold(self.band, step), start_kind=1)
        ext = self._tracker.update(t, r)
        if ext is None:
            return
        ex = self._tracker.extrema
        self.extrema = list(ex)
        min_swing = min_swing_of(self.band, step)
        o = last_decay(ex)
        if o is not None and min(o.swing, o.first_swing) >= min_swing:
            self.decay_ratio = max(self.decay_ratio or 0.0, o.decay_ratio)
            if o.decay_ratio >= plan.max_decay_ratio:
                self._oscillating(t, o.period, o.decay_ratio,
                                  f"successive swings decay by {o.decay_ratio:.2f} only", events)
                return
        if self._envelope.size and len(ex) >= 2:
            ts = self._ts()
            slack = max(0.25 * plan.tu, 3 * ts) if plan.tu else 5 * ts
            for e in ex[-2:]:
                k = int((e.t - self._phase_start - slack) / ts)
                env = float(self._envelope[min(max(k, 0), self._envelope.size - 1)])
                dev = abs(e.y - 1.0)
                if dev > env + plan.deviation_allowance + noise:
                    self._oscillating(t, 2.0 * (ex[-1].t - ex[-2].t),
                                      o.decay_ratio if o is not None else None,
                                      f"the PV strayed {dev * 100:.3g} % of the step from the "
                                      f"target where the prediction allows {env * 100:.3g} % "
                                      f"+ {plan.deviation_allowance * 100:.3g} points", events)
                    return

    # ------------------------------------------------------------------ main entry
    def update(self, t: float, pv: float, sp_applied: float, offset_applied: float = 0.0,
               out: float | None = None) -> StepCommand:
        """Advance on one sample; returns what should apply from now on."""
        events: list[StepEvent] = []
        if self.phase is StepPhase.DONE:
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, (), True, self._hold_out)
        if self._t0 is None:
            self._t0 = t
            events.append(StepEvent(t, "hold", {"setpoint": self.start_value}))
        if self._phase_start is None and self._effective(sp_applied, offset_applied):
            self._phase_start = t
            events.append(StepEvent(t, self.phase.value,
                                    {"setpoint": self._sp_cmd, "offset": self._off_cmd}))
        if self._phase_start is None:
            if self._cmd_t is None:
                self._cmd_t = t
            elif t - self._cmd_t >= self.plan.timeout:
                # The device never showed the new setpoint/offset: end the sequence here.
                self.failure = (f"the {self.phase.value} setpoint/offset was not applied within "
                                f"{self.plan.timeout:g} s")
                self.failure_kind = "not_applied"
                events.append(StepEvent(t, "not_applied", {"phase": self.phase.value}))
                self.phase = StepPhase.DONE
                return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), True)

        if self.phase in (StepPhase.HOLD, StepPhase.RECOVER):
            if self._phase_start is None:
                return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events),
                                   False, self._hold_out)
            return self._resting(t, pv, out, events)
        if self._phase_start is not None:
            assert self._filter is not None
            pv_f = self._filter.update(pv)
            elapsed = t - self._phase_start
            if self.phase is StepPhase.STEP:
                self._swings(t, pv_f, events)
                if self.phase is not StepPhase.STEP:  # stopped: oscillating
                    return StepCommand(self._sp_cmd, 0.0, self.phase, tuple(events), False,
                                       self._hold_out)
            inside = abs(pv_f - self._sp_cmd) <= self.detect_band
            if inside:
                if self._in_band_since is None:
                    self._in_band_since = t
            else:
                self._in_band_since = None
            min_record = self.plan.min_record if self.phase is StepPhase.STEP else 0.0
            settled = (
                self._in_band_since is not None
                and t - self._in_band_since >= self._hold_needed()
                and elapsed >= min_record
            )
            timed_out = elapsed >= self.plan.timeout
            if timed_out and not settled:
                # At the timeout a PV inside the band for at least min_hold counts as settled.
                settled = (self._in_band_since is not None
                           and t - self._in_band_since >= self.plan.min_hold
                           and elapsed >= min_record)
            if settled or timed_out:
                kind = "settled" if settled else "timeout"
                if self.phase is StepPhase.LOAD and settled:
                    kind = "recovered"
                events.append(StepEvent(t, kind, {"phase": self.phase.value, "elapsed": elapsed}))
                self._close(t, settled)
                nxt, sp, off = self._next_after(self.phase)
                self._begin(nxt, sp, off)
                if nxt is StepPhase.DONE:
                    events.append(StepEvent(t, "done", {}))
                    return StepCommand(sp, off, nxt, tuple(events), True)
        return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), False)

    def _resting(self, t: float, pv: float, out: float | None,
                 events: list[StepEvent]) -> StepCommand:
        """HOLD (loop closed at the start value) or RECOVER (output held): until at rest."""
        assert self._phase_start is not None
        crit = self._criteria()
        elapsed = t - self._phase_start
        self._buffer(t, pv, out, crit.window)
        hold = self.phase is StepPhase.HOLD
        if hold and self.plan.rest is None:
            # a fixed hold of hold_time
            if elapsed + 1e-12 >= self.plan.hold_time:
                bt, bp, bo = (np.asarray(b, dtype=float) for b in self._buf)
                state = rest_state(bt, bp, crit, None if np.any(np.isnan(bo)) else bo) \
                    if bt.size >= 3 else RestState(True, 0.0, 0.0, 0.0, 0.0, 0.0, pv, out)
                self._end_hold(t, state, events)
                self._begin(StepPhase.STEP, self.target, 0.0)
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), False)
        state = self._rest_now(t, elapsed, crit)
        resting = state is not None and state.at_rest
        if not resting and elapsed < crit.timeout:
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), False,
                               self._hold_out)
        if hold and resting:
            assert state is not None
            self._end_hold(t, state, events)
            self._begin(StepPhase.STEP, self.target, 0.0)
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), False)
        if hold:
            wt, wp, wo = self._window(t, crit.window)
            if state is None:
                state = rest_state(wt, wp, crit, wo, self._sp_cmd) if wt.size >= 3 else \
                    RestState(False, math.nan, 0.0, math.nan, 0.0, 0.0, pv, out)
            ct, cp, co = self._window(t, 2.0 * crit.window)  # two windows show a swing better
            cause, osc = moving_cause(ct, cp, state, co, self.output_limit)
            events.append(StepEvent(t, "not_at_rest", {**state.as_dict(), "cause": cause}))
            self.hold_state = state
            if osc is not None:
                self._oscillating(t, osc["period"], None,
                                  f"while holding the start value: {cause}", events)
                return StepCommand(self._sp_cmd, 0.0, self.phase, tuple(events), False,
                                   self._hold_out)
            self.failure = (f"the PV did not come to rest at the start value "
                            f"{self.start_value:.4g} within {crit.timeout:.3g} s: {cause}")
            self.failure_kind = "not_at_rest"
            self.phase = StepPhase.DONE
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), True)
        # RECOVER: at rest again, or as long as the hold may take
        self.segments.append(Segment(StepPhase.RECOVER, self._phase_start, t, self._sp_cmd,
                                     self._sp_cmd, 0.0, resting))
        events.append(StepEvent(t, "recovered" if resting else "timeout",
                                {"phase": StepPhase.RECOVER.value, "elapsed": elapsed}))
        events.append(StepEvent(t, "done", {}))
        self.phase = StepPhase.DONE
        return StepCommand(self._sp_cmd, 0.0, self.phase, tuple(events), True, self._hold_out)

    def elapsed(self, t: float) -> float:
        """Seconds since the current phase took effect (0 before it did)."""
        return 0.0 if self._phase_start is None else max(0.0, t - self._phase_start)

    def segment(self, phase: StepPhase) -> Segment | None:
        """The recorded segment of `phase`, if it happened."""
        for s in self.segments:
            if s.phase is phase:
                return s
        return None

    def step_started(self) -> float | None:
        """Device time (s) the stepped setpoint took effect, None before (or without) it."""
        seg = self.segment(StepPhase.STEP)
        if seg is not None:
            return seg.t_start
        return self._phase_start if self.phase is StepPhase.STEP else None


# ---------------------------------------------------------------------- figures over arrays
def _slice(t: np.ndarray, t_start: float, t_end: float) -> slice:
    i0 = int(np.searchsorted(t, t_start - 1e-9, side="left"))
    i1 = int(np.searchsorted(t, t_end + 1e-9, side="right"))
    return slice(i0, i1)


def step_figures(
    t: Sequence[float],
    pv: Sequence[float],
    out: Sequence[float],
    segment: Segment,
    output_limit: float | None = None,
    settle_band: float = DEFAULT_SETTLE_BAND,
    window: int = 1,
) -> StepMetrics:
    """Step-response figures of one STEP (or RETURN) segment over the recorded arrays.

    Time is counted from the first sample with the new setpoint in effect (s); the initial value
    is the setpoint before the step and the target the setpoint after it (PV units); saturation is
    counted against `output_limit` (output units). The figures are read on the PV smoothed by a
    centred moving average of `window` samples (1: as recorded), settling on the band of
    `settle_band` x the step (a fraction: 0.02 is the 2 % band). See
    autotune.core.metrics.step_metrics.
    """
    ta, ya, ua = (np.asarray(a, dtype=float) for a in (t, pv, out))
    sl = _slice(ta, segment.t_start, segment.t_end)
    y = moving_average(ya[sl], window) if window > 1 else ya[sl]
    return step_metrics(
        ta[sl] - segment.t_start, y, segment.sp_before, segment.sp_after,
        u=ua[sl], u_limit=output_limit, settle_band=settle_band,
    )


def swing_threshold(band: BandChoice, step: float) -> float:
    """Hysteresis of the turning points (fraction of the step): half the band, and twice the
    noise left after the filter (its peak-to-peak), whichever is larger."""
    return max(0.5 * band.fraction, 2.0 * band.noise / step)


def min_swing_of(band: BandChoice, step: float) -> float:
    """Smallest swing (fraction of the step) that counts towards an oscillation: the band's
    full width, and three times the noise left after the filter (a quantised loop dithers by
    one count), whichever is larger; smaller swings are settled."""
    return max(2.0 * band.fraction, 3.0 * band.noise / step)


def swings_of(t: Sequence[float], y: Sequence[float], start: float, size: float,
              threshold: float) -> list[Extremum]:
    """Turning points of a recorded step response (normalised: 0 at `start`, 1 at start +
    size), counted from where it first covers half the step, with hysteresis `threshold`
    (fraction of the step): the same rule the state machine applies while recording."""
    r = (np.asarray(y, dtype=float) - start) / size
    ta = np.asarray(t, dtype=float)
    k = np.nonzero(r >= SWING_START)[0]
    if k.size == 0:
        return []
    tracker = SwingTracker(threshold, start_kind=1)
    for ti, ri in zip(ta[k[0]:], r[k[0]:], strict=True):
        tracker.update(float(ti), float(ri))
    return tracker.extrema


@dataclass(frozen=True)
class LoadFigures:
    """Load-disturbance figures: an offset (output units) added at the plant input at t_start.

    peak_deviation: largest |PV - setpoint| after the offset, signed (PV units); time_to_peak and
    recovery_time in s from the offset (recovery: PV back inside the band for good; None if it
    never came back within the record); iae in PV units x s.
    """

    offset: float
    peak_deviation: float
    time_to_peak: float
    recovery_time: float | None
    iae: float
    band: float

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def load_figures(
    t: Sequence[float], pv: Sequence[float], segment: Segment, band: float
) -> LoadFigures:
    """Peak deviation and recovery time of a LOAD segment (band: PV units half-width)."""
    ta, ya = np.asarray(t, dtype=float), np.asarray(pv, dtype=float)
    sl = _slice(ta, segment.t_start, segment.t_end)
    tt, e = ta[sl] - segment.t_start, ya[sl] - segment.sp_after
    if tt.size == 0:
        raise ValueError("no samples in the load segment")
    k = int(np.argmax(np.abs(e)))
    outside = np.nonzero(np.abs(e) > band)[0]
    if outside.size == 0:
        recovery: float | None = 0.0
    elif outside[-1] + 1 < tt.size:
        recovery = float(tt[outside[-1] + 1])
    else:
        recovery = None
    iae = float(np.trapezoid(np.abs(e), tt)) if tt.size > 1 else 0.0
    return LoadFigures(segment.offset, float(e[k]), float(tt[k]), recovery, iae, band)


# ---------------------------------------------------------------------- predictions (pure)
def model_from_dict(model: dict[str, Any]) -> Any:
    """DelayedTF from a result.json `model`; None if it cannot be built.

    The transfer function is read from `num`, `den` (highest power of s first) and `delay` (s),
    which every model kind writes; result files without them fall back to the kind's params:
    fopdt (gain, time_constant, delay), sopdt (gain, t1, t2, delay), integrator_lag
    (velocity_gain, time_constant, delay).
    """
    from autotune.core.lti import DelayedTF, fopdt, integrator_lag, sopdt  # scipy: lazy

    try:
        if "num" in model and "den" in model:
            return DelayedTF(tuple(float(c) for c in model["num"]),
                             tuple(float(c) for c in model["den"]), float(model.get("delay", 0.0)))
        kind, p = model["kind"], model["params"]
        if kind == "fopdt":
            return fopdt(float(p["gain"]), float(p["time_constant"]), float(p["delay"]))
        if kind == "sopdt":
            return sopdt(float(p["gain"]), float(p["t1"]), float(p["t2"]), float(p["delay"]))
        if kind == "integrator_lag":
            return integrator_lag(float(p["velocity_gain"]), float(p["time_constant"]),
                                  float(p["delay"]))
    except (KeyError, TypeError, ValueError):
        return None
    return None


def _closed_loop(plant: Any, settings: Any, size: float, t_end: float, extra_ticks: int,
                 dead_zone: float = 0.0) -> Any:
    # about the operating point: the bias holds the load there, the step is a deviation from it
    # (through the actuator's dead zone about that output)
    bias = float(settings.bias)
    settings = dataclasses.replace(settings, bias=0.0)
    if extra_ticks:
        plant = DelayedTF(plant.num, plant.den, plant.delay + extra_ticks * settings.ts)
    return simulate_closed_loop(plant, settings, t_end, size, dead_zone=dead_zone,
                                operating_output=bias)


def predict_step(plant: Any, settings: Any, size: float, t_end: float,
                 extra_ticks: int = 0, settle_band: float = DEFAULT_SETTLE_BAND,
                 dead_zone: float = 0.0) -> dict[str, float]:
    """Predicted step figures of `settings` (PidSettings) on `plant` (DelayedTF) for a setpoint
    step of `size` PV units, over `t_end` s (autotune.core.closedloop; `extra_ticks` of loop latency,
    e.g. 1 in host loop, added as dead time), settling on the `settle_band` band. The step is a
    deviation from the operating point (the bias holds the load there: it is left out)."""
    run = _closed_loop(plant, settings, size, t_end, extra_ticks, dead_zone)
    lim = settings.out_max if math.isfinite(settings.out_max) else None
    m = step_metrics(run.t, run.y, 0.0, size, u=run.u, u_limit=lim, settle_band=settle_band)
    return {k: v for k, v in m.as_dict().items() if math.isfinite(v)}


def predicted_response(plant: Any, settings: Any, size: float, t_end: float,
                       extra_ticks: int = 0, dead_zone: float = 0.0) -> tuple[float, ...]:
    """The predicted PV after a setpoint step of `size` (PV units), normalised to the step
    (0 -> 1), one value a tick of settings.ts over `t_end` s: the `response` of `plan_step`.
    Empty when the loop is unstable on the model (the values do not stay finite)."""
    run = _closed_loop(plant, settings, size, t_end, extra_ticks, dead_zone)
    y = np.asarray(run.y, dtype=float) / size
    if not np.all(np.isfinite(y)) or float(np.max(np.abs(y))) > 1e6:
        return ()
    return tuple(float(v) for v in y)


def figures_of_response(response: Sequence[float], ts: float, settle_band: float
                        ) -> dict[str, float]:
    """Overshoot (%), rise and settling time (s) of a normalised predicted response on the band
    `settle_band` (fraction of the step)."""
    y = np.asarray(response, dtype=float)
    if y.size < 2:
        return {}
    m = step_metrics(np.arange(y.size) * ts, y, 0.0, 1.0, settle_band=settle_band)
    return {k: v for k, v in (("overshoot", m.overshoot), ("rise_time", m.rise_time),
                              ("settling_time", m.settling_time)) if math.isfinite(v)}


@dataclass(frozen=True)
class StepCandidate:
    """Gains to try: a name (proposal name or "manual"), parallel gains, predicted figures."""

    name: str
    gains: Any  # autotune.core.pid.PidGains
    predicted: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StepSettings:
    """How to run the step on the device.

    loop: "device" (the board runs the PID: SetPid, SetSetpoint) or "host" (autotune.core.pid on the
    host, SetOutput every sample); output_limit: output units (PID limits; saturation counted
    against it); deriv_filter_n, setpoint_weight, tracking_time (s, None = clamping): PID
    settings; bias: the output the loop is at when the step starts (output units: the relay's
    balanced bias; the PID's integral is preset to it, so a loaded axis does not drop);
    spec: the verdict's limits (autotune.core.verdict.StepSpec; None = the default spec);
    ts: loop period (s), None = the device tick.
    """

    plan: StepPlan
    loop: str = "device"
    output_limit: float = 20.0
    deriv_filter_n: float = 10.0
    setpoint_weight: float = 1.0
    tracking_time: float | None = None
    bias: float = 0.0
    spec: StepSpec | None = None
    ts: float | None = None

    def pid_settings(self, gains: Any, ts: float) -> Any:
        return PidSettings(gains, ts, self.deriv_filter_n, self.setpoint_weight,
                           self.tracking_time, -self.output_limit, self.output_limit, self.bias)


def settings_from_config(
    cfg: Any,
    loop: str,
    *,
    size: float | None = None,
    load_offset: float = 0.0,
    spec: StepSpec | None = None,
    deriv_filter_n: float = 10.0,
    setpoint_weight: float = 1.0,
    tracking_time: float | None = None,
    candidate: Any = None,
    ts: float | None = None,
    tu: float | None = None,
    rest: Any = None,
    bias: float | None = None,
    model: Any = None,
    elapsed: float = 0.0,
    fixed_size: bool = False,
    dead_zone: float = 0.0,
) -> tuple[StepSettings, str | None]:
    """StepSettings from an autotune.config.Config (what `autotune step` and `tune` use).

    size: PV units (None: step.size, else design.step_size, else relay.target_amplitude), kept to
    at most DEFAULT_WINDOW_FRACTION of safety.pv_window; output limit safety.output_limit;
    spec: None = `autotune.core.verdict.spec_from_config(cfg)`. The plan (`plan_step`) comes
    from: candidate (StepCandidate or Proposal: its predicted figures), ts (loop period, s: the
    device tick; None: 0.01 s for the plan, the device tick when running), tu (ultimate period,
    s), rest (the rest check, autotune.core.prechecks.RestReport: noise, resolution, drift),
    step.duration and step.settle_time, safety.max_duration minus `elapsed` (powered seconds
    already used), and model (DelayedTF: the predicted response the step is watched against;
    with the candidate's gains). bias: the output the loop is at (output units; None:
    relay.bias); dead_zone: the actuator's identified dead zone (output units), which the
    predicted response goes through. Unless `fixed_size` (the operator gave the size), a step whose band the
    measured noise would hide is raised to the smallest that shows it, up to the window's
    limit (here from the rest check; in the hold when only the hold measures the noise).
    Returns the settings and a message when the step had to be reduced or was raised.
    """
    for v in (size, cfg.step.size, cfg.design.step_size, cfg.relay.target_amplitude):
        if v is not None:
            size = float(v)
            break
    assert size is not None
    fitted, note = fit_step_to_window(size, cfg.safety.pv_window)
    spec = spec_from_config(cfg) if spec is None else spec
    settings = StepSettings(plan=StepPlan(size=fitted), loop=loop,
                            output_limit=cfg.safety.output_limit,
                            deriv_filter_n=deriv_filter_n, setpoint_weight=setpoint_weight,
                            tracking_time=tracking_time,
                            bias=cfg.relay.bias if bias is None else float(bias), spec=spec,
                            ts=None)
    tick = 0.01 if ts is None else float(ts)
    predicted = dict(getattr(candidate, "predicted", None) or {})
    cap = raise_cap(cfg.safety.pv_window, spec, _fin(predicted.get("overshoot")))
    if rest is not None and not fixed_size:
        noisy = spec.noisy_band if spec.noisy_band > spec.settle_band else spec.settle_band
        need = 1.05 * smallest_step(float(rest.noise_std), float(rest.resolution), tick, tu,
                                    noisy)
        if abs(fitted) < need <= cap:
            note = ((note + "; ") if note else "") + (
                f"step raised from {abs(fitted):g} to {need:.3g} PV units: the PV noise (std "
                f"{float(rest.noise_std):.3g}, resolution {float(rest.resolution):.3g}) would "
                f"hide the {band_label(noisy)} of a smaller step")
            fitted = math.copysign(need, fitted)
            settings = dataclasses.replace(settings, plan=StepPlan(size=fitted))
    response: tuple[float, ...] = ()
    if model is not None and candidate is not None:
        pid = settings.pid_settings(candidate.gains, tick)
        settle = _fin(predicted.get("settling_time"))
        span = max(cfg.step.duration, RECORD_SETTLING_FACTOR * (settle or 0.0),
                   RECORD_TU_FACTOR * (tu or 0.0))
        try:
            response = predicted_response(model, pid, fitted, span,
                                          extra_ticks=1 if loop == "host" else 0,
                                          dead_zone=dead_zone)
        except (ValueError, ArithmeticError):
            response = ()
    plan = plan_step(
        fitted, ts=tick, predicted=predicted, tu=tu,
        noise_std=None if rest is None else float(rest.noise_std),
        resolution=0.0 if rest is None else float(rest.resolution),
        drift=0.0 if rest is None else float(rest.drift),
        drift_stderr=0.0 if rest is None else float(getattr(rest, "drift_stderr", 0.0)),
        duration=cfg.step.duration, hold=cfg.step.settle_time,
        max_duration=cfg.safety.max_duration - elapsed, spec=spec, response=response,
        load_offset=load_offset,
        integral=candidate is None or float(candidate.gains.ki) != 0.0)
    plan = dataclasses.replace(plan, max_size=None if fixed_size else cap)
    return dataclasses.replace(settings, plan=plan), note


@dataclass(frozen=True)
class StepProgress:
    """What `run_step` reports to its on_update callback (device time s, PV and output units)."""

    phase: StepPhase
    t: float
    pv: float
    sp: float
    out: float
    elapsed: float  # s since the current phase took effect (0 before)
    events: tuple[StepEvent, ...] = ()


@dataclass
class StepOutcome:
    """One confirmation step: what ran, what was measured, the verdict.

    metrics: figures of the STEP segment on the labelled band (None when it never started);
    load: load-disturbance figures (None without a load test); rows: measured vs predicted;
    verdict: against the spec; end_reason: "completed", "oscillating" (stopped early, the loop
    returned to rest), "not_at_rest", "not_applied", or why the run stopped ("aborted",
    "limit:pv_window", "step:out_of_range", ...); arrays t/pv/out/sp: what was recorded during
    this step (device time s, PV, output, PV). band: settling band half-width (PV units),
    band_choice: the band with its label, note and filter; predicted_on_band: the predicted
    figures the verdict used (on the same band); rest_output: the output (output units) that
    held the PV at rest at the start value (pass it as the next step's bias); hold: the rest
    state that ended the hold; oscillation: the sustained oscillation that stopped the step.
    """

    candidate: StepCandidate
    pid: Any  # PidSettings as run
    loop: str
    plan: StepPlan
    start_value: float
    segments: list[Segment] = field(default_factory=list)
    settled: bool = False
    metrics: StepMetrics | None = None
    load: LoadFigures | None = None
    rows: list[Any] = field(default_factory=list)
    verdict: Any = None
    end_reason: str = "completed"
    message: str = ""
    noise_std: float = 0.0  # PV units, over the hold
    late_outputs: int = 0  # host loop: samples whose applied output was not the one sent last
    band: float = 0.0  # settling band half-width used, PV units
    band_choice: BandChoice | None = None
    predicted_on_band: dict[str, Any] = field(default_factory=dict)
    rest_output: float = 0.0
    hold: RestState | None = None
    oscillation: dict[str, Any] | None = None
    decay_ratio: float | None = None
    record: float | None = None  # s recorded after the step (less when it was stopped)
    size: float = 0.0  # PV units: the step made (the plan's, or raised for the noise)
    t: list[float] = field(default_factory=list)
    pv: list[float] = field(default_factory=list)
    out: list[float] = field(default_factory=list)
    sp: list[float] = field(default_factory=list)

    def step_field(self) -> dict[str, Any]:
        """The result.json `step` field (contract: overshoot %, rise_time, settling_time s,
        iae, predicted; more keys: all figures, the spec and every check beside its limit (in
        `verdict`), the band, the record length and why, the hold, the oscillation, load
        test, gains, segments)."""
        m = self.metrics.as_dict() if self.metrics is not None else {}
        g = self.candidate.gains

        def fin(v: Any) -> Any:
            return v if isinstance(v, float) and math.isfinite(v) else None

        out: dict[str, Any] = {k: fin(v) for k, v in m.items()}
        for k in ("overshoot", "rise_time", "settling_time", "iae"):
            out.setdefault(k, None)
        bc = self.band_choice
        out.update({
            "predicted": dict(self.candidate.predicted),
            "predicted_on_band": dict(self.predicted_on_band),
            "proposal": self.candidate.name,
            "gains": {"kp": g.kp, "ki": g.ki, "kd": g.kd},
            "setpoint_weight": self.pid.setpoint_weight,
            "loop": self.loop,
            "ts": self.pid.ts,
            "size": self.size,
            "planned_size": self.plan.size,
            "start_value": self.start_value,
            "bias": self.pid.bias,
            "rest_output": self.rest_output,
            "settled": self.settled,
            "settle_band": self.band,
            "band": None if bc is None else {**bc.as_dict(), "half_width": self.band},
            "record": {"planned": self.plan.timeout, "recorded": self.record,
                       "why": self.plan.why, "notes": list(self.plan.notes)},
            "hold": None if self.hold is None else self.hold.as_dict(),
            "oscillation": self.oscillation,
            "decay_ratio": self.decay_ratio,
            "noise_std": self.noise_std,
            "late_outputs": self.late_outputs if self.loop == "host" else None,
            "end_reason": self.end_reason,
            "message": self.message,
            "segments": [s.to_dict() for s in self.segments],
            "comparison": [r.to_dict() for r in self.rows],
            "spec": None if self.verdict is None else self.verdict.spec,
            "verdict": None if self.verdict is None else self.verdict.to_dict(),
            "load": None if self.load is None else self.load.to_dict(),
        })
        return out


def _step_segment(o: StepOutcome, exp: StepExperiment) -> Segment | None:
    seg = exp.segment(StepPhase.STEP)
    t0 = exp.step_started()
    if seg is None and t0 is not None and o.t:
        # stopped during the step: figures of what was recorded so far
        seg = Segment(StepPhase.STEP, t0, o.t[-1], exp.start_value, exp.target, 0.0, False)
    return seg


def _band_from_record(exp: StepExperiment, t: np.ndarray, pv: np.ndarray) -> BandChoice:
    """The band, widened when the step's record shows a quantisation step the rest (a still
    PV) could not: a coarse encoder dithers by one count about the setpoint."""
    q = resolution_of(pv)
    band = exp.band
    known = exp.plan.rest.resolution if exp.plan.rest is not None else 0.0
    if q <= max(known, exp.resolution) * (1 + 1e-9):
        return band
    ts = exp.plan.ts or (float(np.median(np.diff(t))) if t.size > 2 else 0.01)
    noisy = exp.plan.noisy_band
    sigma = max(exp.noise_std, exp.plan.rest.noise_std or 0.0) if exp.plan.rest else \
        exp.noise_std
    choice = choose_band(exp.size, ts, noise_std=sigma, resolution=q,
                         settle_band=exp.plan.settle_band,
                         noisy_band=noisy if noisy is not None and noisy > exp.plan.settle_band
                         else None, tu=exp.plan.tu)
    if choice.fraction <= band.fraction and choice.judged == band.judged:
        return band
    return dataclasses.replace(choice, note=f"{choice.note} (the PV moves in steps of "
                               f"{q:.3g}, seen in the step's record)")


def finish_outcome(o: StepOutcome, exp: StepExperiment) -> StepOutcome:
    """Fill metrics, load figures, comparison and verdict inputs from the recorded arrays (pure).

    The figures are read on the PV smoothed by the band's moving average, settling on the
    labelled band; the predicted figures compared are on the same band (from the predicted
    response when the plan has one, else the candidate's, labelled when their band differs).
    """
    o.segments = list(exp.segments)
    o.size = exp.size
    band = exp.band
    o.noise_std = exp.noise_std
    o.rest_output = exp.rest_output
    o.hold = exp.hold_state
    o.oscillation = exp.oscillation
    seg = _step_segment(o, exp)
    plan = exp.plan
    if seg is not None:
        ta, ya = np.asarray(o.t, dtype=float), np.asarray(o.pv, dtype=float)
        sl = (ta >= seg.t_start - 1e-9) & (ta <= seg.t_end + 1e-9)
        if int(np.sum(sl)) >= 2:
            band = _band_from_record(exp, ta[sl], ya[sl])
            o.metrics = step_figures(o.t, o.pv, o.out, seg, o.pid.out_max
                                     if math.isfinite(o.pid.out_max) else None,
                                     band.fraction, band.window)
            y = moving_average(ya[sl], band.window)
            step = abs(exp.size)
            ex = swings_of(ta[sl], y, exp.start_value, exp.size, swing_threshold(band, step))
            ratios = decay_ratios(ex, min_swing_of(band, step))
            o.decay_ratio = max((r.decay_ratio for r in ratios), default=None)
    o.band_choice = band
    o.band = band.half_width
    o.record = None if seg is None else seg.t_end - seg.t_start
    # settled: the step ran its record and the PV ends inside the band (figures' reading)
    o.settled = bool(seg is not None and exp.segment(StepPhase.STEP) is not None
                     and exp.oscillation is None and o.metrics is not None
                     and math.isfinite(o.metrics.settling_time))
    lseg = exp.segment(StepPhase.LOAD)
    if lseg is not None:
        o.load = load_figures(o.t, o.pv, lseg, exp.detect_band)
    predicted = dict(o.candidate.predicted)
    labels = {"settling_time": band.label}
    if band.window > 1:
        labels["overshoot"] = f"PV smoothed over {band.window} samples"
    if plan.response and plan.ts:
        predicted.update(figures_of_response(plan.response, plan.ts, band.fraction))
    elif band.fraction != DEFAULT_SETTLE_BAND and "settling_time" in predicted:
        labels["settling_time"] = (f"{band.label}; predicted on the "
                                   f"{band_label(DEFAULT_SETTLE_BAND)} (an upper bound)")
    _scale_peak_output(predicted, o)
    o.predicted_on_band = {k: v for k, v in predicted.items()
                           if k in ("overshoot", "rise_time", "settling_time")}
    if o.metrics is not None:
        o.rows = compare(o.metrics, predicted, labels)
    return o


def _scale_peak_output(predicted: dict[str, Any], o: StepOutcome) -> None:
    """The design predicts the peak output for its own step (`step_size`, from the holding
    output 0); the step made may be larger (raised for the noise) and start from a holding
    output: scaled linearly to the step made and counted from the output held before it (an
    upper bound when the step drives the output towards 0)."""
    peak, made = _fin(predicted.get("peak_output")), _fin(predicted.get("step_size"))
    if peak is None or made is None or made <= 0 or not o.size:
        return
    ratio = abs(o.size) / made
    if abs(ratio - 1.0) > 1e-6 or o.rest_output:
        predicted["peak_output"] = peak * ratio + abs(o.rest_output or 0.0)


def judge_outcome(o: StepOutcome, spec: StepSpec | None) -> None:
    """The verdict of a finished outcome against `spec` (None: the default spec)."""
    if o.metrics is None and o.oscillation is None:
        return
    band = o.band_choice
    o.verdict = judge(o.metrics if o.metrics is not None else {}, spec, settled=o.settled,
                      predicted=o.predicted_on_band, record=o.record,
                      oscillation=o.oscillation, decay_ratio=o.decay_ratio,
                      band_label=band.label if band is not None else o.plan.label,
                      band_judged=band.judged if band is not None else True,
                      band_note=band.note if band is not None else "",
                      noise_points=(100.0 * band.noise / abs(o.size)
                                    if band is not None and o.size else 0.0))
