"""Powered-run scaffolding shared by every verb that moves a motor (`tune`, `step`, the UI).

`PoweredRun` checks where it will write, shows the cautions and asks the front end to confirm
(the operator prompt lives in the front end: `RunOptions.confirm`), opens the port (or starts the
simulated board for `sim`), shakes hands, streams samples, loads the safety limits into the
device and verifies them by read-back before any motion (autotune.job.limits), checks every
sample as it arrives (autotune.job.checks), and owns the single stop path
(autotune.job.stop):

    with PoweredRun(cfg, options) as run:   # outputs checked, cautions, confirm, connect
        run.arm()                           # stream, limits, read-back, checks, session file
        while ...:
            s = run.next_sample("relay")    # recorded; raises RunEnded once a stop is due
            run.set_output(u)
    # __exit__: the stop sequence, then the alarm if zero output is not confirmed (through
    # `RunOptions.alarm`), then the recording; `run.outcome` holds exit code and messages.

Any limit, fault, abort key, signal, exception, lost link or failed recording ends in the same
stop path. A stop request from any thread sends Stop at once and puts the link in stop-only
mode: from then on nothing but Stop frames go out, so the device watchdog is no longer fed.
Recording is best effort throughout: a full disk never keeps the stop from running, and is
reported once the motor is confirmed stopped.

Time: phase durations use device time (sample timestamps). Wall-clock waits (sample timeouts,
heartbeat, the stop deadline) are divided by `speed`, the factor the simulated board runs faster
than real time (1 for a real board).
"""

from __future__ import annotations

import contextlib
import queue
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any

from autotune.cautions import CAUTION_ITEMS, CAUTION_TITLE
from autotune.config import Config, check_against_device
from autotune.core.progress import Phase, RunSnapshot
from autotune.core.safety import SafetyGuard, SafetyLimits
from autotune.core.supervise import LinkQualityMonitor, ResetMonitor, Supervisor
from autotune.errors import (
    EXIT_ABORTED,
    EXIT_FAILED,
    EXIT_LINK,
    EXIT_OK,
    EXIT_UNSAFE,
    EXIT_USAGE,
    UserError,
)
from autotune.job import signals
from autotune.job.checks import SampleChecks, StopCause
from autotune.job.header import session_header
from autotune.job.limits import float32, load_limits, start_samples
from autotune.job.recording import RECENT_SECONDS, RecentSamples, RunRecorder
from autotune.job.snapshot import run_snapshot
from autotune.job.stop import (
    CUT_POWER,
    StopSequence,
    settle_outcome,
    stop_deadline,
    stop_verdict,
)
from autotune.job.terms import (
    RunEnded,
    RunOptions,
    RunOutcome,
    StopOutcome,
    is_finite,
    link_ended,
)
from autotune.keys import AbortKeys
from autotune.recorder import SessionWriter, check_out_dir
from autotune.simdevice import SIM, SimDevice, start_sim_device
from protocol.budget import stream_decimation
from protocol.errors import DeviceReset, LinkError, LinkLost, NakError, StopOnly
from protocol.link import Link
from protocol.messages import Ping, SetOutput, Stop, Stream, type_name

__all__ = ["CAUTIONS", "CUT_POWER", "LINK_RETRIES", "RECENT_SECONDS", "PoweredRun",
           "RecentSamples", "RunEnded", "RunOptions", "RunOutcome", "StopCause", "StopOutcome",
           "float32", "is_finite", "link_ended"]

CAUTIONS = (CAUTION_TITLE, *(f"  - {item}" for item in CAUTION_ITEMS))

LINK_RETRIES = 6  # resends of an unanswered request: on a line that loses 40% of its frames
#                   seven attempts all fail one time in 600 (issue 8: the run goes on below
#                   the loss threshold)


@dataclass
class _StopRequest:
    reason: str
    message: str
    exit_code: int
    t: float | None
    event: dict[str, Any] | None = None  # the held stop_request record, amended on refining


def plain_alarm(text: str) -> None:
    """The alarm without a front end: the line on stderr."""
    print(text, file=sys.stderr, flush=True)


@dataclass
class Connection:
    """An open connection to a board: the link after the handshake, its device info, the URL
    opened, the simulated board's speed (1 for a real one) and the simulated board itself
    (None for a real one). A plan's loops share one (`RunOptions.connection`): each run uses
    it and leaves it open; `close` ends it."""

    link: Any
    info: Any
    url: str
    speed: float
    sim: SimDevice | None = None

    def close(self) -> None:
        """Close the link, then end the simulated board (never raises)."""
        with contextlib.suppress(Exception):
            self.link.close()
        if self.sim is not None:
            with contextlib.suppress(Exception):
                self.sim.close()


