"""The powered part of the confirmation step: `run_step` drives an armed PoweredRun.

The plan, the state machine, the figures and the verdict are pure (autotune.core.steptest,
autotune.core.verdict); this module only checks the setpoints against the board's limits,
sends the commands and feeds the samples to them.
"""

from __future__ import annotations

import dataclasses
import math
from collections import deque
from typing import Any

from autotune.core.pid import DiscretePid
from autotune.core.progress import Phase
from autotune.core.steptest import (
    RAISE_ROOM,
    StepCandidate,
    StepCommand,
    StepExperiment,
    StepOutcome,
    StepPhase,
    StepProgress,
    StepSettings,
    check_setpoints,
    finish_outcome,
    judge_outcome,
    largest_step,
)
from autotune.core.verdict import StepSpec
from autotune.errors import EXIT_FAILED
from autotune.job.powered import RunEnded
from protocol.messages import Mode, SetOffset, SetPid, SetSetpoint

__all__ = ["StepEnded", "explain_refusal", "run_step"]

START_SAMPLES = 5  # the start value is the mean of the last few samples (PV units)


class StepEnded(Exception):  # noqa: N818 (wraps the runner's RunEnded with the partial outcome)
    """Raised by `run_step` when the run stopped during the step: `.ended` is the runner's
    RunEnded (re-raise it so the stop path records it), `.outcome` the figures so far."""

    def __init__(self, ended: BaseException, outcome: StepOutcome) -> None:
        super().__init__(str(ended))
        self.ended = ended
        self.outcome = outcome


def _clamp(u: float, limit: float) -> float:
    return min(max(u, -limit), limit)


def explain_refusal(what: str, message: str, limits: dict[str, float] | None,
                    values: dict[str, float]) -> str:
    """One line saying in words why the board refused `what` (e.g. "the PID start"):
    the board's reply, the values sent and the limits it checks them against."""
    sent = ", ".join(f"{k} {v:.4g}" for k, v in values.items())
    checks = ""
    if limits:
        checks = (f"; the board allows outputs up to +/-{limits.get('output_limit', math.nan):g} "
                  f"and a PV between {limits.get('pv_low', math.nan):.4g} and "
                  f"{limits.get('pv_high', math.nan):.4g}")
    code = "OUT_OF_RANGE" if "OUT_OF_RANGE" in message else message
    return (f"the board refused {what} ({code}): a value sent was outside what it accepts "
            f"(sent {sent}{checks}); nothing else was changed")


def _start_value(run: Any) -> float:
    """Where the PV is now: the mean of the last few samples (the run's start value before any)."""
    recent = list(run.recent.pv)[-START_SAMPLES:]
    if recent:
        return float(sum(recent) / len(recent))
    if run.last_sample is not None:
        return float(run.last_sample.pv)
    return float(run.pv_start)


