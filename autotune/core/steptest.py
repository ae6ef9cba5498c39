"""The confirmation step: hold, step the setpoint, record until settled, return to the start.

Pure part (no I/O, no clock; time comes in as device timestamps in seconds):
- `StepPlan`: what to do (step size in PV units, hold time, timeouts, settling band, optional
  load-disturbance offset in output units);
- `fit_step_to_window`: keeps the step inside the PV window;
- `StepExperiment`: a state machine fed one sample at a time; it says which setpoint and which
  device output offset should apply now and when the run is done;
- `step_figures` / `load_figures`: the measured figures over the recorded arrays.

Phases: HOLD (loop closed at the start value) -> STEP (setpoint = start + size, until settled or
timeout) -> optional LOAD (offset added at the plant input while the loop holds the stepped
setpoint: peak deviation, recovery time) -> UNLOAD (offset removed) -> RETURN (setpoint back to the
start value) -> DONE.

The I/O part (`run_step`) lives at the end of this module and drives a protocol Link through the
session scaffolding in autotune.job.tune; it is the only part that touches a port.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import numpy as np

from autotune.core.metrics import StepMetrics, step_metrics

DEFAULT_WINDOW_FRACTION = 0.6  # step at most this fraction of the PV window (common practice, no source)
DEFAULT_SETTLE_BAND = 0.02  # settling band, fraction of the step size (2% band, as step_info)
NOISE_BAND_FACTOR = 4.0  # the band is never narrower than this many noise std (common practice, no source)


class StepPhase(StrEnum):
    """Where a confirmation step stands."""

    HOLD = "hold"
    STEP = "step"
    LOAD = "load"
    UNLOAD = "unload"
    RETURN = "return"
    DONE = "done"


@dataclass(frozen=True)
class StepPlan:
    """What the confirmation step does.

    size: setpoint step, PV units (signed). hold_time: s at the start value before the step.
    timeout: s after each setpoint/offset change to wait for settling before moving on (at the
    timeout, a PV inside the band for at least `min_hold` counts as settled).
    settle_band: half-width of the settling band as a fraction of |size|.
    settle_hold: s the PV must stay inside the band to count as settled (0 -> automatic: as long
    as the transient took to enter the band for good, at least `min_hold`).
    min_hold: s, lower bound of the automatic hold. min_record: s to record after the step at least
    (e.g. 1.5 x the predicted settling time). load_offset: output units added at the device while
    the loop holds the stepped setpoint (0 -> no load test). return_to_start: step back at the end.
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
        if not math.isfinite(self.load_offset):
            raise ValueError("load_offset must be a finite number (output units)")

    @property
    def band(self) -> float:
        """Settling band half-width, PV units."""
        return self.settle_band * abs(self.size)


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


@dataclass(frozen=True)
class StepEvent:
    """Something the state machine decided at device time t (s)."""

    t: float
    kind: str  # "hold", "step", "settled", "timeout", "load", "recovered", "unload", "return", "done"
    detail: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StepCommand:
    """What should apply after this sample: setpoint (PV units), device offset (output units)."""

    setpoint: float
    offset: float
    phase: StepPhase
    events: tuple[StepEvent, ...] = ()
    done: bool = False