def open_connection(opts: RunOptions, baudrate: int, watchdog: float) -> Connection:
    """Open the port of `opts` (starting the simulated board for "sim") and shake hands; the
    heartbeat feeds a device watchdog of `watchdog` s (device time) five times a period.
    UserError (exit 4) when the port cannot be opened or the board does not answer."""
    url = opts.port
    sim = None
    if url == SIM:
        sim = start_sim_device(opts.plant, speed=opts.speed, faults=opts.faults, seed=opts.seed)
        url = sim.url
    # a real board runs at speed 1; a simulated one started elsewhere runs at opts.speed
    speed = opts.speed
    heartbeat = min(0.05, watchdog / 5.0) / speed
    # at high simulated speeds no faster than every 2 ms of wall clock while that still
    # feeds the watchdog five times per period (thousands of Pings a second only load the
    # host and the line)
    heartbeat = max(heartbeat, min(0.002, watchdog / 5.0 / speed))
    link = None
    try:
        link = Link.open(url, baudrate=baudrate, heartbeat_interval=heartbeat,
                         retries=LINK_RETRIES)
        info = link.handshake()
    except LinkError as exc:
        Connection(link, None, url, speed, sim).close()
        raise UserError(f"{opts.port}: {exc}", exit_code=EXIT_LINK) from None
    except BaseException:
        Connection(link, None, url, speed, sim).close()
        raise
    return Connection(link, info, url, speed, sim)


def duration_advice(speed: float) -> str:
    """What to do when the powered run outlasted safety.max_duration (s, device time); `speed`:
    how much faster than the wall clock the (simulated) board runs."""
    text = ": raise safety.max_duration in the configuration if this loop needs longer"
    if speed > 1.0:
        text += (f"; the simulated board runs {speed:g} times faster than the wall clock, so "
                 "the host's own work while the motor holds (analysis, design) takes that "
                 "many times as much device time: run at a lower --speed")
    return text