def run_step(
    run: Any,
    candidate: Any,
    settings: StepSettings,
    on_update: Any = None,
) -> StepOutcome:
    """Run one confirmation step on an armed autotune.job.powered.PoweredRun.

    `candidate`: a StepCandidate or anything with `.name`, `.gains` (PidGains) and `.predicted`
    (e.g. autotune.core.design.Proposal). `settings.plan` is the plan (build it with
    autotune.core.steptest.settings_from_config / plan_step).

    Start: from where the PV is (the mean of the last samples), with the output the loop is at
    (`settings.bias`, output units: the relay's balanced bias): the PID's integral is preset to
    it, so a loaded axis does not drop when the PID takes over (device loop: SetPid's bias
    field; host loop: the DiscretePid integral). With a setpoint weight b < 1 the preset also
    cancels the proportional term's kp (b - 1) r0 at rest. Before any command the start value,
    the stepped setpoint and the peak the spec allows are checked against the PV window loaded
    in the board; a step that does not fit is refused with a message saying what would
    (StepEnded, reason "step:out_of_range"), and a refusal by the board is explained in words.

    Then: hold at the start value until the PV is at rest (plan.rest), step, record for the
    plan's length, optionally the load test, return. A sustained oscillation stops the step
    early and the output is held at the value that held the PV at rest (loop open) until it is
    at rest again (end_reason "oscillating"; the verdict says "oscillating (period P s):
    detune"). A PV that never comes to rest before the step ends it (StepEnded, reason
    "step:not_at_rest", with what keeps it moving).

    When this returns, a device-loop PID keeps holding the start value (after an oscillation:
    the device holds the output, its PID gains zero); a host loop leaves the output at the
    rest output (nobody closes the loop any more). Call again with other gains (bias: the
    outcome's `rest_output`) or leave the `with` block promptly: the stop path zeroes the
    output.

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
    plan = settings.plan
    spec = settings.spec if settings.spec is not None else StepSpec()
    ts = settings.ts if settings.ts is not None else float(run.info.tick)
    pid_settings = settings.pid_settings(candidate.gains, ts)
    g = candidate.gains
    run.catch_up()  # the start value from where the PV is now, not from a backlog
    start = _start_value(run)
    # output units: the bias, plus what cancels kp (b - 1) start (the setpoint weight's term)
    preset = settings.bias + g.kp * (1.0 - settings.setpoint_weight) * start
    exp = StepExperiment(plan, start, bias=settings.bias, output_limit=settings.output_limit)
    outcome = StepOutcome(candidate, pid_settings, loop, plan, start)
    axis = run.axis
    if run.supervisor is not None:
        # closed loop from here: a steady output holding a steady PV is what settling looks like
        run.supervisor.disarm_response()
    run.loop_mode = loop
    run.set_phase(Phase.STEP, f"step {plan.size:+.4g} with {candidate.name} "
                  f"(kp {g.kp:.4g}, ki {g.ki:.4g}, kd {g.kd:.4g}), {loop} loop")
    run.event("step_start", {
        "proposal": candidate.name, "kp": g.kp, "ki": g.ki, "kd": g.kd,
        "setpoint_weight": settings.setpoint_weight, "loop": loop, "size": plan.size,
        "start_value": start, "bias": settings.bias, "integral_preset": preset, "ts": ts,
        "load_offset": plan.load_offset, "record": plan.timeout, "why": plan.why,
        "band": plan.label, "band_note": plan.band_note, "spec": spec.to_dict(),
        "rest": None if plan.rest is None else plan.rest.as_dict()})
    for line in plan.summary():
        run.say(line)

    def fail(reason: str, message: str) -> StepEnded:
        outcome.end_reason, outcome.message = reason, message
        return StepEnded(RunEnded(reason, message, EXIT_FAILED), outcome)

    # ------------------------------------------------------------ before power: the setpoints
    limits = run.limits_readback
    allowed, _ = spec.overshoot_limit(_num(candidate.predicted.get("overshoot")))
    if limits is not None:
        allow = allowed if allowed is not None else 0.0
        refusal = check_setpoints(start, plan.size, limits["pv_low"], limits["pv_high"], allow)
        if refusal is not None:
            raise fail("step:out_of_range", refusal)
        if plan.max_size is not None:  # a step raised for the noise must fit the board
            room = largest_step(start, plan.size, limits["pv_low"], limits["pv_high"], allow)
            plan = dataclasses.replace(plan, max_size=min(plan.max_size, RAISE_ROOM * room))
            exp = StepExperiment(plan, start, bias=settings.bias,
                                 output_limit=settings.output_limit)
            outcome.plan = plan
    if abs(plan.load_offset) > settings.output_limit:
        raise fail("step:out_of_range",
                   f"the load offset {plan.load_offset:g} is beyond the output limit "
                   f"+/-{settings.output_limit:g}: the board would refuse it")
    if abs(preset) > settings.output_limit:
        raise fail("step:out_of_range",
                   f"the output the loop is at ({settings.bias:g}, with the setpoint-weight "
                   f"preset {preset:g}) is beyond the output limit +/-{settings.output_limit:g}")

    def request(msg: Any, what: str, values: dict[str, float]) -> None:
        try:
            run.request(msg)
        except RunEnded as exc:
            if exc.reason != "fault:refused":
                raise
            raise RunEnded(exc.reason, explain_refusal(what, exc.message, limits, values),
                           exc.exit_code, exc.t) from None

    sp_cmd, off_cmd = start, 0.0
    off_applied = 0.0
    host_pid: DiscretePid | None = None
    held: float | None = None  # output held with the loop open (RECOVER)
    sent: float | None = None  # host loop: output + offset expected at the next sample
    sent_recent: deque[float] = deque(maxlen=32)  # host loop: outputs sent before engaged
    engaged = False  # host loop: a sample has shown an output the host sent
    run.sample_extra(step=StepPhase.HOLD.value, offset=0.0)
    run.sp_value = start
    last_report = -math.inf
    try:
        if loop == "device":
            request(SetPid(axis, g.kp, g.ki, g.kd, settings.setpoint_weight,
                           settings.deriv_filter_n, settings.tracking_time or 0.0,
                           start, preset), "the PID start", {"setpoint": start, "bias": preset})
            run.powered = True
        else:
            host_pid = DiscretePid(dataclasses.replace(pid_settings, bias=0.0))
            host_pid.reset(integral=preset)
        # the samples still queued predate the PID start (the host may have been busy): the
        # step judges only what came after it
        run.catch_up()
        while True:
            rec = run.next_sample()
            # what the loop had in effect at this sample; NaN while it was not running yet
            # (samples queued before SetPid, or before the host's first output arrived)
            if loop == "device":
                sp_applied = float(rec.setpoint) if rec.mode == Mode.PID else math.nan
            else:
                # a late host may send twice within a tick: any output sent counts
                engaged = engaged or any(abs(rec.output - u_) <= 1e-5 * max(1.0, abs(u_))
                                         for u_ in sent_recent)
                sp_applied = sp_cmd if engaged else math.nan
            outcome.t.append(rec.t)
            outcome.pv.append(rec.pv)
            outcome.out.append(rec.output)
            outcome.sp.append(sp_cmd if math.isnan(sp_applied) else sp_applied)
            u = None
            if host_pid is not None and held is None:
                if sent is not None and abs(rec.output - sent) > 1e-5 * max(1.0, abs(sent)):
                    outcome.late_outputs += 1  # the device applied an older output this tick
                u = host_pid.update(sp_cmd, rec.pv)
            cmd: StepCommand = exp.update(rec.t, rec.pv, sp_applied, off_applied, rec.output)
            for ev in cmd.events:
                run.event(f"step:{ev.kind}", ev.detail, step_phase=cmd.phase.value)
                if ev.kind in ("oscillating", "band", "not_at_rest", "step_raised"):
                    run.say(_say_event(ev.kind, ev.detail))
            if cmd.hold_output is not None and held is None:
                held = _clamp(cmd.hold_output, settings.output_limit)
                if loop == "device":
                    # the device's PID with zero gains holds its bias: the loop is open
                    request(SetPid(axis, 0.0, 0.0, 0.0, 1.0, settings.deriv_filter_n, 0.0,
                                   sp_cmd, held), "the held output", {"output": held})
                u = None
            if loop == "host" and held is not None:
                run.set_output(held)
            elif host_pid is not None and u is not None:
                run.set_output(u)
                sent = _clamp(u + off_applied, settings.output_limit)
                if not engaged:
                    sent_recent.append(sent)
            if cmd.setpoint != sp_cmd:
                sp_cmd = cmd.setpoint
                if loop == "device" and held is None:
                    request(SetSetpoint(axis, sp_cmd), "the setpoint", {"setpoint": sp_cmd})
                run.sp_value = sp_cmd
            if cmd.offset != off_cmd:
                off_cmd = cmd.offset
                request(SetOffset(axis, off_cmd), "the load offset", {"offset": off_cmd})
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
        if host_pid is not None and held is None:
            # Nobody computes the loop once this returns: hold the output that held the PV.
            run.set_output(exp.rest_output)
    except RunEnded as exc:
        outcome.end_reason = exc.reason
        outcome.message = exc.message
        finish_outcome(outcome, exp)
        judge_outcome(outcome, spec)
        raise StepEnded(exc, outcome) from None
    finish_outcome(outcome, exp)
    if exp.failure_kind == "not_at_rest":
        assert exp.failure is not None
        raise fail("step:not_at_rest", exp.failure)
    if exp.failure is not None:
        outcome.end_reason, outcome.message = exp.failure_kind or "failed", exp.failure
    elif exp.oscillation is not None:
        outcome.end_reason = "oscillating"
        outcome.message = str(exp.oscillation.get("cause", ""))
    judge_outcome(outcome, spec)
    run.event("step_done", {"settled": outcome.settled, "end_reason": outcome.end_reason,
                            "figures": None if outcome.metrics is None else
                            outcome.metrics.as_dict(),
                            "verdict": None if outcome.verdict is None else
                            outcome.verdict.to_dict()})
    return outcome


def _num(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def _say_event(kind: str, d: dict[str, Any]) -> str:
    if kind == "oscillating":
        return (f"oscillating (period {float(d['period']):.3g} s): {d.get('cause', '')}; "
                "the step is stopped and the output held until the PV is at rest")
    if kind == "band":
        return f"settling band: the {d.get('label')}: {d.get('note', '')}"
    if kind == "step_raised":
        return f"step raised from {d['from']:+.3g} to {d['to']:+.3g}: {d.get('why', '')}"
    return f"the PV is not at rest: {d.get('cause', '')}"