@dataclass(frozen=True)
class Segment:
    """One phase of the run on the device time axis: [t_start, t_end] in s.

    t_start is the first sample at which the new setpoint/offset was in effect. sp_before and
    sp_after in PV units, offset in output units; settled False when the phase hit its timeout.
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


def noise_of(pv: Sequence[float]) -> tuple[float, float]:
    """(standard deviation, quantisation step) of PV samples at rest, PV units.

    The step is the smallest gap between distinct values when the values repeat (fewer distinct
    values than half the samples), else 0.
    """
    a = np.asarray(pv, dtype=float)
    if a.size < 3:
        return 0.0, 0.0
    levels = np.unique(a)
    res = float(np.min(np.diff(levels))) if 1 < levels.size <= a.size // 2 else 0.0
    return float(np.std(a)), res


class StepExperiment:
    """State machine of the confirmation step, one sample at a time.

    `update(t, pv, sp_applied, offset_applied)` takes the device time (s), the PV, and the setpoint
    and offset that were in effect at that sample (as the device reports them, or the host's own
    values in host loop); it returns the setpoint and offset that should apply from now on. A phase
    starts counting only once its setpoint/offset shows up in the samples, so the link's
    turnaround does not shorten the record.

    The PV's standard deviation over the HOLD phase (`noise_std`) widens the settling band to
    `detect_band` = max(settle_band x |size|, NOISE_BAND_FACTOR x noise_std + resolution), so
    sensor noise and quantisation do not keep a settled loop "unsettled".
    """

    def __init__(self, plan: StepPlan, start_value: float) -> None:
        self.plan = plan
        self.start_value = float(start_value)
        self.target = self.start_value + plan.size
        self.phase = StepPhase.HOLD
        self.segments: list[Segment] = []
        self.settled_step: bool | None = None
        self._t0: float | None = None
        self._sp_cmd = self.start_value
        self._off_cmd = 0.0
        self._phase_start: float | None = None  # first sample with the phase's command in effect
        self._in_band_since: float | None = None
        self._sp_before = self.start_value
        self._hold_pv: list[float] = []
        self.noise_std = 0.0  # PV units, from the HOLD phase
        self.resolution = 0.0  # PV units, quantisation step seen in the HOLD phase (0: none)
        self.detect_band = plan.band  # PV units, band used to decide "settled"
        self.failure: str | None = None  # why the sequence ended early, if it did
        self._cmd_t: float | None = None  # first sample after a command not yet in effect

    # ------------------------------------------------------------------ helpers
    def _effective(self, sp: float, offset: float) -> bool:
        tol_sp = 1e-6 * max(1.0, abs(self._sp_cmd)) + 1e-4 * abs(self.plan.size)
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
        transient before it entered the band for good (so the record after the step is at least
        twice the settling time; common practice, no source), at least min_hold."""
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

    # ------------------------------------------------------------------ main entry
    def update(self, t: float, pv: float, sp_applied: float, offset_applied: float = 0.0) -> StepCommand:
        """Advance on one sample; returns what should apply from now on."""
        events: list[StepEvent] = []
        if self.phase is StepPhase.DONE:
            return StepCommand(self._sp_cmd, self._off_cmd, self.phase, (), True)
        if self._t0 is None:
            self._t0 = t
            self._phase_start = t
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
                events.append(StepEvent(t, "not_applied", {"phase": self.phase.value}))
                self.phase = StepPhase.DONE
                return StepCommand(self._sp_cmd, self._off_cmd, self.phase, tuple(events), True)

        if self.phase is StepPhase.HOLD:
            assert self._phase_start is not None
            self._hold_pv.append(pv)
            if t - self._phase_start >= self.plan.hold_time:
                self.noise_std, self.resolution = noise_of(self._hold_pv)
                self.detect_band = max(self.plan.band,
                                       NOISE_BAND_FACTOR * self.noise_std + self.resolution)
                self._begin(StepPhase.STEP, self.target, 0.0)
        elif self._phase_start is not None:
            elapsed = t - self._phase_start
            inside = abs(pv - self._sp_cmd) <= self.detect_band
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

    def elapsed(self, t: float) -> float:
        """Seconds since the current phase took effect (0 before it did)."""
        return 0.0 if self._phase_start is None else max(0.0, t - self._phase_start)

    def segment(self, phase: StepPhase) -> Segment | None:
        """The recorded segment of `phase`, if it happened."""
        for s in self.segments:
            if s.phase is phase:
                return s
        return None


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
    band: float | None = None,
) -> StepMetrics:
    """Step-response figures of one STEP (or RETURN) segment over the recorded arrays.

    Time is counted from the first sample with the new setpoint in effect (s); the initial value
    is the setpoint before the step and the target the setpoint after it (PV units); saturation is
    counted against `output_limit` (output units). `band` (PV units, half-width) widens the
    settling band beyond 2% of the step (None: 2%). See autotune.core.metrics.step_metrics.
    """
    ta, ya, ua = (np.asarray(a, dtype=float) for a in (t, pv, out))
    sl = _slice(ta, segment.t_start, segment.t_end)
    step = abs(segment.sp_after - segment.sp_before)
    frac = DEFAULT_SETTLE_BAND if band is None or step == 0 else max(DEFAULT_SETTLE_BAND,
                                                                       band / step)
    return step_metrics(
        ta[sl] - segment.t_start, ya[sl], segment.sp_before, segment.sp_after,
        u=ua[sl], u_limit=output_limit, settle_band=frac,
    )


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
    from autotune.core.lti import DelayedTF, fopdt, integrator_lag, sopdt

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


