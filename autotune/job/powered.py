"""Powered-run scaffolding shared by every verb that moves a motor (`tune`, `step`, the UI).

`PoweredRun` opens the port (or starts the simulated board for `sim`), shakes hands, shows the
cautions and asks for confirmation, streams samples, loads the safety limits into the device and
verifies them by read-back before any motion, feeds the device watchdog (heartbeat), watches the
abort keys, and owns the single stop path:

    with PoweredRun(cfg, options, writer_factory) as run:   # connect + cautions + confirm
        run.arm()                                           # stream, limits, read-back, guard
        while ...:
            s = run.next_sample("relay")                    # recorded, checked; raises RunEnded
            run.set_output(u)
    # __exit__: Stop at once, repeated until the device reports zero output; the reason is
    # recorded in the session's end record; `run.outcome` holds exit code and messages.

Any limit, fault, abort key, signal, exception or lost link ends in the same stop path. A stop
request from another thread (the key thread, a signal handler) sends Stop at once.

Time: phase durations use device time (sample timestamps). Wall-clock waits (sample timeouts,
heartbeat) are divided by `speed`, the factor the simulated board runs faster than real time
(1 for a real board).
"""

from __future__ import annotations

import contextlib
import math
import signal
import struct
import sys
import threading
import time
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from types import FrameType, TracebackType
from typing import Any, TextIO

from autotune import __version__
from autotune.cautions import CAUTION_ITEMS, CAUTION_TITLE
from autotune.config import Config, check_against_device
from autotune.core.progress import LimitGauge, LinkHealth, Phase, RunSnapshot
from autotune.core.safety import SafetyGuard, SafetyLimits
from autotune.core.supervise import LinkCounters, LinkQualityMonitor, ResetMonitor, Supervisor
from autotune.errors import (
    EXIT_ABORTED,
    EXIT_FAILED,
    EXIT_LINK,
    EXIT_OK,
    EXIT_UNSAFE,
    EXIT_USAGE,
    UserError,
)
from autotune.recorder import SessionWriter
from autotune.simdevice import SIM, SimDevice, start_sim_device
from protocol.budget import stream_decimation

CAUTIONS = (CAUTION_TITLE, *(f"  - {item}" for item in CAUTION_ITEMS))

CUT_POWER = (
    "THE DEVICE DID NOT CONFIRM ZERO OUTPUT. CUT THE MOTOR POWER NOW "
    "WITH THE PHYSICAL CUT-OFF."
)

RECENT_SECONDS = 5.0  # device seconds of samples kept for the snapshot
LINK_RETRIES = 6  # resends of an unanswered request: on a line that loses 40% of its frames
#                   seven attempts all fail one time in 600 (issue 8: the run goes on below
#                   the loss threshold)


class RunEnded(Exception):  # noqa: N818 (a control-flow signal, not an error)
    """Ends the powered part of a run: `reason` goes to the session end record.

    reason: "converged", "aborted", "limit:<which>", "fault:<which>", "precheck:<which>", ...
    message: one line for the operator; exit_code: what the process returns.
    """

    def __init__(self, reason: str, message: str = "", exit_code: int = EXIT_FAILED,
                 t: float | None = None) -> None:
        super().__init__(message or reason)
        self.reason = reason
        self.message = message or reason
        self.exit_code = exit_code
        self.t = t


@dataclass
class RunOptions:
    """How to run (from the command line).

    port: URL for serial.serial_for_url or "sim"; yes: no questions; out_dir: where
    session.jsonl / result.json go (None: nothing written); plant/faults/seed: for "sim";
    speed: how many times faster than the wall clock the device's time runs (the simulated
    board's --speed; 1 for a real board): host-side waits are divided by it;
    stdin: the stream to ask on and read abort keys from; verb: for messages and the header.
    """

    port: str
    yes: bool = False
    out_dir: Path | None = None
    plant: str = "cart-wheel"
    speed: float = 1.0
    faults: str | None = None
    seed: int | None = None
    stdin: Any = None
    stdout: TextIO | None = None
    verb: str = "tune"
    keys: bool = True  # watch abort keys when stdin is a terminal
    cautions_shown: bool = False  # a start screen shows the cautions before `confirm` asks


