"""The identification stages of a job: prechecks, a bounded relay experiment, analysis.

Wires the pure core (prechecks, relay, safety, analysis, design) to an armed
`autotune.job.powered.PoweredRun` (limits, recording, the stop path); autotune.job.job runs the
stages in order.

Phases (all durations in device time, seconds):
  rest       output held at the bias for `prechecks.rest_time`: noise, drift, resolution
  direction  one output pulse of `prechecks.pulse_size` until the PV has moved beyond the
             threshold or `prechecks.pulse_timeout` passed; wrong way or no motion stops the
             run. The PV resolution is the board's declared one, else the rest's, else the
             pulse's; the relay hysteresis defaults to max(3 x noise, resolution)
  breakaway  (prechecks.breakaway = true) two slow output ramps measure the dead zone; the
             relay starts above it
  relay      host loop (the relay runs here, one SetOutput per sample) or device loop
             (StartRelay on the board; the host follows, supervises and sends new settings);
             asymmetric by default, at two amplitudes at least
  breakaway  (prechecks.breakaway = "auto") after the relay, when the swing at its
             amplitudes shows a dead zone
The recorded samples, from the rest on, go to `autotune.core.identify` (the same path as
`autotune analyze`) and the design. When a confirmation step follows unattended, the job holds
the output at the relay's balanced bias meanwhile (`hold`: a loaded axis does not drop);
otherwise the motor is stopped first.

Sign: with `connection.sign = -1` (positive output makes the PV fall) the core sees -PV and
-centre, so it works with a loop whose positive output raises its PV. The device-side relay
cannot invert its output, so such a loop runs in host loop.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np

from autotune.config import Config, check_against_noise, relay_plan
from autotune.core import analysis, deadzone, design, identify
from autotune.core import prechecks as pre
from autotune.core.conditions import condition_set_of_identification
from autotune.core.harmonics import cycle_estimate
from autotune.core.progress import CycleEstimate, Phase
from autotune.core.relay import RelayExperiment, RelayPlan, RelaySettings
from autotune.core.supervise import noise_band
from autotune.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE, ConfigError, UserError
from autotune.job.limits import float32
from autotune.job.powered import PoweredRun, RunEnded
from protocol.messages import FLAG_RELAY_HIGH, SetPid, StartRelay

ANALYSED_ENDINGS = ("converged", "max_cycles", "max_time")
"""End reasons after which the recorded cycles are analysed (the experiment ran its course)."""
HOLD_GAIN_FRACTION = 0.2  # the hold between the relay and the step: kp = 0.2 Ku, a gain
#                           margin of about 5 on the plain figure (common practice, no source)
AUTO_BREAKAWAY_FRACTION = 0.05  # "auto": the ramps run after the relay when the swing at its
#                                 amplitudes shows a dead zone above this share of the relay
#                                 amplitude (common practice, no source)


@dataclass
class Arrays:
    """Growing arrays of one phase (device time s, PV units, output units); `extra` holds a
    per-sample label (e.g. the phase) when the caller gives one."""

    t: list[float] = field(default_factory=list)
    pv: list[float] = field(default_factory=list)
    out: list[float] = field(default_factory=list)
    extra: list[Any] = field(default_factory=list)

    def add(self, t: float, pv: float, out: float, extra: Any = None) -> None:
        self.t.append(t)
        self.pv.append(pv)
        self.out.append(out)
        self.extra.append(extra)

    def np(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return np.array(self.t), np.array(self.pv), np.array(self.out)


def choose_loop(requested: str, has_device_relay: bool, has_host_loop: bool,
                sign: int) -> str:
    """"host" or "device" for the relay; raises UserError when the board cannot do it."""
    if requested == "auto":
        if has_device_relay and sign == 1:
            return "device"
        if has_host_loop:
            return "host"
        raise UserError("the board offers neither a host loop nor (for this sign) a device "
                        "relay", exit_code=EXIT_USAGE)
    if requested == "device":
        if not has_device_relay:
            raise UserError("--loop device: the board does not offer a device-side relay; "
                            "use --loop host", exit_code=EXIT_USAGE)
        if sign != 1:
            raise UserError("--loop device needs sign = +1 (the device relay cannot invert its "
                            "output); use --loop host", exit_code=EXIT_USAGE)
        return "device"
    if not has_host_loop:
        raise UserError("--loop host: the board does not accept host outputs; use --loop device",
                        exit_code=EXIT_USAGE)
    return "host"


@dataclass(frozen=True)
class RelayEnd:
    """How the relay experiment ended: `reason` ("converged", "max_cycles", "max_time",
    "no_oscillation", "fault:no_response"), a line for the operator, the exit code it implies,
    the device time (s) and the bias (output units) the relay ended balanced at."""

    reason: str
    message: str
    exit_code: int
    t: float
    bias: float

    @property
    def analysable(self) -> bool:
        return self.reason in ANALYSED_ENDINGS


class TuneRun:
    """The identification stages of a job, run on an armed PoweredRun by autotune.job.job:
    `prechecks(run)`, `relay(run)` (returns a RelayEnd, the motor still powered), `hold`
    (the output held at the relay's balanced bias) and `analyse(...)` (the result dict:
    figures, proposals). analyse=False skips the model fit and design (relay figures only)."""

    def __init__(self, cfg: Config, *, analyse: bool = True) -> None:
        self.cfg = cfg
        self.fit_model = analyse
        self.sign = cfg.connection.sign
        self.rest: pre.RestReport | None = None
        self.direction: pre.DirectionReport | None = None
        self.breakaway: pre.BreakawayReport | None = None
        self.deadband = 0.0  # output units, measured by the breakaway precheck (0: none)
        self.hysteresis: float | None = cfg.relay.hysteresis
        self.start_amplitude = cfg.start_amplitude
        self.centre = 0.0  # PV units (raw)
        self.experiment: RelayExperiment | None = None
        self.relay_data = Arrays()  # sign-normalised PV, applied output
        self.samples = Arrays()  # from the rest on: sign-normalised PV, output, phase, state
        self.state: list[float] = []
        self.t_first_motion: float | None = None
        self.t_powered_end: float | None = None
        self.resolution = 0.0  # PV units: the board's, the rest's or the pulse's
        self.estimates: list[CycleEstimate] = []
        self._state_of: Callable[[Any], float] | None = None
        self._host_state = 0.0
        self.precheck_results: dict[str, Any] = {}
        self.run: PoweredRun | None = None
        self._rest_t = np.zeros(0)
        self._t_pulse = 0.0
        self._threshold = 0.0
        self._rest_y = np.zeros(0)

    # ------------------------------------------------------------------ stages
    def prechecks(self, run: PoweredRun) -> None:
        """Rest, direction and (when enabled) breakaway; RunEnded when one fails."""
        self.run = run
        self._prechecks(run)

    def relay(self, run: PoweredRun) -> RelayEnd:
        """The relay experiment to its end (the relay still drives the output: `hold`
        or the stop path comes next)."""
        self.run = run
        return self._relay(run)

    def _holding_output(self, exp: RelayExperiment) -> float:
        """The output that holds the loop where the relay oscillated about (output units): the
        mean applied output over the last whole cycles (for an integrating loop under a load
        exactly what carries the load; an asymmetric relay's levels are not centred on it),
        else the relay's bias."""
        cyc = exp.cycles[-3:]
        if not cyc:
            return float(exp.settings.bias)
        t, _, u = self.relay_data.np()
        sel = (t >= cyc[0].t_start) & (t < cyc[-1].t_end)
        return float(np.mean(u[sel])) if sel.sum() >= 4 else float(exp.settings.bias)

    def hold(self, run: PoweredRun, end: RelayEnd) -> Callable[[Any], float] | None:
        """End the relay by holding the loop where it oscillated, without a drop in the
        output: a proportional loop at the relay centre with kp = HOLD_GAIN_FRACTION x the
        plain describing-function Ku, its output preset to the output that held the loop
        (`end.bias`; a loaded axis keeps its load carried). On the board's PID in the device
        loop; in the host loop the returned function gives the output for each sample (the
        caller sends it). Without a board PID or a Ku, the output is held at end.bias. The
        no-response detector stands down: closed-loop stages follow."""
        if run.supervisor is not None:
            run.supervisor.disarm_response()
        exp = self.experiment
        cyc = exp.cycles[-3:] if exp is not None else []
        kp = 0.0
        if cyc:
            ku, _ = analysis.df_estimate(cyc, hysteresis=exp.settings.hysteresis)
            if math.isfinite(ku) and ku > 0:
                kp = HOLD_GAIN_FRACTION * ku
        bias, limit = float(end.bias), self.cfg.safety.output_limit
        run.sp_value = self.centre
        run.event("relay_end", {"bias": bias, "hold_kp": kp, "centre": self.centre})
        if run.loop_mode == "device" and run.info.has_device_pid and kp > 0:
            run.request(SetPid(run.axis, kp, 0.0, 0.0, 1.0, 10.0, 0.0, self.centre, bias))
            return None
        if run.loop_mode == "host" or run.info.has_host_loop:
            run.set_output(bias)
            if run.loop_mode == "host" and kp > 0:
                yc = self._y(self.centre)
                return lambda rec: min(max(bias + kp * (yc - self._y(rec.pv)), -limit), limit)
        return None

    # ------------------------------------------------------------------ helpers
    def _y(self, pv: float) -> float:
        """PV as the core sees it (sign-normalised)."""
        return self.sign * pv

    def _next(self, run: PoweredRun, publish: bool = True) -> Any:
        """The next sample (run.next_sample), kept for the analysis as the session records it:
        sign-normalised PV, applied output, phase, and the relay state the recorder writes
        with it (NaN outside the relay)."""
        rec = run.next_sample(publish=publish)
        self.samples.add(rec.t, self._y(rec.pv), rec.output, run.phase.value)
        self.state.append(self._state_of(rec) if self._state_of is not None else math.nan)
        return rec

    def _hold(self, run: PoweredRun, output: float, duration: float,
              until: Callable[[Any], bool] | None = None) -> list[Any]:
        """Hold `output` for `duration` device seconds (or until `until(sample)`); the samples
        from the first one showing the output applied on (all are recorded).

        The clock starts at the first sample received after the command that shows the output
        applied: samples queued before the command (a slow request before it, a backlog) do
        not count, and a command lost on a noisy line is sent again with each sample until the
        device shows it (for at most one second of wall clock, or `duration` of it, whichever
        is longer).
        """
        sent_at = time.monotonic()
        give_up: float | None = None  # counted from the first sample after the command (a
        #                               backlog of older ones, on a busy host, costs nothing)
        run.set_output(output)
        want = float32(output)
        got: list[Any] = []
        t0: float | None = None
        while True:
            rec = self._next(run)
            if t0 is None:
                if rec.received_at < sent_at:
                    continue  # queued before the command
                if give_up is None:
                    give_up = time.monotonic() + max(1.0, run.wall(duration))
                if rec.output != want and time.monotonic() < give_up:
                    run.set_output(output)
                    continue
                t0 = rec.t
            got.append(rec)
            if until is not None and until(rec):
                break
            if rec.t - t0 >= duration:
                break
        return got

    # ------------------------------------------------------------------ prechecks
    def _prechecks(self, run: PoweredRun) -> None:
        cfg = self.cfg
        bias = cfg.relay.bias
        # 1. rest
        run.set_phase(Phase.PRECHECK_REST, f"holding the output at {bias:g} for "
                      f"{cfg.prechecks.rest_time:g} s")
        run.sp_value = run.pv_start or 0.0
        recs = self._hold(run, bias, cfg.prechecks.rest_time)
        # the first samples may still show the previous output; use the applied ones
        tol = 1e-6 * max(1.0, abs(bias))  # the wire carries float32
        recs = [r for r in recs if abs(r.output - bias) <= tol] or recs
        t = np.array([r.t for r in recs])
        pv = np.array([r.pv for r in recs])
        out = np.array([r.output for r in recs])
        if t.size < 3:
            raise RunEnded("precheck:rest", "too few samples at rest", EXIT_FAILED)
        rest = pre.assess_rest(t, pv, out, pv_window=cfg.safety.pv_window)
        self._rest_t, self._rest_y = t, self.sign * pv
        self.rest = rest
        self.precheck_results["rest"] = rest.as_dict()
        run.event("precheck", rest.as_dict(), check="rest", ok=rest.ok)
        if not rest.ok:
            raise RunEnded("precheck:rest", rest.message, EXIT_FAILED)
        # the board's declared PV step (handshake), when it declares one
        board_resolution = float(getattr(run.info, "pv_resolution", 0.0) or 0.0)
        try:
            check_against_noise(cfg, rest.noise_std,
                                pre.pv_resolution(board_resolution, rest.resolution))
        except ConfigError as exc:
            raise RunEnded("precheck:rest", str(exc), EXIT_USAGE) from None
        self.centre = rest.mean
        run.say(f"rest: noise {rest.noise_std:.3g}, drift {rest.drift:.3g}/s, resolution "
                f"{rest.resolution:.3g}")
        # 2. direction: a pulse; one twice as large when the first moved the PV too little to
        # decide (a coarse sensor, a pulse just beyond a dead zone), within the output limit
        size = cfg.pulse_size
        threshold = pre.direction_threshold(rest.noise_std, cfg.relay.target_amplitude)
        # the drift seen at rest (a load on an integrating loop) is taken out, so that the
        # pulse's own effect decides the direction
        drift = self.sign * rest.significant_drift
        t_mid = float(np.mean(self._rest_t))

        def detrend(t: Any, y: Any) -> Any:
            return y - drift * (t - t_mid)

        base_t, base_y = self._rest_t, self._rest_y  # the baseline's samples (sign applied)
        room = cfg.safety.output_limit - abs(bias)
        self.t_first_motion = run.last_sample.t
        while True:
            run.set_phase(Phase.PRECHECK_DIRECTION, f"output pulse of {size:g}")
            base = float(np.mean(detrend(base_t, base_y)))
            # the live check sees what the assessment below sees: the causal median of three
            # over the baseline's last samples and the pulse's
            window: list[float] = list(detrend(base_t[-2:], base_y[-2:]))

            def moved(rec: Any, window: list[float] = window, base: float = base) -> bool:
                window.append(float(detrend(rec.t, self._y(rec.pv))))
                return bool(abs(pre.trailing_median3(window[-3:])[-1] - base) > threshold)

            t_pulse = run.last_sample.t
            self._t_pulse = t_pulse
            recs = self._hold(run, bias + size, cfg.prechecks.pulse_timeout, until=moved)
            run.set_output(bias)
            t = np.concatenate([base_t, [r.t for r in recs]])
            y = detrend(t, np.concatenate([base_y, [self._y(r.pv) for r in recs]]))
            d = pre.assess_direction(t, y, t_pulse, +1, rest.noise_std, expected_sign=+1,
                                     min_change=threshold)
            if not pre.weak_response(d) or 2.0 * size > room + 1e-9:
                break
            run.event("precheck", {**d.as_dict(), "t_pulse": t_pulse, "pulse": size},
                      check="direction_weak", ok=False)
            run.say(f"direction: the PV moved {self.sign * d.change:+.3g} for an output pulse "
                    f"of {size:+g}, short of the {threshold:.3g} needed to decide: a pulse of "
                    f"{2.0 * size:+g} follows")
            # back at the bias; where the PV then holds is the next pulse's baseline
            again = self._hold(run, bias, cfg.prechecks.rest_time)
            again = again[len(again) // 2:]
            if len(again) < 3:
                break
            base_t = np.array([r.t for r in again])
            base_y = np.array([self._y(r.pv) for r in again])
            size *= 2.0
        # a sensor that reads exactly constant at rest shows its step once the PV moves
        d = replace(d, resolution=pre.smallest_step([r.pv for r in recs]))
        self.direction = d
        self.resolution = pre.pv_resolution(board_resolution, rest.resolution, d.resolution)
        if self.hysteresis is None:
            self.hysteresis = pre.relay_hysteresis(rest.noise_std, self.resolution)
        detail = {**d.as_dict(), "t_pulse": t_pulse, "board_resolution": board_resolution,
                  "resolution_used": self.resolution, "hysteresis": self.hysteresis}
        self.precheck_results["direction"] = detail
        run.event("precheck", detail, check="direction", ok=d.ok)
        if not d.ok:
            raise RunEnded("precheck:direction", d.message, EXIT_FAILED)
        run.say(f"direction: PV moved {self.sign * d.change:+.3g} for an output pulse of "
                f"{size:+g}: as expected; resolution {self.resolution:.3g}, hysteresis "
                f"{self.hysteresis:.3g}")
        if run.supervisor is not None:
            # from now on an output step of `size` or more must move the PV out of its noise
            # band within twice the time the pulse needed (at least pulse_timeout), else
            # fault:no_response (issue 8: stuck sensor)
            took = recs[-1].t - t_pulse if recs else cfg.prechecks.pulse_timeout
            run.supervisor.expect_response(
                bias, size, noise_band(rest.noise_std, rest.resolution, rest.mean),
                max(cfg.prechecks.pulse_timeout, 2.0 * took))
        self._threshold = threshold
        # 3. breakaway (before the relay only when asked for; "auto" runs it after the relay
        # where the relay's swing at two amplitudes shows a dead zone)
        if cfg.prechecks.breakaway is True:
            self._breakaway(run, threshold)

    def _breakaway(self, run: PoweredRun, threshold: float, period: float | None = None) -> None:
        """Two output ramps (up at breakaway_rate, down at twice it) measure the deadband.

        Each ramp starts from rest at the bias (held max(3 x rest_time, 10 x the direction
        pulse's response time) first; after the relay, with its `period` (s) known,
        max(rest_time, 2 periods)) and stops once the PV has moved a few noise
        levels (at most 0.3 of the PV window); `prechecks.deadband_from_two_ramps`
        compares the times the two responses take to reach matching levels, which cancels the
        loop's lag and dead time. If the PV moved too little for that, the first ramp's upper
        bound (`assess_breakaway`) is used.
        """
        cfg = self.cfg
        bias = cfg.relay.bias
        rest = self.rest
        assert rest is not None
        room = cfg.safety.output_limit - abs(bias)
        max_step = min(room, cfg.safety.output_limit * 0.5)
        rate_a = cfg.prechecks.breakaway_rate
        rate_b = 2.0 * rate_a
        ratio = rate_b / rate_a
        level_min = max(threshold, 3.0 * rest.resolution, 5.0 * rest.noise_std)
        level_max = max(min(3.0 * level_min, 0.3 * cfg.safety.pv_window / ratio),
                        1.5 * level_min)
        noise = rest.noise_std
        drift = self.sign * rest.significant_drift
        run.set_phase(Phase.PRECHECK_BREAKAWAY, f"output ramps at {rate_a:g}/s and "
                      f"{-rate_b:g}/s, up to {max_step:g}")

        def ramp(rate: float, direction: int, stop_level: float) -> tuple[Arrays, float]:
            # from rest at the bias: the PV settles after the previous motion (an integrating
            # loop coasts on through its lag; motion left over biases the reading)
            held = self._hold(run, bias, settle)
            tail = held[len(held) // 2:] or held
            t0 = run.last_sample.t
            base = float(np.mean([self._y(r.pv) for r in tail]))
            duration = pre.breakaway_ramp_duration(rate, max_step)
            data = Arrays()  # t from the ramp start, motion in the ramp's direction, output
            recent: list[float] = []
            while True:
                rec = self._next(run)
                dev = direction * (self._y(rec.pv) - base - drift * (rec.t - t0))
                data.add(rec.t - t0, dev, rec.output)
                recent.append(dev)
                if rec.t - t0 > duration or sorted(recent[-3:])[len(recent[-3:]) // 2] \
                        > stop_level:
                    break
                run.set_output(pre.breakaway_ramp(rec.t - t0, rate, max_step, bias=bias,
                                                  sign=direction))
            run.set_output(bias)
            # the ramp as applied (the link's latency delays it): its start from a fit of the
            # applied output, rate (t - t_start), over the samples on the slope
            t, _, out = data.np()
            on = (np.abs(out - bias) > 0) & (np.abs(out - bias) < max_step - 1e-9)
            if np.any(on):
                shift = float(np.mean(t[on] - np.abs(out[on] - bias) / rate))
                data.t = [x - shift for x in data.t]
            return data, t0

        lag = 0.0
        if self.direction is not None and self.direction.t_response is not None:
            lag = max(0.0, self.direction.t_response - self._t_pulse)
        settle = max(3.0 * cfg.prechecks.rest_time, 10.0 * lag)
        if period is not None:
            settle = max(cfg.prechecks.rest_time, 2.0 * period)
        stop_a = level_max + 2.0 * max(rest.resolution, noise)
        ramp_a, _ = ramp(rate_a, +1, stop_a)
        ramp_b, _ = ramp(rate_b, -1, ratio * level_max + 2.0 * max(rest.resolution, noise))
        self._hold(run, bias, 0.5 * cfg.prechecks.rest_time)
        ta, ya, ua = ramp_a.np()
        tb, yb, _ = ramp_b.np()
        two = pre.deadband_from_two_ramps(ta, ya, rate_a, tb, yb, rate_b,
                                          level_min=level_min, level_max=level_max,
                                          n_levels=15)
        bound = pre.assess_breakaway(ta, ya, ua - bias, noise,
                                     min_change=max(threshold, 2.0 * rest.resolution))
        self.breakaway = bound
        detail: dict[str, Any] = {"method": "two_ramps", "rates": [rate_a, -rate_b],
                                  **two.as_dict(), "upper_bound": bound.deadband}
        deadband = two.deadband
        if deadband is None:
            detail["method"] = "first_motion"
            deadband = bound.deadband
        elif 0.0 < deadband <= 3.0 * two.spread:
            # not distinguishable from no dead zone (3 x the spread over the ramp levels:
            # common practice, no source): correcting for it would only add its noise
            detail["measured"] = deadband
            detail["note"] = "below 3 x its spread: taken as no dead zone"
            deadband = 0.0
        detail["deadband"] = deadband
        detail["after_relay"] = period is not None
        self.t_powered_end = run.last_sample.t
        detail["t_end"] = self.t_powered_end
        self.deadband = deadband or 0.0
        self.precheck_results["breakaway"] = detail
        run.event("precheck", detail, check="breakaway", ok=deadband is not None)
        if period is not None:  # after the relay: its figures stand either way
            run.say(f"breakaway: dead zone {deadband if deadband is not None else 0.0:.3g} "
                    f"(+/- {two.spread:.2g}, {detail['method']})")
            return
        if deadband is None:
            raise RunEnded("precheck:breakaway", two.message or bound.message, EXIT_FAILED)
        # start the relay above the deadband (twice it: common practice, no source)
        self.start_amplitude = min(max(self.start_amplitude, 2.0 * deadband), room)
        run.say(f"breakaway: deadband {deadband:.3g} (+/- {two.spread:.2g}, {detail['method']});"
                f" relay starts at {self.start_amplitude:.3g}")

    # ------------------------------------------------------------------ relay
    def _plan(self) -> RelayPlan:
        rest, d = self.rest, self.direction
        response = 0.0
        if d is not None and d.t_response is not None:
            response = max(0.0, d.t_response - self._t_pulse)
        return relay_plan(self.cfg.relay, start_amplitude=self.start_amplitude,
                          pv_window=self.cfg.safety.pv_window, deadband=self.deadband,
                          tick=self._interval(),
                          pv_noise=rest.noise_std if rest else 0.0,
                          pv_resolution=self.resolution, response_time=response)

    def _relay(self, run: PoweredRun) -> RelayEnd:
        cfg = self.cfg
        assert self.hysteresis is not None
        settings = RelaySettings(centre=self._y(self.centre), bias=cfg.relay.bias,
                                 amplitude=self.start_amplitude, hysteresis=self.hysteresis,
                                 asymmetry=cfg.relay.asymmetry)
        exp = RelayExperiment(self._plan(), settings, cfg.safety.output_limit,
                              pv_start=self._y(run.pv_start or self.centre),
                              confirm_samples=cfg.relay.confirm_samples)
        self.experiment = exp
        run.sp_value = self.centre
        run.snapshot_extra["max_cycles"] = cfg.relay.max_cycles
        run.set_phase(Phase.RELAY, f"{run.loop_mode} loop, amplitude {exp.settings.amplitude:.3g}"
                      f", hysteresis {self.hysteresis:.3g}, centre {self.centre:.4g}")
        run.event("relay_settings", exp.settings.as_dict())
        device = run.loop_mode == "device"

        def start_relay(s: RelaySettings) -> None:
            run.request(StartRelay(run.axis, s.centre, s.bias, s.amp_high, s.amp_low,
                                   s.hysteresis))

        if device:
            # the board reports its relay state with every sample
            run.sample_hook = lambda rec: ({"state": 1 if rec.flags & FLAG_RELAY_HIGH else -1}
                                           if rec.mode == 2 else {})
            self._state_of = lambda rec: run.sample_hook(rec).get("state", math.nan)
            start_relay(exp.settings)
        else:
            # every relay sample carries the state whose output it shows (0 before the first)
            run.sample_extra(state=0)
            self._host_state = 0.0
            self._state_of = lambda rec: self._host_state
        while True:
            rec = self._next(run, publish=False)
            y = self._y(rec.pv)
            if device:
                if rec.mode != 2:  # not yet in relay mode (the request is in flight)
                    continue
                step = exp.observe(rec.t, y, rec.output)
            else:
                step = exp.update(rec.t, y)
            self.relay_data.add(rec.t, y, rec.output)
            if not device:
                # recorded with the next sample: the state whose output that sample shows
                run.sample_extra(state=step.state)
                self._host_state = float(step.state)
            if step.done:
                self._events(run, step.events)
                reason = step.end_reason or "completed"
                message = self._end_message(reason)
                if reason == "no_oscillation" and self._pv_frozen(rec.t):
                    reason = "fault:no_response"
                    message = ("no response: the PV did not move while the relay drove the "
                               "output; check the sensor, its wiring and the motor power")
                self.t_powered_end = rec.t
                run.event("relay_final", exp.settings.as_dict())
                self._state_of = None
                run.clear_sample_extra()
                if reason == "converged":
                    self._after_relay(run, exp)
                code = EXIT_OK if reason == "converged" else EXIT_FAILED
                return RelayEnd(reason, message, code, rec.t, self._holding_output(exp))
            if device:
                if step.new_settings is not None:
                    start_relay(step.new_settings)
            else:
                run.set_output(step.output)
            self._events(run, step.events)
            run.publish()

    def _after_relay(self, run: PoweredRun, exp: RelayExperiment) -> None:
        """prechecks.breakaway = "auto": the ramps run now when the swing at the relay's
        amplitudes shows a dead zone of AUTO_BREAKAWAY_FRACTION of the amplitude or more."""
        if self.cfg.prechecks.breakaway != "auto" or not run.info.has_host_loop:
            return
        d = exp.settings.amplitude
        est = self._swing_dead_zone(exp)
        if est is None or not est > AUTO_BREAKAWAY_FRACTION * d:
            return
        run.say(f"the relay's swing at two amplitudes shows a dead zone of about {est:.3g}: "
                "measuring it with the breakaway ramps")
        period = exp.cycles[-1].period if exp.cycles else None
        self._breakaway(run, self._threshold, period=period)

    def _swing_dead_zone(self, exp: RelayExperiment) -> float | None:
        """Dead zone (output units) the relay's record shows from its amplitude stages, by the
        estimator the identification uses (`deadzone.estimate_dead_zone`, no model yet); the
        relay's own running estimate when the record has fewer than two stages."""
        t, y, u = self.relay_data.np()
        cycles = analysis.relay_cycles(t, y, u, centre=exp.settings.centre)
        stages = deadzone.stages_from_cycles(t, cycles)
        if len(stages) >= 2 and t.size > 1:
            est = deadzone.estimate_dead_zone(t, y, u, stages, float(np.median(np.diff(t))))
            if est is not None:
                return est.raw
        return exp.dead_zone_estimate()

    def _pv_frozen(self, t_end: float) -> bool:
        """True when the PV stayed within its noise band over the last relay.stall_time s."""
        t, y, _ = self.relay_data.np()
        sel = t >= t_end - self.cfg.relay.stall_time
        if sel.sum() < 3:
            return False
        rest = self.rest
        band = max(3.0 * rest.noise_std, rest.resolution) if rest else 0.0
        return float(np.ptp(y[sel])) <= band

    def _end_message(self, reason: str) -> str:
        exp = self.experiment
        n = len(exp.cycles) if exp else 0
        return {
            "converged": f"the oscillation converged after {n} cycles",
            "max_cycles": f"no convergence within {n} cycles (relay.max_cycles)",
            "max_time": "no convergence within relay.max_time",
            "no_oscillation": "the PV does not oscillate even at the largest allowed amplitude",
        }.get(reason, reason)

    def _events(self, run: PoweredRun, events: list[Any]) -> None:
        exp = self.experiment
        assert exp is not None
        for ev in events:
            if ev.kind == "cycle":
                c = ev.detail
                # plain describing function of this cycle, and the refined live figure from
                # the harmonics of the cycles at this amplitude (the analysis refines it again)
                ku_df = analysis.df_ultimate_gain(c["amplitude_d"], 0.5 * c["amplitude_pp"],
                                                  self.hysteresis or 0.0)
                ku, tu = self._live_estimate(exp, c)
                self.estimates.append(CycleEstimate(c["index"], c["period"], c["amplitude_pp"],
                                                    ku, tu, ku_df, c["period"]))
                run.snapshot_extra.update(cycle=len(exp.cycles), estimates=tuple(self.estimates))
            elif ev.kind == "converged":
                run.snapshot_extra["converged"] = True
            if run.writer is not None:
                run.writer.event(ev.t, ev.kind, ev.detail)
            run.publish(force=True)

    def _live_estimate(self, exp: RelayExperiment, c: Mapping[str, Any]) -> tuple[float, float]:
        """(Ku, Tu) after cycle `c` (a cycle event's detail) from the harmonics of the cycles at
        its relay amplitude (the first after a change left out when there are more); the plain
        figures when the harmonics do not bracket the crossover."""
        same = []
        for cyc in reversed(exp.cycles[:c["index"]]):
            if cyc.amplitude_d != c["amplitude_d"] or cyc.bias != c["bias"]:
                break
            same.append(cyc)
        same.reverse()
        if len(same) > 1:
            same = same[1:]
        t = np.asarray(self.relay_data.t)
        sel = (t >= same[0].t_start) & (t < c["t_end"])
        est = None
        if sel.sum() >= 8:
            est = cycle_estimate(t[sel], np.asarray(self.relay_data.pv)[sel],
                                 np.asarray(self.relay_data.out)[sel], self._interval(),
                                 self.rest.noise_std if self.rest else 0.0, cycles=len(same))
        if est is None or not all(math.isfinite(x) and x > 0 for x in est):
            return (analysis.df_ultimate_gain(c["amplitude_d"], 0.5 * c["amplitude_pp"],
                                              self.hysteresis or 0.0), c["period"])
        return est

    # ------------------------------------------------------------------ analysis
    def _interval(self) -> float:
        """Seconds between the samples the host gets: the tick times the stream decimation."""
        run = self.run
        return 0.0 if run is None else run.info.tick * run.decimation

    def run_record(self, run: PoweredRun, reason: str) -> identify.RunRecord:
        """What this run recorded, in the shape the session file holds it (the live run's side
        of the one analysis path; `autotune analyze` builds the same from the file)."""
        exp = self.experiment
        assert exp is not None
        s = exp.settings
        t, y, u = self.samples.np()
        return identify.RunRecord(
            t=t, y=y, u=u, phase=np.array(self.samples.extra, dtype=object),
            settings=identify.RelaySettingsRecord(s.centre, s.bias, s.amplitude, s.hysteresis,
                                                  s.asymmetry),
            state=np.array(self.state, dtype=float), tick=self._interval(),
            output_limit=self.cfg.safety.output_limit, relay=asdict(self.cfg.relay),
            rest=self.precheck_results.get("rest"),
            direction=self.precheck_results.get("direction"),
            breakaway=self.precheck_results.get("breakaway"),
            pv_resolution=float((self.precheck_results.get("direction") or {}).get(
                "board_resolution", 0.0) or 0.0),
            sign=self.sign, t_first_motion=self.t_first_motion,
            t_powered_end=self.t_powered_end, end_reason=reason)

    def analyse(self, run: PoweredRun, reason: str, message: str) -> dict[str, Any]:
        """The result dict (result.json fields) of the recorded run; `reason`/`message`: how
        the relay (or the run) ended. Pure computation on what was recorded: safe to run in a
        worker thread while the motor holds its bias (it records nothing)."""
        exp = self.experiment
        assert exp is not None
        cfg = self.cfg
        s = exp.settings
        info = run.info
        result: dict[str, Any] = {
            "end_reason": reason,
            "message": message,
            "loop_mode": run.loop_mode,
            "sign": self.sign,
            "relay": {"amplitude": s.amplitude, "hysteresis": s.hysteresis, "bias": s.bias,
                      "centre": self.sign * s.centre, "asymmetry": s.asymmetry},
            "cycles": [c.as_dict() for c in exp.cycles],
            "prechecks": self.precheck_results,
            "device": {"name": info.device_name, "firmware": info.firmware, "tick": info.tick},
            "notes": [],
        }
        result["cycles_used"] = 0
        if not self.fit_model:
            result["notes"].append("analysis skipped: only the relay figures are reported")
            self._df_only(result, exp)
            return result
        if reason not in ANALYSED_ENDINGS:
            result["notes"].append(
                f"the relay did not run to its end ({reason}): only the plain "
                "relay figures are reported; `autotune analyze` on the session file analyses "
                "the cycles recorded")
            self._df_only(result, exp)
            return result
        try:
            fields, notes = analyse_record(self.run_record(run, reason), design_table(cfg),
                                           cfg.relay.target_amplitude)
        except analysis.AnalysisError as exc:
            result["notes"].append(f"analysis failed: {exc}")
            self._df_only(result, exp)
            return result
        result.update(fields)
        result["end_reason"] = reason
        result["notes"].extend(notes)
        if self.sign == -1:
            result["notes"].append("sign = -1: gains are for the sign-normalised loop; the "
                                   "controller must act on -error (or negate the gains)")
        return result

    def _df_only(self, result: dict[str, Any], exp: RelayExperiment) -> None:
        """Plain describing-function figures from the last settled cycles (no model)."""
        cyc = exp.settled_cycles[-3:] or exp.cycles[-3:]
        result.update(cycles_used=len(cyc), proposals=[])
        if cyc:
            ku, tu = analysis.df_estimate(cyc, hysteresis=exp.settings.hysteresis)
            result.update(ultimate_gain_df=ku, ultimate_period_df=tu)


def analyse_record(record: identify.RunRecord, design_cfg: Mapping[str, Any],
                   target_amplitude: float | None) -> tuple[dict[str, Any], list[str]]:
    """The analysis fields of result.json and the notes for a run record: the one path of the
    live run and of `autotune analyze` (autotune.core.identify, then `propose_gains`).
    Raises autotune.core.analysis.AnalysisError when the record cannot be analysed."""
    ident = identify.identify(identify.analysis_inputs(record))
    fields = identify.result_fields(ident)
    notes = list(ident.warnings)
    fields["proposals"] = propose_gains(ident, design_cfg, record.output_limit,
                                        target_amplitude, ident.analysis.ts, notes)
    return fields, notes


def propose_gains(ident: identify.Identification, design_cfg: Mapping[str, Any],
                  output_limit: float | None, target_amplitude: float | None,
                  ts: float | None, notes: list[str]) -> list[dict[str, Any]]:
    """The result.json `proposals` for an identification, live and offline alike.

    design_cfg: the design limits (`design_table`: ms_target, max_overshoot (%),
    max_settling_time (s), step_size (PV units; None = the relay's target amplitude));
    output_limit in output units; ts the loop period (s). The designs are held to the measured
    points too (`conditions.condition_set_of_identification`); where the model does not
    reproduce what was measured, they hold on every candidate model fitted to the record as
    well, PI is preferred and every prediction is marked unreliable. A design failure,
    a default that misses the spec or no default at all is reported in `notes` in our own
    words, not raised: the analysis itself stands.
    """
    an = ident.analysis
    spec = design.spec_from_config(design_cfg, output_limit, target_amplitude, ts,
                                   dead_zone=float(ident.dead_zone_used))
    tf = an.model.tf
    if not all(math.isfinite(c) for c in tf.num + tf.den):
        notes.append("no gains proposed: the identified model is not usable; run the relay "
                     "again with a larger amplitude")
        return []
    conds = condition_set_of_identification("session", ident)
    try:
        with np.errstate(all="ignore"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = design.design_proposals(conds, spec)
    except Exception:  # noqa: BLE001 - report in our words, the analysis itself stands
        notes.append("no gains proposed: the design found no usable gains for the identified "
                     "model; check the warnings above and run the relay again")
        return []
    notes.extend(res.warnings)
    chosen = res.get(res.default) if res.default else None
    if chosen is None or not chosen.meets_spec:
        notes.append(res.note)
    return [p.as_dict() for p in res.proposals]


def design_table(cfg: Config) -> dict[str, Any]:
    """The design limits of a config: its [design] table, with the overshoot the confirmation
    step's spec allows ([spec] max_overshoot) binding when the table sets none or more."""
    return design.design_limits(asdict(cfg.design), asdict(cfg.spec))