class PoweredRun:
    """Connection, confirmation, limits, recording, checks and the stop path of one run.

    cfg: validated configuration; options: see RunOptions; header_extra: more session header
    fields; on_update: receives a RunSnapshot at phase changes, events and about ten times a
    second; say: prints one line for the operator (default: to options.stdout).
    """

    def __init__(self, cfg: Config, options: RunOptions, *,
                 header_extra: dict[str, Any] | None = None,
                 on_update: Callable[[RunSnapshot], None] | None = None,
                 say: Callable[[str], None] | None = None) -> None:
        self.cfg = cfg
        self.options = options
        self.axis = cfg.connection.axis
        self.header_extra = dict(header_extra or {})
        self.on_update = on_update
        self._stdout = options.stdout if options.stdout is not None else sys.stdout
        self._say = say or self._default_say
        self.sim: SimDevice | None = None
        self.link: Any = None
        self.info: Any = None
        self.shared = False  # the connection is a plan's (RunOptions.connection): left open
        self.url = options.port
        self.speed = 1.0
        self.recording = RunRecorder()
        self.guard: SafetyGuard | None = None
        self.checks: SampleChecks | None = None
        self.limits_readback: dict[str, float] | None = None
        self.supervisor: Supervisor | None = None
        """Link quality, device reset and (once armed by the verb) no-response detectors."""
        self.pv_start: float | None = None
        self.t_start: float | None = None
        self.phase = Phase.CONNECT
        self.message = ""
        self.alarm: str | None = None
        self.loop_mode = "host"
        self.armed = False
        self.powered = False
        self.outcome = RunOutcome()
        self.recent = RecentSamples()
        self.last_sample: Any = None  # the last sample handed to the verb
        self.newest: Any = None  # the newest sample received (checked in the reader thread)
        self.last_output = 0.0  # last output the host commanded (host loop), output units
        self.sp_value = 0.0  # what the runner records as "sp" when the device reports none
        self.snapshot_extra: dict[str, Any] = {}
        self.stale_faults: list[str] = []  # faults latched before this run, cleared at arm()
        self.device_faults: list[Any] = []  # Fault reports polled during the run
        self.sample_hook: Callable[[Any], dict[str, Any]] | None = None
        """Called with each sample record before it is written: extra keys for that sample."""
        self._stop_lock = threading.Lock()
        self._stop_req: _StopRequest | None = None
        self._signalled: str | None = None  # a signal's name, set by the (lock-free) handler
        self._signal_queue: queue.SimpleQueue[str | None] = queue.SimpleQueue()
        self._phase_at_stop = Phase.CONNECT.value
        self._in_request: str | None = None
        self._keys: Any = None
        self._exits = contextlib.ExitStack()
        self._last_publish = 0.0
        self._last_keepalive = 0.0
        self._sample_extra: dict[str, Any] = {}
        self.decimation = 1  # Stream decimation asked for at arm() (protocol.budget)

    # ------------------------------------------------------------------ output to the operator
    def _default_say(self, line: str) -> None:
        print(line, file=self._stdout, flush=True)

    def say(self, line: str) -> None:
        """One line for the operator."""
        self._say(line)

    def raise_alarm(self, text: str) -> None:
        """Hand `text` to the front end's alarm (never raises: it must reach the operator)."""
        try:
            (self.options.alarm or plain_alarm)(text)
        except Exception:  # noqa: BLE001
            plain_alarm(text)

    @property
    def writer(self) -> SessionWriter | None:
        """The session file's writer (None until arm(), and when nothing is recorded)."""
        return self.recording.writer

    # ------------------------------------------------------------------ timing
    def wall(self, device_seconds: float) -> float:
        """Wall-clock seconds that `device_seconds` of device time take (speed-scaled)."""
        return device_seconds / self.speed

    # ------------------------------------------------------------------ connection
    def __enter__(self) -> PoweredRun:
        try:
            self._exits.enter_context(signals.routed())
            if self.options.out_dir is not None:
                check_out_dir(self.options.out_dir)  # before asking and before connecting
            # the handshake powers nothing: the front end's confirmation can name the board
            self.connect()
            self.confirm()
        except BaseException:
            self._teardown()
            raise
        return self

    def connect(self) -> Any:
        """Open the port (starting the simulated board for "sim") and shake hands, or take the
        connection `RunOptions.connection` holds; from then on a signal is a stop request."""
        opts = self.options
        conn = opts.connection
        self.shared = conn is not None
        if conn is None:
            conn = open_connection(opts, self.cfg.connection.baudrate, self.cfg.safety.watchdog)
        self.link, self.info, self.url, self.speed, self.sim = (
            conn.link, conn.info, conn.url, conn.speed, conn.sim)
        self._exits.enter_context(self._signal_watcher())
        self._exits.enter_context(signals.diverted(self._on_signal))
        info = self.info
        check_against_device(self.cfg, info.max_output, info.axis_count, info.tick)
        self.link.start_heartbeat()
        self.say(f"connected to {info.device_name or 'device'} (firmware {info.firmware}, "
                 f"tick {info.tick * 1000:g} ms, max output {info.max_output:g}) on {opts.port}")
        return info

    def confirm(self) -> None:
        """After the handshake, before anything is powered: print the cautions (unless a start
        screen shows them), then ask the front end (`RunOptions.confirm`, given the device
        info; it handles --yes itself), else go ahead on --yes, else refuse."""
        if not self.options.cautions_shown:
            for line in CAUTIONS:
                self.say(line)
        ask = self.options.confirm
        if ask is not None:
            if not ask(self.info):
                raise UserError("not confirmed; nothing was powered", exit_code=EXIT_ABORTED)
            return
        if self.options.yes:
            self.say("--yes given: going ahead without asking.")
            return
        raise UserError("refusing to power the motor without confirmation: nobody to ask; "
                        "pass --yes once the cautions above are met", exit_code=EXIT_USAGE)

    # ------------------------------------------------------------------ arming
    def arm(self, phase_header: dict[str, Any] | None = None) -> None:
        """Stream on, measure the PV start value at zero output, start the checks on every
        sample, load the limits and verify them by read-back, open the session file, start
        the key watcher."""
        first = self._load_limits()
        self._open_session(phase_header or {})
        self.armed = True
        self._start_abort_watch()
        self._start_checks(first, "connect")

    def _load_limits(self) -> list[Any]:
        """Stream on (every sample for a host loop, every Nth for a device loop as the link's
        budget allows), the PV start value from samples at zero output, a new guard, the
        limits loaded around the start value and read back. Returns those samples."""
        self.check_stop()
        s = self.cfg.safety
        link = self.link
        self.decimation = stream_decimation(self.info.tick, self.cfg.connection.baudrate,
                                            self.loop_mode)
        try:
            first, self.stale_faults = start_samples(
                link, self.axis, self.options.port, max(2.0, self.wall(1.0)), self.say,
                decimation=self.decimation)
            self.pv_start = sum(r.pv for r in first) / len(first)
            self.t_start = first[-1].t
            self.guard = SafetyGuard(
                SafetyLimits(output_limit=s.output_limit, pv_window=s.pv_window,
                             pv_rate_limit=s.pv_rate_limit or None,
                             max_duration=s.max_duration, max_sample_gap=s.max_sample_gap),
                self.pv_start, self.t_start)
            if self.supervisor is None:
                self.supervisor = Supervisor(
                    LinkQualityMonitor(s.max_frame_loss, s.frame_loss_window),
                    ResetMonitor(self.info.boot_id))
            self.limits_readback = load_limits(link, self.axis, s, self.pv_start)
        except NakError as exc:
            raise UserError(f"the device refused a command before the run: {exc}",
                            exit_code=EXIT_FAILED) from None
        except LinkError as exc:
            self.check_stop()  # a stop requested meanwhile (a signal) names the cause
            raise UserError(f"{self.options.port}: {exc}", exit_code=EXIT_LINK) from None
        return first

    def _start_checks(self, first: list[Any], phase: str) -> None:
        """From here on every sample is checked as it arrives; those queued before (at zero
        output, before any motion) are recorded with the first ones."""
        link = self.link
        assert self.guard is not None and self.supervisor is not None
        self.checks = SampleChecks(
            self.guard, self.supervisor, link.counters,
            lambda: getattr(link.last_pong, "boot_id", None))
        queued = [q for q in link.drain_samples() if q.axis == self.axis]
        link.set_sample_handler(self._on_sample)
        for r in first + queued:
            self._record(r, phase)
        if queued:
            self.last_sample = self.newest = queued[-1]

    def halt(self, message: str) -> StopOutcome:
        """Stop the motor between stages and confirm zero output; the connection, the session
        and the heartbeat stay (the operator may take their time: nothing is powered).

        A pending stop request (an abort key, a host limit) is settled here: once zero output
        is confirmed the run may be armed again with `rearm`. Raises RunEnded when zero output
        is not confirmed: the job must end, and the stop path tells the operator to cut the
        power.
        """
        if self._stop_req is None:
            with contextlib.suppress(Exception):
                self.link.enter_stop_only()  # only Stop from here: the watchdog may act
        stop = self.stop_device()
        req = self._stop_req
        self.recording.flush_held()
        self.event("halted", message, confirmed=stop.confirmed, attempts=stop.attempts,
                   t_zero=stop.t_zero, after=None if req is None else req.reason)
        if not stop.confirmed:
            raise RunEnded("stop_unconfirmed", f"{message}: {stop.message}", EXIT_UNSAFE)
        self.link.leave_stop_only()
        self.checks = None  # nothing powered: the next stage arms new checks
        with self._stop_lock:
            self._stop_req = None
        self.powered = False
        self.armed = False
        self.phase = Phase.WAITING
        self.snapshot_extra["stopped"] = True
        self.publish(force=True)
        return stop

    @contextlib.contextmanager
    def idle(self) -> Iterator[None]:
        """While halted (nothing powered) and the main thread waits for the operator: a thread
        keeps recording the samples (phase "waiting"), so the session shows what the axis did
        meanwhile (a loaded axis moves)."""
        done = threading.Event()

        def record() -> None:
            while not done.is_set():
                try:
                    rec = self.link.next_sample(timeout=0.1)
                except Exception:  # noqa: BLE001 (the next stage meets a lost link itself)
                    return
                if rec is not None and rec.axis == self.axis:
                    self.last_sample = rec
                    self._record(rec, "waiting")

        th = threading.Thread(target=record, name="idle-recorder", daemon=True)
        th.start()
        try:
            yield
        finally:
            done.set()
            th.join(timeout=2.0)

    def rearm(self) -> None:
        """Before powering again after `halt`: the samples that came meanwhile are recorded
        (phase "waiting"), the PV start value is measured again at zero output and the limits
        are loaded around it and read back (the PV window now centres on where the PV is)."""
        self.catch_up("waiting")
        first = self._load_limits()
        self.armed = True
        self._start_checks(first, "connect")
        self.snapshot_extra["stopped"] = False
        self.event("rearmed", {"pv_start": self.pv_start, "limits": self.limits_readback})

    def catch_up(self, phase: str | None = None) -> int:
        """Record every sample waiting in the link's queue (the checks have already run on
        them) without handing them to the caller, so that the next `next_sample` is one the
        device sent after the commands acknowledged so far. A stage that starts after the host
        was busy (a design computed, a file written) thus does not judge its first commands on
        samples older than them. `phase`: recorded phase (default: the current one). Returns
        the number of samples recorded."""
        n = 0
        for rec in self.link.drain_samples():
            if rec.axis == self.axis:
                self.last_sample = rec
                self._record(rec, phase if phase is not None else self.phase.value)
                n += 1
        return n

    def _open_session(self, extra: dict[str, Any]) -> None:
        if self.options.out_dir is None:
            return
        header = session_header(
            self.cfg, verb=self.options.verb, port=self.url, info=self.info,
            limits=self.limits_readback, pv_start=self.pv_start, t_start=self.t_start,
            stale_faults=self.stale_faults, speed=self.speed, sim=self.sim,
            faults=self.options.faults, stream_decimation=self.decimation,
            **self.header_extra, **extra)
        self.recording.writer = SessionWriter(Path(self.options.out_dir) / "session.jsonl",
                                              header, on_error=self._on_record_error)

    def _start_abort_watch(self) -> None:
        if self.options.keys:
            self._keys = AbortKeys(lambda key: self.request_stop(
                "aborted", f"abort key ({key}) pressed", EXIT_ABORTED),
                stream=self.options.stdin)
            self._keys.start()

    def _on_signal(self, name: str) -> bool:
        """A signal during the run (see autotune.job.signals): a stop request. False when a
        stop was already under way (the signal then ends the verb after the stop path).

        This runs in the signal handler, between two bytecodes of the main thread, which may
        hold any lock of the run, the link or the recorder at that moment: it takes none. It
        hands the request to the watcher thread (SimpleQueue.put is reentrant) and check_stop
        makes it in the main thread if that comes first."""
        if self._stop_req is not None or self._signalled is not None:
            return False
        self._signalled = name
        self._signal_queue.put(name)
        return True

    def _stop_for_signal(self) -> None:
        name = self._signalled
        if name is not None and self._stop_req is None:
            self.request_stop("aborted", f"{name} received; what was measured is kept",
                              EXIT_ABORTED)

    @contextlib.contextmanager
    def _signal_watcher(self) -> Iterator[None]:
        """A thread that makes the stop request for a signal (see _on_signal)."""

        def watch() -> None:
            while self._signal_queue.get() is not None:
                self._stop_for_signal()

        thread = threading.Thread(target=watch, name="autotune-signal-stop", daemon=True)
        thread.start()
        try:
            yield
        finally:
            self._signal_queue.put(None)
            thread.join(5.0)

    def _on_record_error(self, problem: str) -> None:
        self.request_stop("error:recording",
                          f"the session file could not be written: {problem}", EXIT_FAILED)

    # ------------------------------------------------------------------ the checks
    def _on_sample(self, rec: Any) -> None:
        """Every sample, as it arrives (the link's reader thread): the checks."""
        if rec.axis != self.axis:
            return
        self.newest = rec
        checks = self.checks
        if checks is None or self._stop_req is not None:
            return
        try:
            cause = checks.check(rec)
        except Exception as exc:  # noqa: BLE001 (a failed check must stop the run)
            cause = StopCause("error:checks", f"the host checks failed: {exc!r}", EXIT_FAILED,
                              rec.t)
        if cause is not None:
            message = cause.message
            if cause.reason == "limit:duration":
                message += duration_advice(self.speed)
            self.request_stop(cause.reason, message, cause.exit_code, cause.t)

    # ------------------------------------------------------------------ stop requests
    def request_stop(self, reason: str, message: str = "", exit_code: int = EXIT_FAILED,
                     t: float | None = None) -> None:
        """Ask the run to end (any thread). The first reason wins. Stop goes out at once and
        from then on nothing else does; the request is recorded afterwards, in time order
        (`t`: device time of the sample decided on; default: the newest sample)."""
        with self._stop_lock:
            first = self._stop_req is None
            if first:
                newest = self.newest if self.newest is not None else self.last_sample
                if t is None and newest is not None:
                    t = newest.t
                req = _StopRequest(reason, message or reason, exit_code, t)
                self._stop_req = req
                self._phase_at_stop = self.phase.value
        link = self.link
        if link is not None:
            with contextlib.suppress(Exception):
                link.enter_stop_only()
            if not link.lost:
                with contextlib.suppress(Exception):
                    link.send(Stop())
        if first:
            extra: dict[str, Any] = {"reason": reason}
            newest = self.newest
            if newest is not None and t is not None:
                extra["t_newest"] = newest.t  # the newest sample received when decided
                # the device time at the request: the newest sample's time plus the time
                # since it arrived (speed-scaled; its transit from the board not counted)
                extra["t_at_request"] = newest.t + max(
                    0.0, time.monotonic() - newest.received_at) * self.speed
            if self._in_request is not None:
                extra["during_request"] = self._in_request
            req.event = self.recording.hold_event(t, "stop_request", message or reason,
                                                  **extra)

    @property
    def stop_requested(self) -> bool:
        return self._stop_req is not None

    def _refine_cause(self) -> None:
        """A stop for "fault:latched" takes the fault's name once its report is in."""
        faults = [] if self.link is None else self.link.poll_faults()
        self.device_faults += faults
        req = self._stop_req
        if req is None or req.reason != "fault:latched" or not self.device_faults:
            return
        f = self.device_faults[0]
        req.reason = f"fault:{f.name}"
        req.message = f"the device latched fault {f.name} (value {f.value:g}) at t = {f.t:.3f} s"
        if req.event is not None:
            req.event.update(reason=req.reason, detail=req.message)

    def check_stop(self) -> None:
        """Raise RunEnded if a stop was requested (from any thread)."""
        if self._signalled is not None and self._stop_req is None:
            self._stop_for_signal()
        req = self._stop_req
        if req is not None:
            self._refine_cause()
            raise RunEnded(req.reason, req.message, req.exit_code, req.t)

    # ------------------------------------------------------------------ samples
    def set_phase(self, phase: Phase, message: str = "") -> None:
        """Enter a phase: recorded as an event, published."""
        self.phase = phase
        self.message = message
        t = self.last_sample.t if self.last_sample is not None else None
        self.recording.event(t, "phase", message, phase=phase.value)
        self.publish(force=True)

    def event(self, kind: str, detail: Any = None, **extra: Any) -> None:
        """Record an event at the last sample's device time and publish."""
        t = self.last_sample.t if self.last_sample is not None else None
        self.recording.event(t, kind, detail, **extra)
        self.publish(force=True)

    def sample_extra(self, **values: Any) -> None:
        """Extra keys recorded with every following sample (e.g. relay state)."""
        self._sample_extra.update(values)

    def clear_sample_extra(self) -> None:
        """Stop recording the extra keys set by sample_extra / sample_hook."""
        self._sample_extra.clear()
        self.sample_hook = None

    def _record(self, rec: Any, phase: str) -> None:
        sp = rec.setpoint if rec.mode == 2 or rec.mode == 3 else self.sp_value
        extra = dict(self._sample_extra)
        if self.sample_hook is not None:
            with contextlib.suppress(Exception):
                extra.update(self.sample_hook(rec))
        if self.recording.sample(rec.t, rec.pv, rec.output, sp, phase=phase, flags=rec.flags,
                                 **extra):
            self.recent.add(rec.t, rec.pv, sp, rec.output)

    def next_sample(self, timeout: float | None = None, publish: bool = True) -> Any:
        """The next sample of this axis, recorded (the checks ran on it as it arrived).

        publish=False leaves the (throttled) snapshot to the caller, who may first want to
        answer the sample (host loop: the output must reach the device before its next tick).

        Raises RunEnded on a stop request (a limit or fault the checks found, an abort key, a
        signal), a refused command, a lost link, a device reset, or when no sample arrives for
        `timeout` wall seconds (default: four sample gaps, speed-scaled, at least 0.5 s).
        """
        self.check_stop()
        wait = timeout if timeout is not None else max(
            0.5, self.wall(4 * self.cfg.safety.max_sample_gap))
        while True:
            try:
                rec = self.link.next_sample(timeout=wait)
            except DeviceReset as exc:
                raise RunEnded("fault:device_reset", f"the device restarted: {exc}",
                               EXIT_LINK) from None
            except LinkLost as exc:
                raise RunEnded("fault:link_lost", f"the link is lost: {exc}", EXIT_LINK) \
                    from None
            if rec is None:
                raise RunEnded("fault:no_samples",
                               f"no sample from the device for {wait:.2g} s", EXIT_LINK)
            if rec.axis == self.axis:
                break
        self.last_sample = rec
        self._keepalive()
        self._record(rec, self.phase.value)
        # the checks have seen this sample and any newer one: a cause they found names the
        # ending before a command the device refused for the same reason (a latched fault)
        self.check_stop()
        nak = self.link.last_nak
        if nak is not None:
            self.link.last_nak = None
            _, msg = nak
            raise RunEnded("fault:refused", f"the device refused a command: "
                           f"{NakError(msg.acked_type, msg.code, msg.detail)}", EXIT_FAILED,
                           rec.t)
        if publish:
            self.publish()
        return rec

    def _keepalive(self) -> None:
        """Feed the device watchdog from the sample loop as well as from the heartbeat thread
        (a busy host may starve that thread): a fire-and-forget Ping at most every heartbeat
        interval (refused by the link once a stop is under way)."""
        now = time.monotonic()
        if now - self._last_keepalive < self.link.heartbeat_interval:
            return
        self._last_keepalive = now
        with contextlib.suppress(Exception):
            self.link.send(Ping(0xFFFFFFFF, int(now * 1e6) & 0xFFFFFFFF))

    # ------------------------------------------------------------------ commands
    def set_output(self, u: float) -> None:
        """Host-loop output (fire-and-forget, applied at the device's next tick)."""
        self.check_stop()
        try:
            self.link.send(SetOutput(self.axis, float(u)))
        except StopOnly:
            self.check_stop()
            raise
        except LinkError as exc:
            raise link_ended(exc) from None
        self.last_output = float(u)
        self._last_keepalive = time.monotonic()  # any frame feeds the watchdog
        self.powered = self.powered or u != 0.0

    def request(self, msg: Any) -> Any:
        """A request whose refusal or loss ends the run. Resent (same sequence number) up to
        LINK_RETRIES times; a stop requested meanwhile ends the wait at once (the checks go on
        in the reader thread all the while)."""
        self.check_stop()
        link = self.link
        self._in_request = type_name(msg.TYPE)
        try:
            with link.begin(msg) as req:
                for _ in range(LINK_RETRIES + 1):
                    try:
                        req.send()
                    except StopOnly:
                        self.check_stop()
                        raise
                    until = time.monotonic() + link.reply_timeout
                    while not req.wait(min(0.02, max(0.0, until - time.monotonic()))):
                        self.check_stop()
                        if time.monotonic() >= until:
                            break
                    if req.done:
                        break
                return req.result()
        except NakError as exc:
            raise RunEnded("fault:refused", f"the device refused: {exc}", EXIT_FAILED) \
                from None
        except LinkError as exc:
            raise link_ended(exc) from None
        finally:
            self._in_request = None

    # ------------------------------------------------------------------ snapshots
    def snapshot(self, **overrides: Any) -> RunSnapshot:
        """The current state for the screen (see autotune.job.snapshot)."""
        return run_snapshot(self, **overrides)

    def publish(self, force: bool = False) -> None:
        """Hand a snapshot to on_update (at most ten a second unless forced)."""
        if self.on_update is None:
            return
        now = time.monotonic()
        if not force and now - self._last_publish < 0.1:
            return
        self._last_publish = now
        with contextlib.suppress(Exception):
            self.on_update(self.snapshot())

    # ------------------------------------------------------------------ the stop path
    def stop_device(self) -> StopOutcome:
        """The stop sequence (autotune.job.stop); never raises. Samples that arrive meanwhile
        are recorded (phase "stopping" from the stop request on)."""
        link = self.link
        if link is None:
            return StopOutcome(True, 0, "not connected")
        if self.sim is not None and self.sim.process.poll() is not None:
            return StopOutcome(False, 0, "the simulated board exited")
        if not self.armed and not self.powered:
            # Nothing was ever powered; still make sure (harmless).
            ok = link.stop(timeout=0.5) if not link.lost else False
            link.leave_stop_only()
            return StopOutcome(ok or not link.lost, 1, "", answered=ok)
        rtt = link.stats().rtt_p99 or link.reply_timeout
        s = self.cfg.safety
        req = self._stop_req
        seq = StopSequence(link, self.axis,
                           deadline=stop_deadline(rtt, self.info.tick, self.speed, s.watchdog),
                           record=self._record_stopping, restream=self._restream,
                           t_request=None if req is None else req.t)
        stop = seq.run()
        if stop.confirmed and stop.answered:
            link.leave_stop_only()
        return stop

    def _record_stopping(self, rec: Any) -> None:
        if rec.axis != self.axis:
            return
        req = self._stop_req
        before = req is not None and req.t is not None and rec.t <= req.t
        if not before:
            self.last_sample = rec
        self._record(rec, self._phase_at_stop if before else Phase.STOPPING.value)

    def _restream(self) -> None:
        """Stream on again (after a handshake when the board restarted); never raises."""
        link = self.link
        with contextlib.suppress(Exception):
            if link.device_reset:
                link.handshake()
                self.recording.event(None, "device_restarted",
                                     "handshake again to confirm zero output")
            link.request(Stream(self.axis, 1, self.decimation), timeout=0.25, retries=2)

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> bool:
        """The single stop path: runs on every exit from the powered block. The stop sequence
        and the alarm come first and run whatever else fails; recording is best effort."""
        out = self.outcome
        try:
            with contextlib.suppress(Exception):
                req = self._stop_req
                settle_outcome(out, exc, None if req is None else
                               (req.reason, req.message, req.exit_code))
            if self._stop_req is None:
                self.request_stop(out.reason, out.message, out.exit_code)
            self.phase = Phase.STOPPING
            self.message = "stopping the device"
            self.publish(force=True)
            try:
                stop = self.stop_device()
            except Exception as e:  # noqa: BLE001 (the stop path must finish)
                stop = StopOutcome(False, 0, f"stop failed: {e!r}")
            out.stop = stop
            with contextlib.suppress(Exception):
                self._refine_cause()
                req = self._stop_req
                if req is not None and out.reason == "fault:latched":
                    out.reason, out.message = req.reason, req.message
            self._alarm_if_needed(stop)
            self._record_stop(stop)
            self.phase = Phase.DONE
            self.message = out.message
            self.snapshot_extra["stopped"] = stop.confirmed
            self.publish(force=True)
        finally:
            self._teardown(keep_writer=True)
        # RunEnded and KeyboardInterrupt are handled: the outcome holds them
        return isinstance(exc, (RunEnded, KeyboardInterrupt))

    def _alarm_if_needed(self, stop: StopOutcome) -> None:
        out = self.outcome
        req = self._stop_req
        lost = self.link is not None and self.link.lost
        verdict = stop_verdict(stop, lost=lost, watchdog=self.cfg.safety.watchdog,
                               t_request=None if req is None else req.t)
        if verdict is not None:
            alarm, out.exit_code, note = verdict
            out.message = f"{out.message}; {note}"
            self.alarm = alarm
            self.raise_alarm(alarm)

    def _record_stop(self, stop: StopOutcome) -> None:
        """The stop's record (best effort), then a recording failure said, once the motor is
        known to be stopped."""
        out = self.outcome
        t = self.last_sample.t if self.last_sample is not None else None
        self.recording.flush_held()
        self.recording.event(t, "stopped" if stop.confirmed else "stop_unconfirmed",
                             stop.message, attempts=stop.attempts, t_zero=stop.t_zero,
                             answered=stop.answered, by_watchdog=stop.by_fault,
                             restarted=stop.restarted, seconds=round(stop.seconds, 4),
                             device_faults=[{"name": f.name, "value": f.value, "t": f.t}
                                            for f in self.device_faults])
        problem = self.recording.error
        if problem is None:
            return
        out.recording_error = problem
        state = ("the motor is stopped" if stop.confirmed and not stop.by_fault else
                 "see the alarm above")
        line = f"the session file could not be written: {problem}; {state}"
        if line not in out.message:
            out.message = line if out.reason == "error:recording" else f"{out.message}; {line}"
        if out.exit_code == EXIT_OK:
            out.exit_code = EXIT_FAILED
        self.say(line)

    def end_session(self, **extra: Any) -> None:
        """Write the end record (reason from the outcome) and close the session file (best
        effort: a failed write is in `outcome.recording_error`)."""
        writer = self.writer
        if writer is None:
            return
        out = self.outcome
        self.recording.flush_held()
        writer.end(out.reason, message=out.message, exit_code=out.exit_code,
                   stop_confirmed=None if out.stop is None else out.stop.confirmed,
                   **extra)
        writer.close()
        if writer.error is not None and out.recording_error is None:
            out.recording_error = writer.error

    def _teardown(self, keep_writer: bool = False) -> None:
        try:
            if self._keys is not None:
                with contextlib.suppress(Exception):
                    self._keys.stop()
                self._keys = None
            link = self.link
            if link is not None:
                with contextlib.suppress(Exception):
                    link.set_sample_handler(None)
                if not link.lost and not link.stop_only:
                    with contextlib.suppress(Exception):
                        link.request(Stream(self.axis, 0, 1), timeout=0.2, retries=0)
                if not self.shared:
                    with contextlib.suppress(Exception):
                        link.close()
                if self.recording.writer is not None:
                    # what came after the last stage read (the reader ran until the close, or
                    # the stream was turned off on a shared link): every sample received is
                    # in the session file
                    with contextlib.suppress(Exception):
                        self.catch_up(Phase.STOPPING.value if self.outcome.stop is not None
                                      else None)
        finally:
            if self.sim is not None and not self.shared:
                with contextlib.suppress(Exception):
                    self.sim.close()
            if not keep_writer:
                with contextlib.suppress(Exception):
                    self.end_session()
            self._exits.close()  # signal handlers back; a signal left over raises here