def predict_step(plant: Any, settings: Any, size: float, t_end: float,
                 extra_ticks: int = 0) -> dict[str, float]:
    """Predicted step figures of `settings` (PidSettings) on `plant` (DelayedTF) for a setpoint
    step of `size` PV units, over `t_end` s (autotune.core.closedloop; `extra_ticks` of loop latency,
    e.g. 1 in host loop, added as dead time)."""
    from autotune.core.closedloop import simulate_closed_loop
    from autotune.core.lti import DelayedTF

    ts = settings.ts
    if extra_ticks:
        plant = DelayedTF(plant.num, plant.den, plant.delay + extra_ticks * ts)
    run = simulate_closed_loop(plant, settings, t_end, size)
    lim = settings.out_max if math.isfinite(settings.out_max) else None
    m = step_metrics(run.t, run.y, 0.0, size, u=run.u, u_limit=lim)
    return {k: v for k, v in m.as_dict().items() if math.isfinite(v)}


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
    against it); deriv_filter_n, setpoint_weight, tracking_time (s, None = clamping), bias
    (output units): PID settings; spec: the verdict's limits; ts: loop period (s), None = the
    device tick.
    """

    plan: StepPlan
    loop: str = "device"
    output_limit: float = 20.0
    deriv_filter_n: float = 10.0
    setpoint_weight: float = 1.0
    tracking_time: float | None = None
    bias: float = 0.0
    spec: Any = None  # autotune.core.verdict.StepSpec; None = no limits
    ts: float | None = None

    def pid_settings(self, gains: Any, ts: float) -> Any:
        from autotune.core.pid import PidSettings

        return PidSettings(gains, ts, self.deriv_filter_n, self.setpoint_weight,
                           self.tracking_time, -self.output_limit, self.output_limit, self.bias)


def settings_from_config(
    cfg: Any,
    loop: str,
    *,
    size: float | None = None,
    load_offset: float = 0.0,
    spec: Any = None,
    deriv_filter_n: float = 10.0,
    setpoint_weight: float = 1.0,
    tracking_time: float | None = None,
) -> tuple[StepSettings, str | None]:
    """StepSettings from an autotune.config.Config (what `autotune step` and `tune` use).

    size: PV units (None: step.size, else design.step_size, else relay.target_amplitude), kept to
    at most DEFAULT_WINDOW_FRACTION of safety.pv_window; hold step.settle_time and timeout
    step.duration (s); output limit safety.output_limit and bias relay.bias (output units).
    Returns the settings and a message when the step had to be reduced.
    """
    for v in (size, cfg.step.size, cfg.design.step_size, cfg.relay.target_amplitude):
        if v is not None:
            size = float(v)
            break
    assert size is not None
    fitted, note = fit_step_to_window(size, cfg.safety.pv_window)
    plan = StepPlan(size=fitted, hold_time=cfg.step.settle_time, timeout=cfg.step.duration,
                    load_offset=load_offset)
    return StepSettings(plan=plan, loop=loop, output_limit=cfg.safety.output_limit,
                        deriv_filter_n=deriv_filter_n, setpoint_weight=setpoint_weight,
                        tracking_time=tracking_time, bias=cfg.relay.bias, spec=spec), note


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

    metrics: figures of the STEP segment (None when it never started); load: load-disturbance
    figures (None without a load test); rows: measured vs predicted; verdict: against the spec;
    end_reason: "completed" or why the run stopped ("aborted", "limit:pv_window", ...);
    arrays t/pv/out/sp: what was recorded during this step (device time s, PV, output, PV).
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
    t: list[float] = field(default_factory=list)
    pv: list[float] = field(default_factory=list)
    out: list[float] = field(default_factory=list)
    sp: list[float] = field(default_factory=list)

    def step_field(self) -> dict[str, Any]:
        """The result.json `step` field (contract: overshoot %, rise_time, settling_time s,
        iae, predicted; more keys: all figures, load test, verdict, gains, segments)."""
        m = self.metrics.as_dict() if self.metrics is not None else {}
        g = self.candidate.gains

        def fin(v: Any) -> Any:
            return v if isinstance(v, float) and math.isfinite(v) else None

        out: dict[str, Any] = {k: fin(v) for k, v in m.items()}
        for k in ("overshoot", "rise_time", "settling_time", "iae"):
            out.setdefault(k, None)
        out.update({
            "predicted": dict(self.candidate.predicted),
            "proposal": self.candidate.name,
            "gains": {"kp": g.kp, "ki": g.ki, "kd": g.kd},
            "setpoint_weight": self.pid.setpoint_weight,
            "loop": self.loop,
            "ts": self.pid.ts,
            "size": self.plan.size,
            "start_value": self.start_value,
            "settled": self.settled,
            "settle_band": self.band,
            "noise_std": self.noise_std,
            "late_outputs": self.late_outputs if self.loop == "host" else None,
            "end_reason": self.end_reason,
            "segments": [s.to_dict() for s in self.segments],
            "comparison": [r.to_dict() for r in self.rows],
            "verdict": None if self.verdict is None else self.verdict.to_dict(),
            "load": None if self.load is None else self.load.to_dict(),
        })
        return out



def finish_outcome(o: StepOutcome, exp: StepExperiment) -> StepOutcome:
    """Fill metrics, load figures, comparison and verdict from the recorded arrays (pure)."""
    from autotune.core.verdict import compare

    o.segments = list(exp.segments)
    seg = exp.segment(StepPhase.STEP)
    if seg is None and exp.phase is StepPhase.STEP and exp._phase_start is not None and o.t:
        # stopped during the step: figures of what was recorded so far
        seg = Segment(StepPhase.STEP, exp._phase_start, o.t[-1], exp.start_value, exp.target,
                      0.0, False)
    o.settled = bool(seg is not None and seg.settled)
    if seg is not None:
        ta = np.asarray(o.t)
        n_in = int(np.sum((ta >= seg.t_start - 1e-9) & (ta <= seg.t_end + 1e-9)))
        if n_in >= 2:
            o.metrics = step_figures(o.t, o.pv, o.out, seg, o.pid.out_max, exp.detect_band)
    o.noise_std = exp.noise_std
    o.band = exp.detect_band
    lseg = exp.segment(StepPhase.LOAD)
    if lseg is not None:
        o.load = load_figures(o.t, o.pv, lseg, exp.detect_band)
    if o.metrics is not None:
        o.rows = compare(o.metrics, o.candidate.predicted)
    return o


def judge_outcome(o: StepOutcome, spec: Any) -> None:
    from autotune.core.verdict import StepSpec, judge

    if o.metrics is None:
        return
    o.verdict = judge(o.metrics, spec if spec is not None else StepSpec(), settled=o.settled)
