"""Relay-feedback experiment: relay state machine, amplitude adaptation, bias balancing.

Pure module: samples come in as (t, pv) or (t, pv, out) with `t` device time in seconds; no clock,
no I/O.

Conventions
- PV in PV units, output in output units, time in seconds.
- Error e = centre - pv. Positive output makes the PV rise (for a reversed loop the runner flips
  signs with its `sign` config before the core sees anything).
- The relay switches to its high side (bias + amplitude*(1+asymmetry)) when e > +hysteresis and
  to its low side (bias - amplitude*(1-asymmetry)) when e < -hysteresis; in between it keeps its
  state. Before the first switch it starts high when pv < centre, as the device relay does.
- The output is always clamped to [-output_limit, +output_limit].
- "Amplitude" of the PV oscillation (`target_amplitude`, `CycleFigures.amplitude`) means the peak
  amplitude, half the peak-to-peak swing, as in the describing function (a in d/a).
- A cycle runs from one switch to the high side to the next one; its high half is the time spent
  high, its low half the time spent low.

Two ways to drive a `RelayExperiment`:
- host loop: `update(t, pv)` returns the output to send for each sample;
- device loop: the board runs the relay; `observe(t, pv, out)` follows it from the applied output
  and returns `RelayStep.new_settings` whenever the runner should send new relay settings.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace
from typing import TYPE_CHECKING, Any

from autotune.core.convergence import measurement_tolerances, steady_converged, switch_jitter

if TYPE_CHECKING:
    from autotune.core.safety import SafetyGuard, Violation

__all__ = [
    "CycleFigures",
    "ConvergedFn",
    "Relay",
    "RelayEvent",
    "RelayExperiment",
    "RelayPlan",
    "RelaySettings",
    "RelayStep",
    "clamp",
    "mean_cycle",
    "stage_dead_zone",
]

HIGH = 1
LOW = -1
SETTLED_BAND = 0.5  # once the amplitudes the plan asks for were run, a swing within this
#                     fraction of the target is accepted (the target is a guide; common
#                     practice, no source)


def clamp(x: float, limit: float) -> float:
    """`x` clamped to [-limit, +limit]; NaN becomes 0.0 (never forwarded to an actuator)."""
    if math.isnan(x):
        return 0.0
    return max(-limit, min(limit, x))


def _finite(name: str, value: float) -> None:
    if not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number, got {value!r}")


# ---------------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class RelaySettings:
    """One relay configuration.

    centre: relay centre (setpoint), PV units. bias: operating-point output, output units.
    amplitude: relay amplitude d, output units (>= 0). hysteresis: eps, PV units (>= 0).
    asymmetry: in (-1, 1); amp_high = d (1 + asymmetry), amp_low = d (1 - asymmetry).
    """

    centre: float
    bias: float
    amplitude: float
    hysteresis: float
    asymmetry: float = 0.0

    def __post_init__(self) -> None:
        for name in ("centre", "bias", "amplitude", "hysteresis", "asymmetry"):
            _finite(name, getattr(self, name))
        if self.amplitude < 0:
            raise ValueError(f"relay amplitude must be >= 0, got {self.amplitude}")
        if self.hysteresis < 0:
            raise ValueError(f"relay hysteresis must be >= 0, got {self.hysteresis}")
        if not -1.0 < self.asymmetry < 1.0:
            raise ValueError(f"relay asymmetry must lie in (-1, 1), got {self.asymmetry}")

    @property
    def amp_high(self) -> float:
        """Step above the bias on the high side, output units."""
        return self.amplitude * (1.0 + self.asymmetry)

    @property
    def amp_low(self) -> float:
        """Step below the bias on the low side, output units."""
        return self.amplitude * (1.0 - self.asymmetry)

    @property
    def midpoint(self) -> float:
        """Midway between the two output levels, output units."""
        return self.bias + self.amplitude * self.asymmetry

    def levels(self, output_limit: float) -> tuple[float, float]:
        """(high, low) output levels after clamping to +/- output_limit."""
        return (clamp(self.bias + self.amp_high, output_limit),
                clamp(self.bias - self.amp_low, output_limit))

    def max_amplitude(self, output_limit: float) -> float:
        """Largest d whose two levels both stay within +/- output_limit at this bias (>= 0)."""
        up = (output_limit - self.bias) / (1.0 + self.asymmetry)
        down = (output_limit + self.bias) / (1.0 - self.asymmetry)
        return max(0.0, min(up, down))

    def as_dict(self) -> dict[str, float]:
        return asdict(self)


# ---------------------------------------------------------------------------------- relay
class Relay:
    """Relay with hysteresis on the error e = centre - pv; output clamped to +/- output_limit.

    `update(t, pv)` returns the output (output units) to hold from this sample on. `state` is +1
    (high), -1 (low) or 0 before the first sample. `switches` holds (t, new_state) of every
    switch (the initial choice is not a switch); `switch_times` only the times.
    """

    def __init__(self, settings: RelaySettings, output_limit: float) -> None:
        _finite("output_limit", output_limit)
        if output_limit <= 0:
            raise ValueError(f"output limit must be > 0, got {output_limit}")
        self.settings = settings
        self.output_limit = float(output_limit)
        self.state = 0
        self.switches: list[tuple[float, int]] = []
        self.output = 0.0

    @property
    def switch_times(self) -> list[float]:
        return [t for t, _ in self.switches]

    def output_for(self, state: int) -> float:
        """Clamped output level of `state` (+1 high, -1 low) under the current settings."""
        high, low = self.settings.levels(self.output_limit)
        return high if state == HIGH else low

    def decide(self, pv: float) -> int:
        """State the relay would take for `pv` (no side effects). NaN keeps the state."""
        s = self.settings
        e = s.centre - pv
        if self.state == 0:
            return HIGH if e > 0 else LOW
        if self.state == LOW and e > s.hysteresis:
            return HIGH
        if self.state == HIGH and e < -s.hysteresis:
            return LOW
        return self.state

    def update(self, t: float, pv: float) -> float:
        new = self.decide(pv)
        if self.state != 0 and new != self.state:
            self.switches.append((t, new))
        self.state = new
        self.output = self.output_for(new)
        return self.output


# ---------------------------------------------------------------------------------- records
@dataclass(frozen=True)
class CycleFigures:
    """Figures of one relay cycle (from a switch to high to the next one).

    index: 1-based. t_start, t_end, period, high_time, low_time: seconds. amplitude_pp, pv_max,
    pv_min, mean_pv: PV units. amplitude_d, bias: relay amplitude and bias in force (output
    units). settled: the cycle started at or after the last settings change took effect.
    samples: number of samples in the cycle.
    """

    index: int
    t_start: float
    t_end: float
    period: float
    amplitude_pp: float
    high_time: float
    low_time: float
    mean_pv: float
    pv_max: float
    pv_min: float
    amplitude_d: float
    bias: float
    settled: bool = True
    samples: int = 0
    amplitude_h1: float = 0.0

    @property
    def amplitude(self) -> float:
        """Peak amplitude a = half the peak-to-peak swing, PV units."""
        return 0.5 * self.amplitude_pp

    @property
    def half_period_mismatch(self) -> float:
        """(high_time - low_time) / mean half-period; 0 for equal halves, > 0 when high is longer."""
        mean = 0.5 * (self.high_time + self.low_time)
        return (self.high_time - self.low_time) / mean if mean > 0 else 0.0

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class RelayEvent:
    """Something the recorder and the UI should know: `kind` and plain-value `detail`.

    Kinds: "cycle", "amplitude_raised", "amplitude_lowered", "amplitude_capped", "bias_changed",
    "settings_applied" / "settings_rejected" (device loop: the board uses / refused the new
    settings), "converged", "limit", "end".
    """

    t: float
    kind: str
    detail: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"t": self.t, "kind": self.kind, "detail": dict(self.detail)}


@dataclass(frozen=True)
class RelayStep:
    """Result of one sample: output to hold (output units; 0.0 once done), events raised by this
    sample, whether the experiment is over and why, relay settings to send (device loop; in host
    loop they are already applied and given for the record), and the relay state (+1/-1)."""

    output: float
    events: list[RelayEvent]
    done: bool
    end_reason: str | None
    new_settings: RelaySettings | None = None
    state: int = 0


ConvergedFn = Callable[[Sequence[CycleFigures]], bool]


def mean_cycle(cycles: Sequence[CycleFigures]) -> CycleFigures:
    """One CycleFigures holding the means of `cycles` (the last one's index, start, d, bias)."""
    n = len(cycles)
    last = cycles[-1]

    def m(name: str) -> float:
        return sum(getattr(c, name) for c in cycles) / n

    return replace(last, t_start=cycles[0].t_start, period=m("period"),
                   amplitude_pp=m("amplitude_pp"), high_time=m("high_time"),
                   low_time=m("low_time"), mean_pv=m("mean_pv"), pv_max=m("pv_max"),
                   pv_min=m("pv_min"), samples=round(m("samples")),
                   amplitude_h1=m("amplitude_h1"))


# ---------------------------------------------------------------------------------- plan
@dataclass(frozen=True, kw_only=True)
class RelayPlan:
    """How the experiment adapts and when it ends.

    The fields without a default are the config's [relay] table (autotune.config.RelayConfig
    documents them and holds their defaults; autotune.config.relay_plan builds a plan from it).

    target_amplitude: wanted PV peak amplitude a (half peak-to-peak), PV units.
    start_amplitude: first relay amplitude d (output units); None keeps the settings' amplitude.
    amplitude_step_factor: largest factor by which one correction raises d (a lower d is set
        in one step), and the factor by which d rises when the relay stalls.
    amplitude_tolerance: relative band around the target within which d is left alone.
    amplitude_stages: the experiment runs at this many relay amplitudes at least (two measure a
        dead zone: the swing goes as d - dead zone); when the first amplitude already lands in
        the band, the second is `probe_ratio` times it (divided by it where the limits do not
        allow a rise).
    adapt_amplitude, balance_bias: adapt d to the target / balance the half-periods by the bias
        (symmetric relay only; an asymmetric relay's half-periods differ by design).
    bias_tolerance: half-periods count as balanced when |high - low| / mean half <= this.
    max_cycles: end after this many cycles ("max_cycles"). max_time: end after this many seconds
        of samples ("max_time"); None: no time limit here (the safety guard has its own).
    converge_tol: relative tolerance of the convergence test (autotune.core.convergence).
    min_cycles: steady cycles (after the transient one) the convergence test needs.
    stall_time: if the relay has not switched for this long (s), raise d (or end with
        "no_oscillation" when it cannot rise); None: off. Once a cycle was seen the wait is
        three times the longest period instead.

    Internal settings (defaults here, not in the config):
    max_amplitude: ceiling on d (output units); None: only the output limit bounds it.
    pv_window: the PV may move at most this far from pv_start (PV units); None: no constraint.
        The adaptation keeps the predicted excursion within pv_window * (1 - window_margin).
    bias_gain: fraction of the estimated bias error corrected per adjustment.
    max_bias_step: largest bias change per adjustment, as a fraction of d.
    settle_cycles: cycles to wait after a change before judging the result.
    max_adjustments: after this many settings changes the settings stay as they are.
    probe_ratio: factor between the first two amplitudes when the first needs no correction.
    deadband: actuator dead zone (output units, half-width, when measured before the relay):
        the plant sees a relay of d - deadband, so the adaptation predicts the PV amplitude as
        proportional to d - deadband and the bias estimate scales with it.
    tick: sample period (s); pv_noise: PV noise standard deviation and pv_resolution: PV
        quantisation step (PV units). They set what the measurement can resolve: bias
        balancing acts only on a half-period mismatch larger than the switching jitter they
        cause, the amplitude band is widened to the peak-reading error, and the convergence
        test to both (0 = ideal).

    Adjustments are judged on the mean of the cycles completed since the last change (at least
    settle_cycles of them; the first one, still carrying the transient, left out). The first
    correction of d is d x target / measured (through the dead zone when known; a secant
    through two amplitudes once there are two), clamped by the limits. The bias correction is
    bias_gain x (the integrating-loop estimate of the bias error) and the gain halves each time
    the mismatch changes sign, so the bias cannot swing ever wider (common practice, no source).
    """

    target_amplitude: float
    amplitude_step_factor: float
    amplitude_tolerance: float
    amplitude_stages: int
    adapt_amplitude: bool
    balance_bias: bool
    bias_tolerance: float
    max_cycles: int
    max_time: float | None
    converge_tol: float
    min_cycles: int
    stall_time: float | None
    start_amplitude: float | None = None
    max_amplitude: float | None = None
    pv_window: float | None = None
    window_margin: float = 0.2
    bias_gain: float = 0.8
    max_bias_step: float = 0.3
    settle_cycles: int = 2
    max_adjustments: int = 12
    probe_ratio: float = 1.4
    deadband: float = 0.0
    tick: float = 0.0
    pv_noise: float = 0.0
    pv_resolution: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.target_amplitude) and self.target_amplitude > 0):
            raise ValueError(f"target amplitude must be > 0, got {self.target_amplitude}")
        if self.start_amplitude is not None and not (
                math.isfinite(self.start_amplitude) and self.start_amplitude > 0):
            raise ValueError(f"start amplitude must be > 0, got {self.start_amplitude}")
        if not self.amplitude_step_factor > 1.0:
            raise ValueError("amplitude step factor must be > 1")
        for name in ("max_amplitude", "pv_window", "max_time", "stall_time"):
            v = getattr(self, name)
            if v is not None and not v > 0:
                raise ValueError(f"{name} must be > 0 or None, got {v}")
        if not 0.0 <= self.window_margin < 1.0:
            raise ValueError("window margin must lie in [0, 1)")
        for name in ("amplitude_tolerance", "bias_tolerance", "converge_tol", "bias_gain",
                     "max_bias_step"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0")
        for name in ("deadband", "tick", "pv_noise", "pv_resolution"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {v!r}")
        if self.settle_cycles < 1 or self.max_cycles < 1 or self.max_adjustments < 0:
            raise ValueError("settle_cycles and max_cycles must be >= 1, max_adjustments >= 0")
        if self.min_cycles < 1 or self.amplitude_stages < 1:
            raise ValueError("min_cycles and amplitude_stages must be >= 1")
        if not self.probe_ratio > 1.0:
            raise ValueError("probe ratio must be > 1")


# ---------------------------------------------------------------------------------- experiment
class _CycleAccumulator:
    """Running figures of the cycle in progress."""

    def __init__(self, t_start: float) -> None:
        self.t_start = t_start
        self.t_down: float | None = None
        self.pv_max = -math.inf
        self.pv_min = math.inf
        self.pv_sum = 0.0
        self.n = 0
        self.samples: list[tuple[float, float]] = []

    def add(self, t: float, pv: float, hi: float | None = None,
            lo: float | None = None) -> None:
        """One sample (t s, pv PV units); `hi`/`lo` replace pv for the peaks (spike-robust
        peaks, see RelayExperiment's confirm_samples)."""
        if not math.isfinite(pv):  # a corrupt sample must not poison the cycle's figures
            return
        self.pv_max = max(self.pv_max, pv if hi is None else hi)
        self.pv_min = min(self.pv_min, pv if lo is None else lo)
        self.pv_sum += pv
        self.n += 1
        self.samples.append((t, pv))

    def first_harmonic(self, t_end: float) -> float:
        """Amplitude (PV units) of the PV's first harmonic over [t_start, t_end) (rectangle
        rule over the samples; averages the noise that the peaks keep)."""
        period = t_end - self.t_start
        if self.n == 0 or not period > 0:
            return 0.0
        mean = self.pv_sum / self.n
        w = 2.0 * math.pi / period
        re = sum((y - mean) * math.cos(w * (t - self.t_start)) for t, y in self.samples)
        im = sum((y - mean) * math.sin(w * (t - self.t_start)) for t, y in self.samples)
        return 2.0 * math.hypot(re, im) / self.n


class RelayExperiment:
    """Relay experiment with amplitude adaptation, bias balancing and end conditions.

    Args:
        plan: adaptation and end conditions.
        settings: initial relay settings (the amplitude is replaced by plan.start_amplitude
            when given, and lowered if needed to keep both levels within the output limit).
        output_limit: output units; every output returned lies within +/- output_limit.
        converged: `converged(settled_cycles) -> bool`, called with the cycles completed since
            the last settings change took effect (the transient one first); default
            autotune.core.convergence.steady_converged with the plan's tolerance, min_cycles
            and measurement (tick, PV noise and resolution, the relay's hysteresis).
        guard: optional `SafetyGuard`; every sample is checked first (with the output applied
            up to it: host loop, the one sent for the previous sample; device loop, the one
            reported) and a violation ends the experiment at once with end_reason
            "limit:<which>" and output 0. output_limit must not exceed the guard's.
        pv_start: reference PV for the window prediction (PV units); default: the guard's
            pv_start, else the first sample.
        confirm_samples: host loop only: a switch needs this many consecutive samples beyond
            the hysteresis, and a cycle's peaks count only PV levels held for this many samples,
            so a one-sample spike shorter than confirm_samples neither switches the relay nor
            inflates the amplitude. 1 (default) switches on the first sample; each extra sample
            adds one sample period of delay to the switching.

    Attributes: `cycles` (all completed cycles), `events` (all events), `done`, `end_reason`,
    `violation`, `settings` (as in force / last sent), `switches` ((t, new_state) list).
    """

    def __init__(self, plan: RelayPlan, settings: RelaySettings, output_limit: float, *,
                 converged: ConvergedFn | None = None, guard: SafetyGuard | None = None,
                 pv_start: float | None = None, confirm_samples: int = 1) -> None:
        if not (math.isfinite(output_limit) and output_limit > 0):
            raise ValueError(f"output limit must be a finite number > 0, got {output_limit!r}")
        if not abs(settings.bias) < output_limit:
            raise ValueError(f"relay bias {settings.bias:g} leaves no room inside the output "
                             f"limit of +/-{output_limit:g}")
        if plan.start_amplitude is not None:
            settings = replace(settings, amplitude=plan.start_amplitude)
        ceiling = settings.max_amplitude(output_limit)
        if plan.max_amplitude is not None:
            ceiling = min(ceiling, plan.max_amplitude)
        if settings.amplitude > ceiling:
            settings = replace(settings, amplitude=ceiling)
        if not 1 <= int(confirm_samples) <= 10:
            raise ValueError(f"confirm_samples must be 1..10, got {confirm_samples!r}")
        self.confirm_samples = int(confirm_samples)
        self._want_switch = 0  # consecutive samples asking for a switch (confirm_samples > 1)
        self._recent_pv: deque[float] = deque(maxlen=self.confirm_samples)
        self.plan = plan
        self.relay = Relay(settings, output_limit)
        self.output_limit = float(output_limit)
        self._converged: ConvergedFn = converged or self._default_converged
        if guard is not None and output_limit > guard.limits.output_limit * (1 + 1e-9):
            raise ValueError(f"relay output limit {output_limit:g} above the safety guard's "
                             f"{guard.limits.output_limit:g}")
        self.guard = guard
        if pv_start is None and guard is not None:
            pv_start = guard.pv_start
        self.pv_start = pv_start
        self.cycles: list[CycleFigures] = []
        self.events: list[RelayEvent] = []
        self.done = False
        self.end_reason: str | None = None
        self.violation: Violation | None = None
        self.adjustments = 0
        self._t0: float | None = None
        self._t_last_switch: float | None = None
        self._t_change = -math.inf  # when the last settings change took effect
        self._pending: RelaySettings | None = None  # device loop: sent, not yet seen applied
        self._acc: _CycleAccumulator | None = None
        # (d, bias, a, a_h1) of the judged cycles: PV peak amplitude (half the peak-to-peak)
        # and first-harmonic amplitude, PV units
        self._history: list[tuple[float, float, float, float]] = []
        self._capped_reported = False
        self._probed = False  # the last change of d was the second-amplitude probe
        self._bias_gain = plan.bias_gain  # halves whenever the mismatch changes sign
        self._bias_dir = 0  # sign of the last bias change
        self._step_events: list[RelayEvent] = []
        self._new_settings: RelaySettings | None = None

    def _default_converged(self, cycles: Sequence[CycleFigures]) -> bool:
        p = self.plan
        return steady_converged(cycles, p.converge_tol, min_cycles=p.min_cycles,
                                hysteresis=self.relay.settings.hysteresis, tick=p.tick,
                                noise_std=p.pv_noise, resolution=p.pv_resolution)

    # ------------------------------------------------------------------ public
    @property
    def settings(self) -> RelaySettings:
        """Settings in force (device loop: the last ones sent, once the board uses them)."""
        return self._pending or self.relay.settings

    @property
    def switches(self) -> list[tuple[float, int]]:
        return self.relay.switches

    @property
    def state(self) -> int:
        return self.relay.state

    @property
    def settled_cycles(self) -> list[CycleFigures]:
        """Cycles completed since the last settings change took effect (the first of them may
        have begun just before: a change that reached the board during a cycle's high half
        makes that cycle the transient one of the new settings)."""
        return [c for c in self.cycles if c.t_start + c.high_time >= self._t_change]

    def update(self, t: float, pv: float) -> RelayStep:
        """Host loop: one sample in (t seconds, pv PV units), the output to send out."""
        if self.done:
            return self._result(0.0)
        self._begin(t, pv)
        # the output applied up to this sample is the one sent for the previous sample
        if self._check_guard(t, pv, self.relay.output):
            return self._result(0.0)
        prev_state = self.relay.state
        new_state = self.relay.decide(pv)
        if self.confirm_samples > 1 and prev_state != 0:
            if new_state != prev_state:
                self._want_switch += 1
                if self._want_switch < self.confirm_samples:
                    new_state = prev_state
                else:
                    self._want_switch = 0
            else:
                self._want_switch = 0
        self.relay.state = new_state
        if prev_state == 0:
            self._t_last_switch = t
        elif new_state != prev_state:
            self.relay.switches.append((t, new_state))
            self._on_switch(t, new_state)
        self._check_stall(t)
        if self._new_settings is not None and not self.done:
            # host loop: new settings apply from this sample on; a change made at a switch to
            # high therefore leaves the cycle that starts here clean
            self.relay.settings = self._new_settings
            self._t_change = t
        output = self.relay.output_for(self.relay.state)
        self.relay.output = output
        if self.confirm_samples > 1:
            if math.isfinite(pv):
                self._recent_pv.append(pv)
            if self._acc is not None and self._recent_pv:
                self._acc.add(t, pv, min(self._recent_pv), max(self._recent_pv))
        elif self._acc is not None:
            self._acc.add(t, pv)
        self._check_time(t)
        return self._result(0.0 if self.done else output)

    def observe(self, t: float, pv: float, out: float) -> RelayStep:
        """Device loop: one sample of the board's own relay (t s, pv PV units, applied out output
        units). Returns `new_settings` when the runner should send new relay settings."""
        if self.done:
            return self._result(0.0)
        self._begin(t, pv)
        if self._check_guard(t, pv, out):
            return self._result(0.0)
        if self._pending is not None and self._matches_new_levels(out):
            self.relay.settings = self._pending
            self._pending = None
            self._t_change = t
            self._emit(t, "settings_applied", self.relay.settings.as_dict())
        new_state = HIGH if out > self.relay.settings.midpoint else LOW
        prev_state = self.relay.state
        if prev_state == 0:
            self._t_last_switch = t
        elif new_state != prev_state:
            self.relay.switches.append((t, new_state))
            self.relay.state = new_state
            self._on_switch(t, new_state)
        self.relay.state = new_state
        self.relay.output = out
        self._check_stall(t)
        if self._new_settings is not None:
            self._pending = self._new_settings
        if self._acc is not None:
            self._acc.add(t, pv)
        self._check_time(t)
        return self._result(0.0 if self.done else out)

    def confirm_settings(self, t: float) -> None:
        """Device loop: the runner knows the board now uses the last settings sent (t: device
        time, s). Normally not needed: `observe` notices the new output levels by itself."""
        if self._pending is not None and not self.done:
            self.relay.settings = self._pending
            self._pending = None
            self._t_change = t
            self._emit(t, "settings_applied", self.relay.settings.as_dict())

    def reject_settings(self, t: float, why: str = "") -> None:
        """Device loop: the board refused the last settings sent (e.g. a negative
        acknowledgement); keep following the ones in force and stop adapting."""
        if self._pending is not None and not self.done:
            self._emit(t, "settings_rejected", {**self._pending.as_dict(), "why": why})
            self._pending = None
            self.adjustments = self.plan.max_adjustments

    def stop(self, t: float, reason: str, detail: dict[str, Any] | None = None) -> RelayStep:
        """End the experiment from outside (abort key, fault, lost link): output 0 from now on."""
        if not self.done:
            self._finish(t, reason, detail or {})
        return self._result(0.0)

    # ------------------------------------------------------------------ internals
    def _result(self, output: float) -> RelayStep:
        events, self._step_events = self._step_events, []
        new, self._new_settings = self._new_settings, None
        return RelayStep(output=output, events=events, done=self.done,
                         end_reason=self.end_reason, new_settings=new, state=self.relay.state)

    def _emit(self, t: float, kind: str, detail: dict[str, Any]) -> None:
        ev = RelayEvent(t, kind, detail)
        self.events.append(ev)
        self._step_events.append(ev)

    def _begin(self, t: float, pv: float) -> None:
        if self._t0 is None:
            self._t0 = t
            if self.pv_start is None and math.isfinite(pv):
                self.pv_start = pv

    def _finish(self, t: float, reason: str, detail: dict[str, Any]) -> None:
        self.done = True
        self.end_reason = reason
        self._new_settings = None
        self._pending = None
        self.relay.output = 0.0
        self._emit(t, "end", {"reason": reason, "cycles": len(self.cycles), **detail})

    def _check_guard(self, t: float, pv: float, out: float) -> bool:
        """Run the safety guard on this sample; True (and the experiment over) on a violation."""
        if self.guard is None:
            return False
        v = self.guard.check(t, pv, out)
        if v is None:
            return False
        self.violation = v
        self._emit(t, "limit", {"which": v.which, "value": v.value, "limit": v.limit,
                                "message": v.message})
        self._finish(t, v.reason, {})
        return True

    def _check_time(self, t: float) -> None:
        assert self._t0 is not None
        if (not self.done and self.plan.max_time is not None
                and t - self._t0 >= self.plan.max_time):
            self._finish(t, "max_time", {})

    def _matches_new_levels(self, out: float) -> bool:
        assert self._pending is not None
        tol = 1e-5 * max(1.0, self.output_limit)
        new = self._pending.levels(self.output_limit)
        old = self.relay.settings.levels(self.output_limit)
        return any(abs(out - lv) <= tol for lv in new) and not any(
            abs(out - lv) <= tol for lv in old)

    def _check_stall(self, t: float) -> None:
        p = self.plan
        if p.stall_time is None or self.done or self._t_last_switch is None:
            return
        if self._pending is not None or self._new_settings is not None:
            return
        wait = p.stall_time
        if self.cycles:  # the loop's own time scale is known: three of its periods
            wait = 3.0 * max(c.period for c in self.cycles)
        if t - self._t_last_switch < wait:
            return
        s = self.relay.settings
        ceiling = self._amplitude_ceiling(s.bias)
        d_new = min(s.amplitude * p.amplitude_step_factor, ceiling)
        worked = [h[0] for h in self._history if h[0] > s.amplitude and h[2] > 0]
        if worked:  # a larger d oscillated before: halfway back to it
            d_new = min(d_new, 0.5 * (s.amplitude + min(worked)))
        if d_new <= s.amplitude * 1.01 or self.adjustments >= p.max_adjustments:
            self._finish(t, "no_oscillation", {"stalled_for": t - self._t_last_switch,
                                               "amplitude": s.amplitude})
            return
        self._t_last_switch = t
        self._issue(t, replace(s, amplitude=d_new))
        self._emit(t, "amplitude_raised", {"from": s.amplitude, "to": d_new,
                                           "why": "no switch", "measured_amplitude": None,
                                           "target": p.target_amplitude})

    def _on_switch(self, t: float, new_state: int) -> None:
        self._t_last_switch = t
        if new_state == LOW:
            if self._acc is not None and self._acc.t_down is None:
                self._acc.t_down = t
            return
        acc = self._acc
        self._acc = _CycleAccumulator(t)
        if acc is None or acc.t_down is None or acc.n == 0:
            return
        s = self.relay.settings
        cyc = CycleFigures(
            index=len(self.cycles) + 1, t_start=acc.t_start, t_end=t, period=t - acc.t_start,
            amplitude_pp=acc.pv_max - acc.pv_min, high_time=acc.t_down - acc.t_start,
            low_time=t - acc.t_down, mean_pv=acc.pv_sum / acc.n, pv_max=acc.pv_max,
            pv_min=acc.pv_min, amplitude_d=s.amplitude, bias=s.bias,
            settled=acc.t_down >= self._t_change, samples=acc.n,
            amplitude_h1=acc.first_harmonic(t))
        self.cycles.append(cyc)
        self._emit(t, "cycle", cyc.as_dict())
        if len(self.cycles) >= self.plan.max_cycles:
            self._finish(t, "max_cycles", {})
            return
        self._judge(t, cyc)

    def _judge(self, t: float, cyc: CycleFigures) -> None:
        """At the end of a cycle: adapt the settings, or test convergence."""
        if self._pending is not None:
            return
        settled = self.settled_cycles
        if not cyc.settled or len(settled) < self.plan.settle_cycles:
            return
        if not all(math.isfinite(x) for x in (cyc.period, cyc.amplitude_pp, cyc.high_time,
                                              cyc.low_time, cyc.mean_pv)):
            return
        s = self.relay.settings
        # the first cycle after a change still carries the plant's transient: left out
        judged = [c for c in (settled[1:] if len(settled) > 1 else settled)
                  if all(math.isfinite(x) for x in (c.period, c.amplitude_pp, c.high_time,
                                                    c.low_time, c.mean_pv))]
        avg = mean_cycle(judged)
        h1 = avg.amplitude_h1 if avg.amplitude_h1 > 0 else avg.amplitude
        entry = (s.amplitude, s.bias, avg.amplitude, h1)
        if self._history and self._history[-1][:2] == (s.amplitude, s.bias):
            self._history[-1] = entry  # refined by one more cycle
        else:
            self._history.append(entry)
        new = s
        if self.adjustments < self.plan.max_adjustments:
            new = self._balance_bias(t, judged, new)
            new = self._adapt_amplitude(t, avg, new, len(judged))
        if new != s:
            self._issue(t, new)
            return
        if len(settled) >= 2 and self._converged(settled):
            self._emit(t, "converged", {"cycles": len(settled), "period": cyc.period,
                                        "amplitude_pp": cyc.amplitude_pp})
            self._finish(t, "converged", {})

    def _issue(self, t: float, new: RelaySettings) -> None:
        self.adjustments += 1
        self._new_settings = new

    def _amplitude_ceiling(self, bias: float) -> float:
        s = replace(self.relay.settings, bias=bias)
        ceiling = s.max_amplitude(self.output_limit)
        if self.plan.max_amplitude is not None:
            ceiling = min(ceiling, self.plan.max_amplitude)
        return ceiling

    def _balance_bias(self, t: float, cycles: Sequence[CycleFigures],
                      s: RelaySettings) -> RelaySettings:
        """Bias correction from the mean half-period mismatch of `cycles` (the settled ones).

        With an integrating approximation the half-periods go as 1/(d' + delta) and
        1/(d' - delta) for a bias error delta and an effective amplitude d' = d - deadband, so
        r = (high - low)/(high + low) = -delta/d': a longer high half means the bias is too low
        (common practice, no source). The bias moves only when the mean r is larger than the
        tolerance, than 3 standard errors of the switching jitter (`switch_jitter`) and, with 3
        cycles or more, than 2.5 empirical standard errors, and the cycles mostly agree on its
        sign. The step is bias_gain x r x d', the gain halving at every change of sign.
        """
        p = self.plan
        if not p.balance_bias or s.asymmetry != 0.0 or s.amplitude <= 0 or not cycles:
            return s
        n = len(cycles)
        rs = [(c.high_time - c.low_time) / (c.high_time + c.low_time) for c in cycles
              if c.high_time + c.low_time > 0]
        if len(rs) != n:
            return s
        r = sum(rs) / n
        avg = mean_cycle(cycles)
        tick = p.tick or (avg.period / max(avg.samples, 1))
        sd = switch_jitter(avg.amplitude, avg.period, s.hysteresis, p.pv_noise,
                           p.pv_resolution, tick)
        # r of one cycle: (2 t_down - t_start - t_end)/period, so its variance is 6 sd^2/P^2
        sd_r = math.sqrt(6.0) * sd / avg.period
        need = max(0.5 * p.bias_tolerance, 3.0 * sd_r / math.sqrt(n), tick / avg.period)
        if n >= 3:
            spread = math.sqrt(sum((x - r) ** 2 for x in rs) / (n - 1))
            need = max(need, 2.5 * spread / math.sqrt(n))
        agree = sum(1 for x in rs if x * r > 0)
        if abs(r) <= need or agree < max(1, math.ceil(2 * n / 3)):
            return s
        direction = 1 if r > 0 else -1
        if self._bias_dir and direction != self._bias_dir:
            self._bias_gain *= 0.5
        d_eff = max(s.amplitude - p.deadband, 0.1 * s.amplitude)
        step = self._bias_gain * r * d_eff
        cap = p.max_bias_step * d_eff
        step = max(-cap, min(cap, step))
        room = self.output_limit - s.amplitude
        new_bias = max(-room, min(room, s.bias + step)) if room > 0 else s.bias
        if abs(new_bias - s.bias) <= 1e-12 * max(1.0, abs(s.bias)):
            return s
        self._bias_dir = direction
        self._emit(t, "bias_changed", {"from": s.bias, "to": new_bias,
                                       "high_time": avg.high_time, "low_time": avg.low_time,
                                       "mismatch": 2.0 * r, "cycles": n, "threshold": 2 * need,
                                       "gain": self._bias_gain})
        return replace(s, bias=new_bias)

    def dead_zone_estimate(self) -> float | None:
        """Dead zone (output units) from the PV swing at the relay amplitudes judged so far
        (`stage_dead_zone`), None with fewer than two distinct amplitudes."""
        return stage_dead_zone([(h[0], h[3]) for h in self._history])

    def _dead_zone(self, d: float) -> float:
        """Dead zone used in the predictions: the measured one (plan.deadband) when given, else
        the estimate from two amplitudes; kept below 0.9 d."""
        db = self.plan.deadband
        if db <= 0:
            db = max(self.dead_zone_estimate() or 0.0, 0.0)
        return min(db, 0.9 * d)

    def _predict(self, d_new: float, d: float, a: float) -> tuple[float, float]:
        """(best, conservative) predicted PV amplitude at d_new from the describing-function
        proportionality a ~ d - dead zone, refined by a secant through the last judged cycle at
        another d."""
        db = self._dead_zone(d)
        prop = a * (d_new - db) / (d - db) if d > db else a
        slope = self._secant_slope(d)
        if slope is None:
            return prop, prop
        sec = a + slope * (d_new - d)
        return sec, max(sec, prop)

    def _secant_slope(self, d: float) -> float | None:
        for d_prev, _, a_prev, _ in reversed(self._history[:-1]):
            if abs(d_prev - d) > 0.05 * d and a_prev > 0:
                slope = (self._history[-1][2] - a_prev) / (d - d_prev)
                return slope if slope > 0 else None
        return None

    def _room_to_raise(self, d_new: float, d: float, cyc: CycleFigures) -> bool:
        """Whether d_new > d keeps within the output limit and the PV window prediction."""
        p = self.plan
        if d_new > self._amplitude_ceiling(self.relay.settings.bias) * (1 + 1e-9):
            return False
        if p.pv_window is None or self.pv_start is None:
            return True
        _, worst = self._predict(d_new, d, cyc.amplitude)
        mid = 0.5 * (cyc.pv_max + cyc.pv_min)
        return worst + abs(mid - self.pv_start) <= p.pv_window * (1 - p.window_margin)

    def _adapt_amplitude(self, t: float, cyc: CycleFigures, s: RelaySettings,
                         n: int = 1) -> RelaySettings:
        """Move d towards the target amplitude within the output and window limits.

        `cyc` holds the mean figures of the `n` settled cycles. The band around the target is
        amplitude_tolerance widened to the peak-reading error of the PV (resolution + 2 noise
        over the peak-to-peak swing), and to SETTLED_BAND once plan.amplitude_stages
        amplitudes were run. Outside it, d goes in one correction to where the PV amplitude is
        predicted to hit the target: proportional to d - dead zone, or along the secant
        through an earlier amplitude; up by at most amplitude_step_factor, down to a tenth at
        most. Inside it, while
        fewer than plan.amplitude_stages amplitudes were run, d moves by probe_ratio (up where
        the limits allow, else down) so that a second amplitude measures the dead zone; the
        probe's own swing is accepted up to twice the target (the target is a guide).
        """
        if not self.plan.adapt_amplitude or s.amplitude <= 0:
            return s
        p = self.plan
        d, a, target = s.amplitude, cyc.amplitude, p.target_amplitude
        db = self._dead_zone(d)
        _, tol_meas = measurement_tolerances(cyc.period, cyc.amplitude_pp,
                                             noise_std=p.pv_noise, resolution=p.pv_resolution)
        band = max(p.amplitude_tolerance, tol_meas / math.sqrt(max(n, 1)))
        slope = self._secant_slope(d)
        stages = len({round(h[0], 12) for h in self._history})
        if self._probed:  # the probe moved d on purpose: its swing stands unless far off
            band = max(band, 1.0)
        elif stages >= p.amplitude_stages:  # enough amplitudes: another costs three cycles
            band = max(band, SETTLED_BAND)
        why = "target"
        # d aimed at the target: up by at most amplitude_step_factor (a dead zone not yet
        # known makes the swing grow faster than d), down in one step (to a tenth at most)
        if a <= 0:
            d_t = d * p.amplitude_step_factor
        elif abs(a - target) > band * target:
            d_t = d + (target - a) / slope if slope is not None else db + (d - db) * target / a
            d_t = min(max(d_t, db + 0.1 * (d - db)), d * p.amplitude_step_factor)
        elif stages < p.amplitude_stages:
            # a second amplitude, up where the limits allow (a larger swing makes the
            # hysteresis matter less and the cycles shorter), else down
            why = "second amplitude"
            up = d * p.probe_ratio
            d_t = up if self._room_to_raise(up, d, cyc) else d / p.probe_ratio
            self._probed = True
        else:
            d_t = d
        limited_by = None
        # PV window: keep the predicted excursion within window * (1 - margin)
        if p.pv_window is not None and self.pv_start is not None and a > 0 and d_t > d:
            mid = 0.5 * (cyc.pv_max + cyc.pv_min)
            allow = p.pv_window * (1 - p.window_margin) - abs(mid - self.pv_start)
            if allow <= 0:
                d_w = d / p.amplitude_step_factor
            else:
                d_w = db + (d - db) * allow / a
                if slope is not None:
                    d_w = min(d_w, d + (allow - a) / slope)
                d_w = max(d_w, d / p.amplitude_step_factor)
            if d_w < d_t:
                d_t, limited_by = d_w, "pv_window"
        ceiling = self._amplitude_ceiling(s.bias)
        if ceiling < d_t:
            d_t = ceiling
            limited_by = "output_limit" if (p.max_amplitude is None
                                            or ceiling < p.max_amplitude) else "max_amplitude"
        if abs(d_t - d) <= 0.02 * d:
            if limited_by is not None and a < target * (1 - p.amplitude_tolerance) and (
                    not self._capped_reported):
                self._capped_reported = True
                self._emit(t, "amplitude_capped", {"amplitude": d, "measured_amplitude": a,
                                                   "target": target, "limited_by": limited_by})
            return s
        best, _ = self._predict(d_t, d, a)
        kind = "amplitude_raised" if d_t > d else "amplitude_lowered"
        self._emit(t, kind, {"from": d, "to": d_t, "measured_amplitude": a, "target": target,
                             "predicted_amplitude": best, "limited_by": limited_by,
                             "why": why})
        return replace(s, amplitude=d_t)


def stage_dead_zone(points: Sequence[tuple[float, float]]) -> float | None:
    """Dead zone D (output units) from PV amplitudes a (PV units) at relay amplitudes d.

    Behind a dead zone of half-width D the plant sees a relay of d - D, and for a linear plant
    the oscillation amplitude goes as d - D (describing function of a relay with dead zone;
    Åström and Hägglund, Advanced PID Control, ISA 2006, from memory): the least-squares line
    a = c (d - D) through the points gives D. None with fewer than two distinct d or a line
    that does not rise with d. May be negative (no dead zone, within the scatter).
    """
    pts = [(float(d), float(a)) for d, a in points if d > 0 and a > 0]
    ds = sorted({round(d, 12) for d, _ in pts})
    if len(ds) < 2 or (ds[-1] - ds[0]) <= 0.05 * ds[-1]:
        return None
    n = len(pts)
    md = sum(d for d, _ in pts) / n
    ma = sum(a for _, a in pts) / n
    sxx = sum((d - md) ** 2 for d, _ in pts)
    sxy = sum((d - md) * (a - ma) for d, a in pts)
    if sxx <= 0 or sxy <= 0:
        return None
    c = sxy / sxx
    return md - ma / c
