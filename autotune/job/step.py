"""The powered part of the confirmation step: `run_step` drives an armed PoweredRun.

The plan, the state machine and the figures are pure (autotune.core.steptest); this module only
sends the commands and feeds the samples to them.
"""

from __future__ import annotations

import math
from typing import Any

from autotune.core.pid import DiscretePid
from autotune.core.progress import Phase
from autotune.core.steptest import (
    StepCandidate,
    StepExperiment,
    StepOutcome,
    StepPhase,
    StepProgress,
    StepSettings,
    finish_outcome,
    judge_outcome,
)
from autotune.job.powered import RunEnded
from protocol.messages import SetOffset, SetPid, SetSetpoint

__all__ = ["StepEnded", "run_step"]


class StepEnded(Exception):  # noqa: N818 (wraps the runner's RunEnded with the partial outcome)
    """Raised by `run_step` when the run stopped during the step: `.ended` is the runner's
    RunEnded (re-raise it so the stop path records it), `.outcome` the figures so far."""

    def __init__(self, ended: BaseException, outcome: StepOutcome) -> None:
        super().__init__(str(ended))
        self.ended = ended
        self.outcome = outcome



def _clamp(u: float, limit: float) -> float:
    return min(max(u, -limit), limit)


def run_step(
    run: Any,
    candidate: Any,
    settings: StepSettings,
    on_update: Any = None,
) -> StepOutcome:
    """Run one confirmation step on an armed autotune.job.powered.PoweredRun.

    `candidate`: a StepCandidate or anything with `.name`, `.gains` (PidGains) and `.predicted`
    (e.g. autotune.core.design.Proposal). The loop is closed at the PV start value (`run.pv_start`),
    held, stepped by `settings.plan.size`, optionally disturbed by an output offset, and brought
    back. When this returns, a device-loop PID keeps holding the start value; a host loop leaves
    the output at `settings.bias` (nobody closes the loop any more). Call again with other gains
    or leave the `with` block promptly: the stop path zeroes the output.

    Device loop: SetPid (starts the device PID at the start value), SetSetpoint at each change.
    Host loop: autotune.core.pid.DiscretePid computes the output for every sample, sent with
    SetOutput (the device applies it at its next tick). SetOffset drives the load test in both.
    With a setpoint weight b < 1 and a start value r0 != 0 the proportional term at rest would
    be kp (b - 1) r0: the loop starts bumplessly with kp (1 - b) r0 added once (device loop: to
    the SetPid bias; host loop: to the integral's initial state), so the step acts in deviation
    from the start value, as predicted.

    `on_update(StepProgress)` is called at every event and about ten times a second (device
    time). Returns the StepOutcome; raises StepEnded (carrying the runner's RunEnded and the
    partial outcome) when the run stops during the step: limit, fault, abort key, lost link.
    """
    if not isinstance(candidate, StepCandidate):
        candidate = StepCandidate(str(candidate.name), candidate.gains,
                                  dict(getattr(candidate, "predicted", {}) or {}))
    loop = settings.loop
    if loop not in ("device", "host"):
        raise ValueError(f"loop must be 'device' or 'host', got {loop!r}")
    ts = settings.ts if settings.ts is not None else float(run.info.tick)
    pid_settings = settings.pid_settings(candidate.gains, ts)
    start = float(run.pv_start if run.pv_start is not None else run.last_sample.pv)
    # output units: cancels kp (b - 1) start, the setpoint weight's term at rest
    bumpless = candidate.gains.kp * (1.0 - settings.setpoint_weight) * start
    exp = StepExperiment(settings.plan, start)
    outcome = StepOutcome(candidate, pid_settings, loop, settings.plan, start)
    g = candidate.gains
    axis = run.axis
    run.loop_mode = loop
    run.set_phase(Phase.STEP, f"step {settings.plan.size:+g} with {candidate.name} "
                  f"(kp {g.kp:.4g}, ki {g.ki:.4g}, kd {g.kd:.4g}), {loop} loop")
    run.event("step_start", {"proposal": candidate.name, "kp": g.kp, "ki": g.ki, "kd": g.kd,
                             "setpoint_weight": settings.setpoint_weight, "loop": loop, "size": settings.plan.size, "start_value": start,
                             "ts": ts, "load_offset": settings.plan.load_offset})
    sp_cmd, off_cmd = start, 0.0
    off_applied = 0.0
    host_pid: DiscretePid | None = None
    sent: float | None = None  # host loop: output + offset expected at the next sample
    run.sample_extra(step=StepPhase.HOLD.value, offset=0.0)
    run.sp_value = start
    last_report = -math.inf
    try:
        if loop == "device":
            run.request(SetPid(axis, g.kp, g.ki, g.kd, settings.setpoint_weight,
                               settings.deriv_filter_n, settings.tracking_time or 0.0,
                               start, settings.bias + bumpless))
            run.powered = True
        else:
            host_pid = DiscretePid(pid_settings)
            host_pid.reset(integral=bumpless)
        while True:
            rec = run.next_sample()
            if loop == "device":
                sp_applied = float(rec.setpoint) if rec.mode == 3 else sp_cmd
            else:
                sp_applied = sp_cmd
            outcome.t.append(rec.t)
            outcome.pv.append(rec.pv)
            outcome.out.append(rec.output)
            outcome.sp.append(sp_applied)
            u = None
            if host_pid is not None:
                if sent is not None and abs(rec.output - sent) > 1e-5 * max(1.0, abs(sent)):
                    outcome.late_outputs += 1  # the device applied an older output this tick
                u = host_pid.update(sp_cmd, rec.pv)
            cmd = exp.update(rec.t, rec.pv, sp_applied, off_applied)
            for ev in cmd.events:
                run.event(f"step:{ev.kind}", ev.detail, step_phase=cmd.phase.value)
            if host_pid is not None and u is not None:
                run.set_output(u)
                sent = _clamp(u + off_applied, settings.output_limit)
            if cmd.setpoint != sp_cmd:
                sp_cmd = cmd.setpoint
                if loop == "device":
                    run.request(SetSetpoint(axis, sp_cmd))
                run.sp_value = sp_cmd
            if cmd.offset != off_cmd:
                off_cmd = cmd.offset
                run.request(SetOffset(axis, off_cmd))
                off_applied = off_cmd
                if u is not None:
                    sent = _clamp(u + off_applied, settings.output_limit)
            run.sample_extra(step=cmd.phase.value, offset=off_cmd)
            if on_update is not None and (cmd.events or rec.t - last_report >= 0.1):
                last_report = rec.t
                on_update(StepProgress(cmd.phase, rec.t, rec.pv, sp_applied, rec.output,
                                       exp.elapsed(rec.t), cmd.events))
            if cmd.done:
                break
        if host_pid is not None:
            # Nobody computes the loop once this returns: hold the operating-point output.
            run.set_output(settings.bias)
    except RunEnded as exc:
        outcome.end_reason = exc.reason
        outcome.message = exc.message
        finish_outcome(outcome, exp)
        judge_outcome(outcome, settings.spec)
        raise StepEnded(exc, outcome) from None
    if exp.failure is not None:
        outcome.end_reason, outcome.message = "not_applied", exp.failure
    finish_outcome(outcome, exp)
    judge_outcome(outcome, settings.spec)
    run.event("step_done", {"settled": outcome.settled,
                            "figures": None if outcome.metrics is None else
                            outcome.metrics.as_dict()})
    return outcome