@dataclass
class StopOutcome:
    """What the stop path achieved: `confirmed` zero output (Stopped reply and a zero sample)."""

    confirmed: bool
    attempts: int
    message: str = ""
    t_zero: float | None = None  # device time of the first zero-output sample after the stop


@dataclass
class RunOutcome:
    """How a powered run ended (filled by the stop path)."""

    reason: str = "unknown"
    message: str = ""
    exit_code: int = EXIT_FAILED
    stop: StopOutcome | None = None
    error: BaseException | None = None


def float32(x: float) -> float:
    """`x` rounded to IEEE-754 single precision (what the wire carries)."""
    return struct.unpack("<f", struct.pack("<f", float(x)))[0]


@dataclass
class _StopRequest:
    reason: str
    message: str
    exit_code: int
    t: float | None


@dataclass
class RecentSamples:
    """The last RECENT_SECONDS of samples for the snapshot (device time, s)."""

    t: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    pv: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    sp: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    out: deque[float] = field(default_factory=lambda: deque(maxlen=2048))

    def add(self, t: float, pv: float, sp: float, out: float) -> None:
        self.t.append(t)
        self.pv.append(pv)
        self.sp.append(sp)
        self.out.append(out)
        while self.t and self.t[0] < t - RECENT_SECONDS:
            self.t.popleft()
            self.pv.popleft()
            self.sp.popleft()
            self.out.popleft()


