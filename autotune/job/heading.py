"""The heading loop of a drive base, on top of its two wheel loops (a plan's "heading" loop).

    both wheels' PIDs set on the board with their gains (board-side, setpoint 0, at rest) ->
    both axes streamed -> the host integrates the heading from the wheel speeds every device
    tick (autotune.core.cascade) and, every `host_ticks` device ticks, runs the outer loop:
    first a relay (autotune.core.relay.Relay) on the heading, whose output u is the wheels'
    differential setpoint (left -u, right +u) -> the relay's Ku, Tu (autotune.core.analysis)
    -> the outer plant with both inner closed loops in it and the design on it
    (autotune.core.design), the separation check (at least about 4x slower) -> the outer
    confirmation step: the host's DiscretePid on the heading with the default proposal, judged
    against the prediction -> every axis stopped

Every limit of each axis stays loaded on the board (the plan loads and reads them back before
any motion); a fault on either axis, a lost link or any exception stops every axis (Stop has no
axis on the wire). Time is device time (the samples' stamps); the session holds one record a
device tick: the heading as pv (rad), the differential setpoint as out (rad/s), the heading
setpoint as sp (rad), and each wheel's speed, output and setpoint.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from autotune.core import design
from autotune.core.analysis import AnalysisError, df_estimate, df_ultimate_gain, relay_cycles
from autotune.core.cascade import (
    DriveGeometry,
    Separation,
    gain_crossover,
    heading_step,
    inner_closed_loop,
    outer_plant,
    outer_ultimate,
    separation,
)
from autotune.core.lti import DelayedTF
from autotune.core.metrics import step_metrics
from autotune.core.pid import DiscretePid, PidGains, PidSettings
from autotune.core.relay import Relay, RelaySettings
from autotune.errors import EXIT_FAILED, EXIT_LINK, EXIT_OK
from autotune.recorder import SessionWriter, write_result
from protocol.errors import LinkError
from protocol.messages import SetPid, SetSetpoint, Stream


@dataclass(frozen=True)
class Wheel:
    """One wheel loop under the heading loop: its axis, its identified model (duty % ->
    rad/s, positive gain), its board-side gains, setpoint weight b, derivative filter N and
    tracking time Tt (s; None: clamping)."""

    axis: int
    model: DelayedTF
    gains: PidGains
    setpoint_weight: float = 1.0
    n: float = 10.0
    tracking_time: float | None = None


@dataclass(frozen=True)
class HeadingSettings:
    """The heading loop's experiment.

    geometry: wheel radius and track width (m); host_ticks: the outer loop's period in device
    ticks (the designed loop's, and the confirmation step's); relay_ticks: the relay's period
    in device ticks (1: the relay decides every tick, so its limit cycle is not locked to a
    coarse grid of switching instants: the ultimate point is identified at the fine tick, the
    design is for the coarse one); base_speed: both wheels' common setpoint during the whole
    run (rad/s: the base drives forward, each wheel turning well clear of its dead zone, as
    it does when the base steers on the move; with integral action in both wheel loops a
    constant base speed leaves the heading unchanged once the wheels have settled);
    settle_time: the time at the base speed before the relay (s); relay_amplitude: the relay's differential setpoint d (rad/s); relay_hysteresis
    (rad); relay_cycles: cycles recorded (the first two are dropped as the transient);
    step_size: the heading step of the confirmation (rad); output_limit: the largest
    differential setpoint the outer loop may ask (rad/s); ms_target: the outer design's Ms
    bound (1.3: gentler than a single loop's 1.4, the outer model carries the errors of both
    wheels' identified models; common practice, no source); overshoot_tolerance: measured minus predicted overshoot allowed (percentage points).
    """

    geometry: DriveGeometry
    host_ticks: int = 5
    relay_ticks: int = 1
    base_speed: float = 2.5
    settle_time: float = 1.5
    relay_amplitude: float = 1.0
    relay_hysteresis: float = 0.002
    relay_cycles: int = 8
    step_size: float = 0.3
    output_limit: float = 2.0
    ms_target: float = 1.3
    overshoot_tolerance: float = 5.0


@dataclass
class HeadingOutcome:
    """How the heading loop ended: exit code, reason, one line, the result dict written to
    result.json (None when nothing was measured), the files written."""

    exit_code: int
    reason: str
    message: str
    result: dict[str, Any] | None = None
    session_path: Path | None = None
    result_path: Path | None = None
    stop_confirmed: bool | None = None
    lines: list[str] = field(default_factory=list)


class HeadingStopped(Exception):
    """The heading run must stop every axis (a fault, a lost sample stream)."""


class _Loop:
    """The host side of the heading loop on an open link: pairs the two axes' samples of a
    tick, integrates the heading, records, and sends the differential setpoint."""

    def __init__(self, link: Any, left: Wheel, right: Wheel, settings: HeadingSettings,
                 tick: float, speed: float, writer: SessionWriter) -> None:
        self.link, self.left, self.right = link, left, right
        self.s = settings
        self.tick = tick
        self.wait = max(2.0, 20 * tick / speed)
        self.writer = writer
        self.theta = 0.0
        self.t_prev: float | None = None
        self.u = 0.0
        self.sp = 0.0
        self.pending: dict[int, dict[float, Any]] = {left.axis: {}, right.axis: {}}
        self.ticks = 0
        self.prev = (0.0, 0.0)
        self.nak0 = getattr(link, "last_nak", None)
        self.relay_t: list[float] = []
        self.relay_theta: list[float] = []
        self.relay_u: list[float] = []

    def send_u(self, u: float) -> None:
        """The differential setpoint u (rad/s) on the base speed: left base - u, right
        base + u (both sent at once, the replies not awaited: the board's setpoints come
        back in the samples, a refusal is counted by the link)."""
        self.u = u
        base = self.s.base_speed
        self.link.send(SetSetpoint(self.left.axis, base - u))
        self.link.send(SetSetpoint(self.right.axis, base + u))

    def _feed(self, rec: Any) -> tuple[float, Any, Any] | None:
        """One sample in: the tick (t, left, right) once both axes' samples of it are in,
        the heading integrated up to it; else None."""
        if rec.axis not in self.pending:
            return None
        key = round(rec.t / self.tick)
        self.pending[rec.axis][key] = rec
        other = self.right.axis if rec.axis == self.left.axis else self.left.axis
        if key not in self.pending[other]:
            return None
        lrec = self.pending[self.left.axis].pop(key)
        rrec = self.pending[self.right.axis].pop(key)
        for side in self.pending.values():  # older unpaired ticks will not pair now
            for k in [k for k in side if k < key]:
                del side[k]
        t = lrec.t
        if self.t_prev is not None:
            self.theta = heading_step(self.theta, self.prev[0], self.prev[1],
                                      self.s.geometry, t - self.t_prev)
        self.t_prev, self.prev = t, (lrec.pv, rrec.pv)
        self.ticks += 1
        return t, lrec, rrec

    def _check_faults(self) -> None:
        """A fault latched on either axis, or a setpoint the board refused: stop."""
        nak = getattr(self.link, "last_nak", None)
        if nak is not None and nak is not self.nak0:
            raise HeadingStopped(f"the board refused a setpoint (code {nak[1].code})")
        for fault in self.link.poll_faults():
            raise HeadingStopped(f"the board latched a fault on axis {fault.axis} "
                                 f"(code {fault.code})")

    def next_tick(self) -> tuple[float, Any, Any]:
        """The next device tick with both axes' samples: (t, left, right); the heading
        integrated up to it."""
        while True:
            self._check_faults()
            rec = self.link.next_sample(timeout=self.wait)
            if rec is None:
                raise HeadingStopped("no samples from the board")
            got = self._feed(rec)
            if got is not None:
                return got

    def catch_up(self, phase: str) -> None:
        """Take in every sample queued while the host was busy (the analysis, the design):
        the heading integrated over them and each tick recorded under `phase`, no action
        taken on them (the next decision is on fresh samples)."""
        self._check_faults()
        for rec in self.link.drain_samples():
            got = self._feed(rec)
            if got is not None:
                self.record(*got, phase)

    def record(self, t: float, lrec: Any, rrec: Any, phase: str) -> None:
        if phase == "relay":
            self.relay_t.append(t)
            self.relay_theta.append(self.theta)
            self.relay_u.append(self.u)
        self.writer.sample(t, self.theta, self.u, self.sp, phase=phase,
                           left_pv=lrec.pv, right_pv=rrec.pv, left_out=lrec.output,
                           right_out=rrec.output, left_sp=lrec.setpoint,
                           right_sp=rrec.setpoint)


def inner_loops(left: Wheel, right: Wheel, tick: float) -> tuple[DelayedTF, DelayedTF]:
    """Both wheels' closed loops T_L, T_R (rational, `cascade.inner_closed_loop`)."""
    return tuple(inner_closed_loop(w.model, w.gains, tick, w.n, w.setpoint_weight)
                 for w in (left, right))  # type: ignore[return-value]


def run_heading(link: Any, tick: float, speed: float, left: Wheel, right: Wheel,
                settings: HeadingSettings, out_dir: Path,
                say: Callable[[str], None] = lambda _line: None,
                header: dict[str, Any] | None = None) -> HeadingOutcome:
    """Run the heading loop (see the module docstring) on an open, handshaken `link` whose
    axes already hold their limits; tick: the board's tick (s); speed: the simulated board's
    factor over real time (1 for a real board). Writes OUT/session.jsonl and result.json in
    `out_dir`. Never leaves a motor powered: every axis is stopped on every path out."""
    s = settings
    h = s.host_ticks * tick
    t_l, t_r = inner_loops(left, right, tick)
    # dead time of the outer loop's own, besides the hold of its period (the design's): the
    # host answers a tick's samples in the next tick at the earliest (one tick), and the
    # forward-Euler heading holds each tick's speeds over the tick after it (half a tick)
    plant = outer_plant(t_l, t_r, s.geometry, delay=1.5 * tick)
    expected = outer_ultimate(plant, s.relay_ticks * tick)
    out_dir.mkdir(parents=True, exist_ok=True)
    session_path = out_dir / "session.jsonl"
    hdr = {"loop": "heading", "axes": [left.axis, right.axis], "tick": tick,
           "host_tick": h, "units": {"pv": "rad", "out": "rad/s (differential setpoint)"},
           "geometry": {"wheel_radius": s.geometry.wheel_radius,
                        "track_width": s.geometry.track_width}, **(header or {})}
    outcome = HeadingOutcome(EXIT_FAILED, "error", "the heading loop did not finish",
                             session_path=session_path)
    result: dict[str, Any] = {"format": "autotune-heading-result", "version": 1,
                              "host_tick": h, "relay_tick": s.relay_ticks * tick,
                              "base_speed": s.base_speed, "expected_ultimate": expected}
    writer = SessionWriter(session_path, hdr)
    loop = _Loop(link, left, right, s, tick, speed, writer)
    try:
        for w in (left, right):
            link.request(Stream(w.axis, 1, 1))
        link.drain_samples()
        for w in (left, right):
            g = w.gains
            link.request(SetPid(w.axis, g.kp, g.ki, g.kd, w.setpoint_weight, w.n,
                                w.tracking_time or 0.0, 0.0, 0.0))
        writer.event(None, "inner_loops_closed", {"axes": [left.axis, right.axis]})
        say(f"heading: both wheel loops closed on the board, both at {s.base_speed:g} rad/s")
        loop.send_u(0.0)
        t, lrec, rrec = loop.next_tick()
        t_settled = t + s.settle_time
        while t < t_settled:
            loop.record(t, lrec, rrec, "settle")
            t, lrec, rrec = loop.next_tick()
        # ---- relay on the heading reached, every relay_ticks device ticks
        loop.catch_up("settle")
        centre = loop.theta
        loop.sp = centre
        say("heading: relay on the heading")
        relay = Relay(RelaySettings(centre, 0.0, s.relay_amplitude, s.relay_hysteresis),
                      s.output_limit)
        first = loop.ticks
        max_ticks = first + int(60.0 / tick)
        while True:
            if (loop.ticks - first) % s.relay_ticks == 0:
                u = relay.update(t, loop.theta)
                if u != loop.u:
                    loop.send_u(u)
            loop.record(t, lrec, rrec, "relay")
            ups = sum(1 for _, st in relay.switches if st > 0)
            if ups >= s.relay_cycles + 1 or loop.ticks > max_ticks:
                break
            t, lrec, rrec = loop.next_tick()
        writer.event(t, "relay_done", {"switches": len(relay.switches)})
        loop.send_u(0.0)
        # ---- analysis of the relay on the heading
        cycles = relay_cycles(np.array(loop.relay_t), np.array(loop.relay_theta),
                              np.array(loop.relay_u), centre=centre)[2:]
        if not cycles:
            raise AnalysisError("no complete relay cycle on the heading")
        # the heading is far from a sine under the square wave (an integrator after the inner
        # loops): the describing function on its first harmonic, not its peak-to-peak
        a1 = float(np.mean([c.amplitude_h1 for c in cycles]))
        ku = df_ultimate_gain(s.relay_amplitude, a1, s.relay_hysteresis)
        ku_pp, tu = df_estimate(cycles, s.relay_amplitude, s.relay_hysteresis)
        result.update(ultimate_gain=ku, ultimate_period=tu, ultimate_gain_pp=ku_pp,
                      cycles_used=len(cycles))
        say(f"heading: Ku {ku:.3g} (rad/s)/rad, Tu {tu:.3g} s (the model: "
            + (f"{expected[0]:.3g}, {expected[1]:.3g} s)" if expected else "none)"))
        # ---- the outer design with both inner closed loops in the model
        spec = design.DesignSpec(ms_target=s.ms_target, step_size=s.step_size,
                                 output_limit=s.output_limit, ts=h)
        res = design.design_proposals([design.Condition("heading", plant, ku, tu)], spec)
        chosen = res.get(res.default) if res.default else None
        result["proposals"] = [p.as_dict() for p in res.proposals]
        result["model"] = {"num": list(plant.num), "den": list(plant.den),
                           "delay": plant.delay}
        if chosen is None:
            raise HeadingStopped(res.note or "no outer design is safe")
        wc = gain_crossover(plant, chosen.gains, ts=h)
        sep: Separation = separation([t_l, t_r], wc if wc else math.inf)
        result["separation"] = sep.as_dict()
        if sep.warning:
            say(f"heading: warning: {sep.warning}")
            writer.event(t, "separation_warning", sep.as_dict())
        # ---- the outer confirmation step, on fresh samples
        loop.catch_up("design")
        result.update(_step(loop, chosen, s, h, writer))
        pred = chosen.predicted.get("overshoot", math.nan)
        meas = result["step"]["overshoot"]
        passed = bool(abs(meas - float(pred)) <= s.overshoot_tolerance)
        result["step"].update(predicted_overshoot=pred, passed=passed)
        outcome.exit_code = EXIT_OK if passed else EXIT_FAILED
        outcome.reason = "confirmed" if passed else "step_failed"
        outcome.message = (f"heading step: overshoot {meas:.1f} % (predicted "
                           f"{float(pred):.1f} %)")
    except HeadingStopped as exc:
        outcome.reason, outcome.message = "stopped", str(exc)
    except AnalysisError as exc:
        outcome.reason, outcome.message = "analysis_failed", str(exc)
    except LinkError as exc:
        outcome.exit_code, outcome.reason, outcome.message = EXIT_LINK, "link", str(exc)
    finally:
        confirmed = False
        with contextlib.suppress(Exception):
            if not link.lost:
                confirmed = link.stop(timeout=max(0.5, 1.0 / speed))  # every axis
        outcome.stop_confirmed = confirmed
        writer.end(outcome.reason, stop_confirmed=confirmed, message=outcome.message)
        writer.close()
        result.update(exit_code=outcome.exit_code, reason=outcome.reason,
                      message=outcome.message)
        outcome.result = result
        with contextlib.suppress(Exception):
            outcome.result_path = write_result(out_dir / "result.json", result)
    return outcome


def _step(loop: _Loop, chosen: design.Proposal, s: HeadingSettings, h: float,
          writer: SessionWriter) -> dict[str, Any]:
    """The outer step: the host's DiscretePid every host tick holds the heading reached for
    2 s (the relay's ringing dies out), then the heading setpoint goes up by step_size from
    the heading at that instant, for long enough to settle (3 predicted settling times)."""
    pid = DiscretePid(PidSettings(chosen.gains, h, 10.0, chosen.setpoint_weight, None,
                                  -s.output_limit, s.output_limit))
    settle = chosen.predicted.get("settling_time", math.nan)
    span = 3.0 * float(settle) if isinstance(settle, float) and math.isfinite(settle) else 10.0
    span = max(span, 3.0)
    t, lrec, rrec = loop.next_tick()
    theta0 = loop.theta
    loop.sp = theta0
    pid.reset(pv=theta0)
    t_step: float | None = None
    t_rest = t + 2.0
    ts_list, th_list, u_list = [], [], []
    while True:
        if (loop.ticks - 1) % s.host_ticks == 0:
            if t_step is None and t >= t_rest:
                theta0, t_step = loop.theta, t
                loop.sp = theta0 + s.step_size
                writer.event(t, "step_start", {"theta0": theta0, "step": s.step_size})
            u = pid.update(loop.sp, loop.theta)
            if u != loop.u:
                loop.send_u(u)
        loop.record(t, lrec, rrec, "step")
        if t_step is not None:
            ts_list.append(t)
            th_list.append(loop.theta)
            u_list.append(loop.u)
        if t_step is not None and t >= t_step + span:
            break
        t, lrec, rrec = loop.next_tick()
    m = step_metrics(np.array(ts_list), np.array(th_list), theta0, theta0 + s.step_size,
                     t_step=t_step)
    return {"step": {"theta0": theta0, "size": s.step_size, "t_step": t_step,
                     "overshoot": m.overshoot, "rise_time": m.rise_time,
                     "settling_time": m.settling_time, "gains": {
                         "kp": chosen.gains.kp, "ki": chosen.gains.ki, "kd": chosen.gains.kd,
                         "setpoint_weight": chosen.setpoint_weight, "name": chosen.name}}}
