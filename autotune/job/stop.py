"""The stop sequence: Stop sent and resent until the device confirms zero output, or the alarm.

Runs after the host has entered the link's stop-only mode (nothing but Stop frames go out, so
the device watchdog is no longer fed): one Stop request, resent with the same sequence number
(Stop is idempotent on the board) every `Link.resend_interval()` until the device answers
Stopped; zero output is confirmed by the samples: the run of zero-output idle samples that
reaches past the Stopped reply, or a sample showing a fault the device latched (its watchdog or
one of its limits: the output stays zero until the host clears it, which it never does during a
run). The deadline grows with the measured round-trip time and leaves the watchdog its period,
so a slow but healthy link is never taken for a dead device, and a device that ignores Stop is
seen zeroed by its own watchdog.

Times: the deadline and waits are wall-clock seconds (communication); `t_zero` is device time.
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable
from typing import Any

from autotune.errors import EXIT_ABORTED, EXIT_FAILED, EXIT_LINK, EXIT_OK, EXIT_UNSAFE, UserError
from autotune.job.terms import RunEnded, RunOutcome, StopOutcome
from protocol.errors import LinkError
from protocol.messages import Mode, Stop, Stopped

CUT_POWER = (
    "THE DEVICE DID NOT CONFIRM ZERO OUTPUT. CUT THE MOTOR POWER NOW "
    "WITH THE PHYSICAL CUT-OFF."
)


def link_lost_alarm(watchdog: float) -> str:
    """The alarm when the link is gone before zero output was confirmed (watchdog in s)."""
    return ("THE LINK IS LOST: ZERO OUTPUT IS NOT CONFIRMED. THE DEVICE WATCHDOG SHOULD STOP "
            f"THE MOTOR WITHIN {watchdog:g} S; IF IT STILL MOVES, CUT THE MOTOR POWER NOW.")


def ignored_stop_alarm(after: float | None) -> str:
    """The alarm when the device never answered Stop and only its own fault latch (the
    watchdog, once the host fell silent) zeroed the output `after` device seconds after the
    stop request."""
    when = "" if after is None else f" {after:.3g} S AFTER THE STOP REQUEST"
    return ("THE DEVICE IGNORED STOP: ITS OWN WATCHDOG ZEROED THE OUTPUT" + when + ". "
            "DO NOT POWER IT AGAIN UNTIL ITS STOP WORKS; IF THE MOTOR STILL MOVES, CUT THE "
            "MOTOR POWER NOW.")


def stop_deadline(rtt: float, tick: float, speed: float, watchdog: float) -> float:
    """Wall-clock seconds the stop sequence waits for zero output: one second, plus four
    round trips (rtt, s: the link's 99th percentile), plus the device watchdog and four ticks
    (device s, divided by `speed`, the simulated board's time factor)."""
    return 1.0 + 4.0 * rtt + (watchdog + 4.0 * tick) / speed


class StopSequence:
    """One run of the stop sequence on `link` for `axis`.

    record(rec): called with every sample that arrives meanwhile, in order (never raises);
    restream(): asks for samples again after a device restart (called at most once, after the
    Stopped reply when no sample comes; the link has left stop-only mode then); deadline: wall s
    (see stop_deadline); t_request: device time (s) of the stop request (samples before it
    confirm nothing).
    """

    def __init__(self, link: Any, axis: int, *, deadline: float,
                 record: Callable[[Any], None], restream: Callable[[], None],
                 t_request: float | None = None) -> None:
        self.link = link
        self.axis = axis
        self.deadline = deadline
        self.record = record
        self.restream = restream
        self.t_request = t_request

    def run(self) -> StopOutcome:
        link = self.link
        started = time.monotonic()
        give_up = started + self.deadline
        every = link.resend_interval()
        out = StopOutcome(False, 0)
        zero_run: float | None = None  # device time the current run of zero samples began
        stopped_at: float | None = None
        restreamed = False
        last_rx = started
        with link.begin(Stop(), check_reset=False) as req:
            next_send = started
            while not link.lost:
                now = time.monotonic()
                if not out.answered and now >= next_send:
                    with contextlib.suppress(LinkError):
                        req.send()
                        out.attempts += 1
                    next_send = now + every
                if not out.answered and isinstance(req.reply, Stopped):
                    out.answered = True
                    stopped_at = req.received_at
                for rec in link.drain_samples():
                    self.record(rec)
                    if rec.axis != self.axis:
                        continue
                    last_rx = rec.received_at
                    if self.t_request is not None and rec.t < self.t_request and not restreamed:
                        continue
                    zero = rec.output == 0.0 and rec.mode == Mode.IDLE
                    if not zero:
                        zero_run = None
                        continue
                    if zero_run is None:
                        zero_run = rec.t
                    after_reply = stopped_at is not None and rec.received_at >= stopped_at
                    if not out.confirmed and (rec.fault_latched or after_reply):
                        out.confirmed = True
                        out.t_zero = zero_run
                        out.restarted = restreamed
                if out.confirmed and out.answered:
                    break
                if (out.answered and not restreamed and stopped_at is not None
                        and now - max(stopped_at, last_rx) > max(0.2, 4 * every)):
                    # Stopped came, but no sample: the board restarted (streaming off) or
                    # stopped streaming; it is idle, so ask for samples again
                    restreamed = True
                    link.leave_stop_only()
                    self.restream()
                    zero_run = None
                if now >= give_up:
                    break
                with contextlib.suppress(LinkError):
                    req.wait(min(0.005, max(0.0, give_up - now)))
            if not out.answered and isinstance(req.reply, Stopped):
                out.answered = True
        # zero output without an answer to any Stop: only the device's own latch stopped it
        out.by_fault = out.confirmed and not out.answered
        out.seconds = time.monotonic() - started
        if link.lost:
            out.confirmed = False
            out.message = f"the link is lost ({link.lost_reason})"
        elif not out.confirmed:
            out.message = ("the device did not report zero output" if out.answered else
                           f"the device answered none of {out.attempts} Stop frames and did "
                           "not report zero output")
        elif out.by_fault:
            out.message = (f"the device answered none of {out.attempts} Stop frames; the fault "
                           "it latched (its watchdog) zeroed the output")
        return out


def settle_outcome(out: RunOutcome, exc: BaseException | None,
                   request: tuple[str, str, int] | None) -> None:
    """Fill `out` from how the powered block ended: `exc` (a RunEnded, a KeyboardInterrupt, a
    UserError, a bug, or None) and the first stop request (reason, message, exit code; it wins
    over a normal ending that raced it)."""
    if isinstance(exc, RunEnded):
        out.reason, out.message, out.exit_code = exc.reason, exc.message, exc.exit_code
    elif exc is None:
        if request is not None:
            out.reason, out.message, out.exit_code = request
        elif out.reason == "unknown":
            out.reason, out.exit_code = "completed", EXIT_OK
    elif isinstance(exc, KeyboardInterrupt):
        out.reason, out.message, out.exit_code = "aborted", "interrupted", EXIT_ABORTED
    elif isinstance(exc, UserError):
        out.reason, out.message, out.exit_code = "error", str(exc), exc.exit_code
        out.error = exc
    else:
        out.reason = f"error:{type(exc).__name__}"
        out.message = f"internal error: {exc!r}"
        out.exit_code = EXIT_FAILED
        out.error = exc
    if request is not None and out.reason in ("completed", "converged"):
        out.reason, out.message, out.exit_code = request


def stop_verdict(stop: StopOutcome, *, lost: bool, watchdog: float,
                 t_request: float | None) -> tuple[str, int, str] | None:
    """The alarm, the exit code and a note for the outcome's message when the stop did not
    end cleanly (None when it did): zero output not confirmed (the link lost: exit 4, else
    exit 5), or confirmed only by the device's own watchdog because Stop went unanswered
    (exit 5). watchdog in s; t_request the stop request's device time (s)."""
    if not stop.confirmed:
        if lost:
            return link_lost_alarm(watchdog), EXIT_LINK, "zero output NOT confirmed"
        return CUT_POWER, EXIT_UNSAFE, "zero output NOT confirmed"
    if stop.by_fault:
        after = (None if stop.t_zero is None or t_request is None or stop.restarted
                 else stop.t_zero - t_request)
        return (ignored_stop_alarm(after), EXIT_UNSAFE,
                "the device ignored Stop and its watchdog zeroed the output")
    return None