class PoweredRun:
    """Connection, confirmation, limits, recording, supervision and the stop path of one run.

    cfg: validated configuration; options: see RunOptions; header_extra: more session header
    fields; on_update: receives a RunSnapshot at phase changes, events and about ten times a
    second; say: prints one line for the operator (default: to options.stdout).
    """

    def __init__(self, cfg: Config, options: RunOptions, *,
                 header_extra: dict[str, Any] | None = None,
                 on_update: Callable[[RunSnapshot], None] | None = None,
                 say: Callable[[str], None] | None = None,
                 confirm: Callable[[Any], None] | None = None) -> None:
        self.cfg = cfg
        self._confirm = confirm
        """Called with the device info after the handshake, before anything is powered: shows
        the cautions and raises UserError (EXIT_ABORTED) unless the operator confirms. None:
        the built-in line prompt (`confirm`), before the port is opened."""
        self.options = options
        self.axis = cfg.connection.axis
        self.header_extra = dict(header_extra or {})
        self.on_update = on_update
        self._stdout = options.stdout if options.stdout is not None else sys.stdout
        self._say = say or self._default_say
        self.sim: SimDevice | None = None
        self.link: Any = None
        self.info: Any = None
        self.speed = 1.0
        self.writer: SessionWriter | None = None
        self.guard: SafetyGuard | None = None
        self.limits_readback: dict[str, float] | None = None
        self.supervisor: Supervisor | None = None
        """Link quality, device reset and (once armed by the verb) no-response detectors."""
        self.pv_start: float | None = None
        self.t_start: float | None = None
        self.phase = Phase.CONNECT
        self.message = ""
        self.alarm: str | None = None
        self.loop_mode = "host"
        self.decimation = 1  # Stream decimation asked for at arm() (protocol.budget)
        self.armed = False
        self.powered = False
        self.outcome = RunOutcome()
        self.recent = RecentSamples()
        self.last_sample: Any = None
        self.last_output = 0.0  # last output the host commanded (host loop), output units
        self.sp_value = 0.0  # what the runner records as "sp" when the device reports none
        self.snapshot_extra: dict[str, Any] = {}
        self._stop_lock = threading.Lock()
        self._stop_req: _StopRequest | None = None
        self._stop_sent_at: float | None = None
        self._keys: Any = None
        self._old_signals: dict[int, Any] = {}
        self._last_publish = 0.0
        self._last_keepalive = 0.0
        self._sample_extra: dict[str, Any] = {}
        self.stale_faults: list[str] = []  # faults latched before this run, cleared at arm()
        self.sample_hook: Callable[[Any], dict[str, Any]] | None = None
        """Called with each sample record before it is written: extra keys for that sample."""

    # ------------------------------------------------------------------ output to the operator
    def _default_say(self, line: str) -> None:
        print(line, file=self._stdout, flush=True)

    def say(self, line: str) -> None:
        """One line for the operator."""
        self._say(line)

    # ------------------------------------------------------------------ timing
    def wall(self, device_seconds: float) -> float:
        """Wall-clock seconds that `device_seconds` of device time take (speed-scaled)."""
        return device_seconds / self.speed

    # ------------------------------------------------------------------ connection
    def __enter__(self) -> PoweredRun:
        try:
            if self._confirm is None:
                self.confirm()  # cautions first; nothing is opened before the operator agrees
                self.connect()
            else:
                self.connect()  # the handshake powers nothing; the start screen names the board
                self._confirm(self.info)
        except BaseException:
            self._teardown()
            raise
        return self

    def connect(self) -> Any:
        """Open the port (starting the simulated board for "sim") and shake hands."""
        from protocol.errors import LinkError
        from protocol.link import Link

        opts = self.options
        url = opts.port
        if url == SIM:
            self.sim = start_sim_device(opts.plant, speed=opts.speed, faults=opts.faults,
                                        seed=opts.seed)
            url = self.sim.url
        # a real board runs at speed 1; a simulated one started elsewhere runs at opts.speed
        self.speed = opts.speed
        self.url = url
        watchdog = self.cfg.safety.watchdog
        heartbeat = min(0.05, watchdog / 5.0) / self.speed
        # at high simulated speeds no faster than every 2 ms of wall clock while that still
        # feeds the watchdog five times per period (thousands of Pings a second only load the
        # host and the line)
        heartbeat = max(heartbeat, min(0.002, watchdog / 5.0 / self.speed))
        try:
            self.link = Link.open(url, baudrate=self.cfg.connection.baudrate,
                                  heartbeat_interval=heartbeat, retries=LINK_RETRIES)
            self.info = self.link.handshake()
        except LinkError as exc:
            raise UserError(f"{opts.port}: {exc}", exit_code=EXIT_LINK) from None
        info = self.info
        check_against_device(self.cfg, info.max_output, info.axis_count, info.tick)
        self.link.start_heartbeat()
        self.say(f"connected to {info.device_name or 'device'} (firmware {info.firmware}, "
                 f"tick {info.tick * 1000:g} ms, max output {info.max_output:g}) on {opts.port}")
        return info

    def confirm(self) -> None:
        """Print the cautions (unless a start screen showed them); ask unless --yes (refuse
        when there is nobody to ask)."""
        if not self.options.cautions_shown:
            for line in CAUTIONS:
                self.say(line)
        if self.options.yes:
            self.say("--yes given: going ahead without asking.")
            return
        stdin = self.options.stdin if self.options.stdin is not None else sys.stdin
        try:
            tty = stdin.isatty()
        except (AttributeError, ValueError):
            tty = False
        if not tty:
            raise UserError(
                "refusing to power the motor without confirmation: stdin is not a terminal; "
                "run it from a terminal, or pass --yes once the cautions above are met",
                exit_code=EXIT_USAGE,
            )
        self._stdout.write("Type 'yes' and Enter when all of the above holds: ")
        self._stdout.flush()
        answer = stdin.readline()
        if answer.strip().lower() not in ("yes", "y"):
            raise UserError("not confirmed; nothing was powered", exit_code=EXIT_ABORTED)

    # ------------------------------------------------------------------ arming
    def arm(self, phase_header: dict[str, Any] | None = None) -> None:
        """Stream on, measure the PV start value at zero output, load the limits and verify
        them by read-back, open the session file, start the key watcher and the guard."""
        first = self._load_limits()
        self.supervisor = Supervisor(
            LinkQualityMonitor(self.cfg.safety.max_frame_loss, self.cfg.safety.frame_loss_window),
            ResetMonitor(self.info.boot_id),
        )
        self._open_session(phase_header or {})
        self.armed = True
        self._start_abort_watch()
        for r in first:
            self._record(r, "connect")

    def halt(self, message: str) -> StopOutcome:
        """Stop the motor between stages and confirm zero output; the connection, the session
        and the heartbeat stay (the operator may take their time: nothing is powered).

        A pending stop request (an abort key, a host limit) is settled here: once zero output
        is confirmed the run may be armed again with `rearm`. Raises RunEnded when zero output
        is not confirmed: the job must end, and the stop path tells the operator to cut the
        power.
        """
        stop = self.stop_device()
        req = self._stop_req
        self.event("halted", message, confirmed=stop.confirmed, attempts=stop.attempts,
                   t_zero=stop.t_zero, after=None if req is None else req.reason)
        if not stop.confirmed:
            raise RunEnded("stop_unconfirmed", f"{message}: {stop.message}", EXIT_UNSAFE)
        with self._stop_lock:
            self._stop_req = None
        self.powered = False
        self.armed = False
        self.guard = None  # nothing powered: the next stage arms a new guard
        self.phase = Phase.DONE
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
        for rec in self.link.drain_samples():
            if rec.axis == self.axis:
                self.last_sample = rec
                self._record(rec, "waiting")
        first = self._load_limits()
        for r in first:
            self._record(r, "connect")
        self.armed = True
        self.snapshot_extra["stopped"] = False
        self.event("rearmed", {"pv_start": self.pv_start, "limits": self.limits_readback})

    def _load_limits(self) -> list[Any]:
        """Stream on, the PV start value from five samples at zero output (a fault latched
        before is cleared and said), the limits loaded around it and verified by read-back, a
        new host guard. Returns those samples. UserError when the board does not comply."""
        from protocol.errors import LinkError, NakError
        from protocol.messages import ClearFault, GetLimits, Limits, SetLimits, Stream

        s = self.cfg.safety
        link = self.link
        try:
            # device loop: every Nth sample, as the link's budget allows; host loop: every one
            self.decimation = stream_decimation(self.info.tick, self.cfg.connection.baudrate,
                                                self.loop_mode)
            link.request(Stream(self.axis, 1, self.decimation))
            first: list[Any] = []
            deadline = time.monotonic() + max(2.0, self.wall(1.0))
            while len(first) < 5:
                rec = link.next_sample(timeout=max(0.0, deadline - time.monotonic()))
                if rec is None:
                    raise UserError(f"{self.options.port}: the device sends no samples",
                                    exit_code=EXIT_LINK)
                if rec.axis == self.axis:
                    first.append(rec)
            if any(abs(r.output) > 0.0 for r in first):
                raise UserError("the device reports a non-zero output before the run started; "
                                "stop it and check the board", exit_code=EXIT_FAILED)
            # a fault latched before this run (e.g. the watchdog after an earlier host died):
            # the output is zero; clear it so that this run starts clean, and say so
            stale = [f.name for f in link.poll_faults()]
            if stale or any(r.fault_latched for r in first):
                link.request(ClearFault())
                self.stale_faults = stale or ["latched"]
                names = ", ".join(stale) or "unknown"
                self.say(f"the device had a fault latched from before ({names}); cleared it")
                first = [r for r in first if not r.fault_latched]
                while len(first) < 5:
                    rec = link.next_sample(timeout=max(0.5, self.wall(1.0)))
                    if rec is None:
                        raise UserError(f"{self.options.port}: the device sends no samples",
                                        exit_code=EXIT_LINK)
                    if rec.axis == self.axis and not rec.fault_latched:
                        first.append(rec)
            self.pv_start = sum(r.pv for r in first) / len(first)
            self.t_start = first[-1].t
            lim = SetLimits(self.axis, s.output_limit, self.pv_start - s.pv_window,
                            self.pv_start + s.pv_window, s.pv_rate_limit,
                            round(s.watchdog * 1000))
            link.request(lim)
            back = link.request(GetLimits(self.axis))
        except NakError as exc:
            raise UserError(f"the device refused the safety limits: {exc}",
                            exit_code=EXIT_FAILED) from None
        except LinkError as exc:
            raise UserError(f"{self.options.port}: {exc}", exit_code=EXIT_LINK) from None
        if not isinstance(back, Limits):
            raise UserError("the device did not report its limits back", exit_code=EXIT_FAILED)
        for name in ("output_limit", "pv_low", "pv_high", "pv_rate_limit"):
            if float32(getattr(lim, name)) != float32(getattr(back, name)):
                raise UserError(
                    f"the device reports {name} = {getattr(back, name):g}, not the "
                    f"{getattr(lim, name):g} sent; nothing was powered", exit_code=EXIT_FAILED)
        if back.watchdog_ms != lim.watchdog_ms:
            raise UserError(f"the device reports a watchdog of {back.watchdog_ms} ms, not the "
                            f"{lim.watchdog_ms} ms sent; nothing was powered",
                            exit_code=EXIT_FAILED)
        self.limits_readback = {
            "output_limit": back.output_limit, "pv_low": back.pv_low, "pv_high": back.pv_high,
            "pv_rate_limit": back.pv_rate_limit, "watchdog_ms": back.watchdog_ms,
        }
        self.guard = SafetyGuard(
            SafetyLimits(
                output_limit=s.output_limit,
                pv_window=s.pv_window,
                pv_rate_limit=s.pv_rate_limit or None,
                max_duration=s.max_duration,
                max_sample_gap=s.max_sample_gap,
            ),
            self.pv_start,
            self.t_start,
        )
        return first

    def _open_session(self, extra: dict[str, Any]) -> None:
        if self.options.out_dir is None:
            return
        info = self.info
        header: dict[str, Any] = {
            "verb": self.options.verb,
            "version_tool": __version__,
            "config": self.cfg.to_dict(),
            "config_source": self.cfg.source,
            "port": getattr(self, "url", self.options.port),  # the port opened (sim: its pty)
            "device": {
                "name": info.device_name, "firmware": info.firmware, "boot_id": info.boot_id,
                "axis_count": info.axis_count, "tick": info.tick,
                "capabilities": info.capabilities, "max_output": info.max_output,
                "has_host_loop": info.has_host_loop,
                "has_device_relay": info.has_device_relay,
                "has_device_pid": info.has_device_pid,
            },
            "limits": self.limits_readback,
            "pv_start": self.pv_start,
            "stale_faults_cleared": self.stale_faults,
            "axis": self.axis,
            "sign": self.cfg.connection.sign,
            "speed": self.speed,
            "stream_decimation": self.decimation,
        }
        if self.sim is not None:
            header["sim"] = {"plant": self.sim.plant, "speed": self.sim.speed,
                             "faults": self.options.faults}
        else:  # connection.plant names the simulated board's plant: none on another port
            header["config"]["connection"]["plant"] = None
        header.update(self.header_extra)
        header.update(extra)
        self.writer = SessionWriter(Path(self.options.out_dir) / "session.jsonl", header)

    def _start_abort_watch(self) -> None:
        if self.options.keys:
            from autotune.keys import AbortKeys

            self._keys = AbortKeys(lambda key: self.request_stop(
                "aborted", f"abort key ({key}) pressed", EXIT_ABORTED),
                stream=self.options.stdin)
            self._keys.start()
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
                with contextlib.suppress(ValueError, OSError):
                    self._old_signals[sig] = signal.signal(sig, self._on_signal)

    def _on_signal(self, signum: int, frame: FrameType | None) -> None:
        name = signal.Signals(signum).name
        self.request_stop("aborted", f"{name} received", EXIT_ABORTED)

    # ------------------------------------------------------------------ stop requests
    def request_stop(self, reason: str, message: str = "", exit_code: int = EXIT_FAILED,
                     t: float | None = None) -> None:
        """Ask the run to end (any thread). The first reason wins; Stop goes out at once."""
        with self._stop_lock:
            first = self._stop_req is None
            if first:
                if t is None and self.last_sample is not None:
                    t = self.last_sample.t
                self._stop_req = _StopRequest(reason, message or reason, exit_code, t)
        if self.link is not None and not self.link.lost:
            from protocol.messages import Stop

            with contextlib.suppress(Exception):
                self.link.send(Stop())
                self._stop_sent_at = time.monotonic()
        if first and self.writer is not None:
            self.writer.event(t, "stop_request", message or reason, reason=reason)

    @property
    def stop_requested(self) -> bool:
        return self._stop_req is not None

    def check_stop(self) -> None:
        """Raise RunEnded if a stop was requested (from any thread)."""
        req = self._stop_req
        if req is not None:
            raise RunEnded(req.reason, req.message, req.exit_code, req.t)

    # ------------------------------------------------------------------ samples
    def set_phase(self, phase: Phase, message: str = "") -> None:
        """Enter a phase: recorded as an event, published."""
        self.phase = phase
        self.message = message
        t = self.last_sample.t if self.last_sample is not None else None
        if self.writer is not None:
            self.writer.event(t, "phase", message, phase=phase.value)
        self.publish(force=True)

    def event(self, kind: str, detail: Any = None, **extra: Any) -> None:
        """Record an event at the last sample's device time and publish."""
        t = self.last_sample.t if self.last_sample is not None else None
        if self.writer is not None:
            self.writer.event(t, kind, detail, **extra)
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
        if self.writer is not None:
            extra = dict(self._sample_extra)
            if self.sample_hook is not None:
                extra.update(self.sample_hook(rec))
            self.writer.sample(rec.t, rec.pv, rec.output, sp, phase=phase, flags=rec.flags,
                               **extra)
        self.recent.add(rec.t, rec.pv, sp, rec.output)

    def next_sample(self, timeout: float | None = None, publish: bool = True) -> Any:
        """The next sample of this axis, recorded and checked.

        publish=False leaves the (throttled) snapshot to the caller, who may first want to
        answer the sample (host loop: the output must reach the device before its next tick).

        Raises RunEnded on a stop request, a device fault, a host limit violation, a lost
        link, a device reset, or when no sample arrives for `timeout` wall seconds (default:
        four sample gaps, speed-scaled, at least 0.5 s).
        """
        from protocol.errors import DeviceReset, LinkLost

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
            if rec.axis != self.axis:
                continue
            break
        self.last_sample = rec
        self._keepalive()
        self._record(rec, self.phase.value)
        if self.supervisor is not None:
            self._supervise(rec)
        # the host's own check first: when the device latched on the same sample, the host
        # limit names the cause (the device's Fault confirms it)
        if self.guard is not None:
            v = self.guard.check(rec.t, rec.pv, rec.output)
            if v is not None:
                self.request_stop(f"limit:{v.which}", v.message, EXIT_FAILED, rec.t)
                raise RunEnded(f"limit:{v.which}", v.message, EXIT_FAILED, rec.t)
        for f in self.link.poll_faults():
            raise RunEnded(f"fault:{f.name}", f"the device latched fault {f.name} "
                           f"(value {f.value:g}) at t = {f.t:.3f} s", EXIT_FAILED, f.t)
        if rec.fault_latched:
            raise RunEnded("fault:latched", "the device reports a latched fault", EXIT_FAILED,
                           rec.t)
        nak = self.link.last_nak
        if nak is not None:
            self.link.last_nak = None
            _, msg = nak
            from protocol.errors import NakError

            raise RunEnded("fault:refused", f"the device refused a command: "
                           f"{NakError(msg.acked_type, msg.code, msg.detail)}", EXIT_FAILED,
                           rec.t)
        self.check_stop()
        if publish:
            self.publish()
        return rec

    def _supervise(self, rec: Any) -> None:
        """Feed the supervisor (autotune.core.supervise); a fault it finds ends the run."""
        sup = self.supervisor
        assert sup is not None
        pong = self.link.last_pong
        f = sup.check_sample(rec.t, rec.pv, rec.output,
                             None if pong is None else getattr(pong, "boot_id", None))
        if f is None and sup.link_due(rec.t):
            f = sup.check_link(rec.t, LinkCounters.from_mapping(self.link.counters()))
        if f is not None:
            code = EXIT_FAILED if f.which == "no_response" else EXIT_LINK
            self.request_stop(f.reason, f.message, code, rec.t)
            raise RunEnded(f.reason, f.message, code, rec.t)

    def _keepalive(self) -> None:
        """Feed the device watchdog from the sample loop as well as from the heartbeat thread
        (a busy host may starve that thread): a fire-and-forget Ping at most every heartbeat
        interval."""
        from protocol.messages import Ping

        now = time.monotonic()
        if now - self._last_keepalive < self.link.heartbeat_interval:
            return
        self._last_keepalive = now
        with contextlib.suppress(Exception):
            self.link.send(Ping(0xFFFFFFFF, int(now * 1e6) & 0xFFFFFFFF))

    # ------------------------------------------------------------------ commands
    def set_output(self, u: float) -> None:
        """Host-loop output (fire-and-forget, applied at the device's next tick)."""
        from protocol.errors import LinkError
        from protocol.messages import SetOutput

        self.check_stop()
        try:
            self.link.send(SetOutput(self.axis, float(u)))
        except LinkError as exc:
            raise link_ended(exc) from None
        self.last_output = float(u)
        self._last_keepalive = time.monotonic()  # any frame feeds the watchdog
        self.powered = self.powered or u != 0.0

    def request(self, msg: Any) -> Any:
        """A request whose refusal or loss ends the run."""
        from protocol.errors import LinkError, NakError

        self.check_stop()
        try:
            return self.link.request(msg)
        except NakError as exc:
            raise RunEnded("fault:refused", f"the device refused: {exc}", EXIT_FAILED) \
                from None
        except LinkError as exc:
            raise link_ended(exc) from None

    # ------------------------------------------------------------------ snapshots
    def snapshot(self, **overrides: Any) -> RunSnapshot:
        """The current state for the screen."""
        info = self.info
        gauges: list[LimitGauge] = []
        if self.pv_start is not None and self.last_sample is not None:
            s = self.cfg.safety
            gauges.append(LimitGauge("pv_window", self.last_sample.pv - self.pv_start,
                                     s.pv_window))
            gauges.append(LimitGauge("output", self.last_sample.output, s.output_limit))
            if self.t_start is not None:
                gauges.append(LimitGauge("duration", self.last_sample.t - self.t_start,
                                         s.max_duration, "s"))
        health = LinkHealth()
        if self.link is not None:
            st = self.link.stats()
            health = LinkHealth(st.rtt_median, st.rtt_p99, st.frames_good, st.seq_gaps,
                                st.crc_errors)
        fields_: dict[str, Any] = dict(
            phase=self.phase,
            message=self.message,
            device=f"{info.device_name} {info.firmware}" if info is not None else "",
            axis=self.axis,
            loop_mode=self.loop_mode,
            t=tuple(self.recent.t),
            pv=tuple(self.recent.pv),
            sp=tuple(self.recent.sp),
            out=tuple(self.recent.out),
            limits=tuple(gauges),
            link=health,
            alarm=self.alarm,
        )
        fields_.update(self.snapshot_extra)
        fields_.update(overrides)
        return RunSnapshot(**fields_)

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
        """Send Stop until the device answers Stopped and a sample shows zero output.

        Samples that arrive meanwhile are recorded (phase "stopping"). Up to three rounds of
        one second each (wall clock; communication, not device time).
        """
        from protocol.messages import Stop

        link = self.link
        if link is None:
            return StopOutcome(True, 0, "not connected")
        if self.sim is not None and self.sim.process.poll() is not None:
            return StopOutcome(False, 0, "the simulated board exited")
        if not self.armed and not self.powered:
            # Nothing was ever powered; still make sure (harmless).
            ok = link.stop(timeout=0.5) if not link.lost else False
            return StopOutcome(ok or not link.lost, 1, "")
        attempts = 0
        stopped = False
        t_zero = None
        for attempts in range(1, 4):  # noqa: B007
            if link.lost:
                break
            with contextlib.suppress(Exception):
                link.send(Stop())
            stopped = link.stop(timeout=1.0)
            t_zero = self._await_zero_sample(stopped_first=stopped)
            if stopped and t_zero is None:
                # no samples: the board may have restarted (streaming off) or stopped
                # streaming; ask for samples again to see the output
                self._restream()
                t_zero = self._await_zero_sample(stopped_first=True)
            if stopped and t_zero is not None:
                return StopOutcome(True, attempts, "", t_zero)
        if link.lost:
            return StopOutcome(False, attempts, f"the link is lost ({link.lost_reason})")
        return StopOutcome(False, attempts, "the device did not report zero output")

    def _restream(self) -> None:
        """Stream on again (after a handshake when the board restarted); never raises."""
        from protocol.messages import Stream

        link = self.link
        with contextlib.suppress(Exception):
            if link.device_reset:
                link.handshake()
                if self.writer is not None:
                    self.writer.event(None, "device_restarted", "handshake again to confirm "
                                      "zero output")
            link.request(Stream(self.axis, 1, self.decimation), timeout=0.25, retries=1)

    def _await_zero_sample(self, stopped_first: bool) -> float | None:
        deadline = time.monotonic() + (0.5 if stopped_first else 0.1)
        self.phase = Phase.STOPPING
        while time.monotonic() < deadline:
            got = self.link.drain_samples()
            for i, rec in enumerate(got):
                if rec.axis != self.axis:
                    continue
                self.last_sample = rec
                self._record(rec, Phase.STOPPING.value)
                if rec.output == 0.0 and rec.mode == 0:
                    # keep recording what is already queued (the rest of this batch first,
                    # in order), then report
                    for r2 in got[i + 1:] + self.link.drain_samples():
                        if r2.axis == self.axis:
                            self._record(r2, Phase.STOPPING.value)
                    return rec.t
            if not got:
                time.sleep(0.002)
        return None

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> bool:
        """The single stop path: runs on every exit from the powered block."""
        out = self.outcome
        if isinstance(exc, RunEnded):
            out.reason, out.message, out.exit_code = exc.reason, exc.message, exc.exit_code
        elif exc is None:
            req = self._stop_req
            if req is not None:
                out.reason, out.message, out.exit_code = req.reason, req.message, req.exit_code
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
        # A stop request that raced a normal ending still wins.
        req = self._stop_req
        if req is not None and out.reason in ("completed", "converged"):
            out.reason, out.message, out.exit_code = req.reason, req.message, req.exit_code
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
        if not stop.confirmed:
            lost = self.link is not None and self.link.lost
            out.message = f"{out.message}; zero output NOT confirmed"
            self.alarm = CUT_POWER if not lost else (
                "THE LINK IS LOST: ZERO OUTPUT IS NOT CONFIRMED. THE DEVICE WATCHDOG SHOULD "
                f"STOP THE MOTOR WITHIN {self.cfg.safety.watchdog:g} S; IF IT STILL MOVES, "
                "CUT THE MOTOR POWER NOW.")
            self.alert(self.alarm)
            out.exit_code = EXIT_LINK if lost else EXIT_UNSAFE
        if self.writer is not None:
            t = self.last_sample.t if self.last_sample is not None else None
            self.writer.event(t, "stopped" if stop.confirmed else "stop_unconfirmed",
                              stop.message, attempts=stop.attempts, t_zero=stop.t_zero)
        self.phase = Phase.DONE
        self.message = out.message
        self.snapshot_extra["stopped"] = stop.confirmed
        self.publish(force=True)
        self._teardown(keep_writer=True)
        # RunEnded and KeyboardInterrupt are handled: the outcome holds them
        return isinstance(exc, (RunEnded, KeyboardInterrupt))

    def alert(self, text: str) -> None:
        """An unmistakable message: red on a terminal (rich), capitals everywhere."""
        try:
            from rich.console import Console

            Console(file=sys.stderr, highlight=False, soft_wrap=True).print(
                f"[bold red]{text}[/bold red]")
        except Exception:  # noqa: BLE001 (must reach the operator whatever happens)
            print(text, file=sys.stderr, flush=True)

    def end_session(self, **extra: Any) -> None:
        """Write the end record (reason from the outcome) and close the session file."""
        if self.writer is None:
            return
        out = self.outcome
        self.writer.end(out.reason, message=out.message, exit_code=out.exit_code,
                        stop_confirmed=None if out.stop is None else out.stop.confirmed,
                        **extra)
        self.writer.close()

    def _teardown(self, keep_writer: bool = False) -> None:
        if self._keys is not None:
            with contextlib.suppress(Exception):
                self._keys.stop()
            self._keys = None
        for sig, old in self._old_signals.items():
            with contextlib.suppress(Exception):
                signal.signal(sig, old)
        self._old_signals.clear()
        if self.link is not None:
            from protocol.messages import Stream

            if not self.link.lost:
                with contextlib.suppress(Exception):
                    self.link.request(Stream(self.axis, 0, 1), timeout=0.2, retries=0)
            with contextlib.suppress(Exception):
                self.link.close()
        if self.sim is not None:
            with contextlib.suppress(Exception):
                self.sim.close()
        if not keep_writer and self.writer is not None:
            self.end_session()


def link_ended(exc: BaseException) -> RunEnded:
    """The RunEnded for a link error met while commanding: a device reset (boot id changed)
    is `fault:device_reset`, anything else `fault:link_lost`."""
    from protocol.errors import DeviceReset

    if isinstance(exc, DeviceReset):
        return RunEnded("fault:device_reset", f"the device restarted: {exc}", EXIT_LINK)
    return RunEnded("fault:link_lost", f"the link is lost: {exc}", EXIT_LINK)


def is_finite(x: float | None) -> bool:
    """True for a finite float."""
    return x is not None and math.isfinite(x)
