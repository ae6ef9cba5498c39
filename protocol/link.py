"""`Link`: the host side of the wire protocol over any pyserial port.

A transport (reader thread, locked writes) plus the codec (FrameDecoder, messages): requests are
matched to replies by sequence number, with a timeout and retries; samples and faults arrive on
queues (or a sample handler runs in the reader thread); an optional heartbeat thread pings the
device on a fixed schedule (feeding its watchdog), records round-trip times and notices a device
reset (boot id change). A lost port surfaces as LinkLost from every call within about one read
timeout (0.05 s), never as a hang; a device that falls silent while the heartbeat runs surfaces
as LinkLost after ``silence_timeout``.

Times: ``received_at`` and round-trip times are host ``time.monotonic()`` seconds; sample and
fault times ``t`` are device seconds, unwrapped from the device's u32 microsecond clock.
"""

from __future__ import annotations

import contextlib
import errno as errno_mod
import math
import queue
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from types import TracebackType
from typing import Any

import serial

from protocol.errors import (
    DecodeError,
    DeviceReset,
    LinkError,
    LinkLost,
    LinkTimeout,
    NakError,
    NoResponse,
    PortBusy,
    PortNotFound,
    PortPermission,
    StopOnly,
    VersionMismatch,
)
from protocol.framing import FrameDecoder
from protocol.messages import (
    CAP_DEVICE_PID,
    CAP_DEVICE_RELAY,
    CAP_HOST_LOOP,
    CAP_STORE_GAINS,
    FLAG_FAULT,
    OLDER_VERSIONS,
    PROTOCOL_VERSION,
    RESPONSE_TYPES,
    UNSOLICITED_TYPES,
    Fault,
    FaultCode,
    Hello,
    HelloReply,
    Message,
    Mode,
    Nak,
    NakCode,
    Ping,
    Pong,
    Sample,
    Stop,
    Stopped,
    decode,
    encode,
    expected_reply,
    flags_mode,
    type_name,
)

READ_TIMEOUT = 0.05
"""Reader thread's read timeout, s: bounds how late it notices `close()`."""
WRITE_TIMEOUT = 1.0
"""A write blocked this long (s) means the port is gone."""
HB_PONG_WAIT = 1.0
"""How long a heartbeat Ping waits for its Pong (s) before it counts as unanswered."""
_WRAP = 1 << 32
_HALF = 1 << 31


class DeviceClock:
    """Unwraps the device's u32 microsecond counter into seconds (float) without wrap jumps.

    Successive timestamps are taken as the signed difference mod 2**32 from the previous one,
    so any sequence whose steps are shorter than 2**31 us (35.8 minutes) is unwrapped exactly.
    The first timestamp maps to ``us / 1e6``.
    """

    def __init__(self) -> None:
        self._last: int | None = None
        self._total = 0

    def reset(self) -> None:
        """Forget the history (after a device reset)."""
        self._last = None
        self._total = 0

    def unwrap(self, us: int) -> float:
        """Device time in seconds of the raw u32 microsecond timestamp ``us``."""
        us &= _WRAP - 1
        if self._last is None:
            self._total = us
        else:
            delta = (us - self._last) % _WRAP
            if delta >= _HALF:
                delta -= _WRAP
            self._total += delta
        self._last = us
        return self._total / 1e6


@dataclass(frozen=True)
class DeviceInfo:
    """What the device said about itself in its HelloReply."""

    protocol_version: int
    device_name: str
    firmware: str
    boot_id: int
    axis_count: int
    tick_us: int
    capabilities: int
    max_output: float  #: output units
    pv_resolution: float = 0.0  #: PV quantisation step the board declares, PV units; 0 = none

    @classmethod
    def from_reply(cls, reply: HelloReply) -> DeviceInfo:
        return cls(
            reply.protocol_version,
            reply.device_name,
            reply.firmware,
            reply.boot_id,
            reply.axis_count,
            reply.tick_us,
            reply.capabilities,
            reply.max_output,
            reply.pv_resolution,
        )

    @property
    def tick(self) -> float:
        """Device tick period, s."""
        return self.tick_us / 1e6

    @property
    def has_host_loop(self) -> bool:
        return bool(self.capabilities & CAP_HOST_LOOP)

    @property
    def has_device_relay(self) -> bool:
        return bool(self.capabilities & CAP_DEVICE_RELAY)

    @property
    def has_device_pid(self) -> bool:
        return bool(self.capabilities & CAP_DEVICE_PID)

    @property
    def has_store_gains(self) -> bool:
        return bool(self.capabilities & CAP_STORE_GAINS)


@dataclass(frozen=True)
class SampleRecord:
    """One Sample frame, with device time unwrapped.

    ``t`` device time, s; ``pv`` PV units; ``output`` applied output, output units;
    ``setpoint`` PV units; ``flags`` Sample.flags bits; ``received_at`` host
    ``time.monotonic()`` when its bytes were read, s; ``seq`` the frame's sequence number.
    """

    axis: int
    t: float
    pv: float
    output: float
    setpoint: float
    flags: int
    received_at: float
    seq: int = 0

    @property
    def mode(self) -> Mode:
        return flags_mode(self.flags)

    @property
    def fault_latched(self) -> bool:
        return bool(self.flags & FLAG_FAULT)


@dataclass(frozen=True)
class FaultRecord:
    """One Fault frame: ``code`` (FaultCode), ``axis``, ``value`` (see FaultCode), ``t`` device
    time, s, ``received_at`` host monotonic time, s."""

    code: int
    axis: int
    value: float
    t: float
    received_at: float

    @property
    def name(self) -> str:
        """Lower-case fault name (``"watchdog"``, ``"pv_window"``, ...)."""
        try:
            return FaultCode(self.code).name.lower()
        except ValueError:
            return f"code_{self.code}"


@dataclass(frozen=True)
class LinkStats:
    """Counters of a Link. Round-trip times in seconds (None before the first Pong)."""

    frames_good: int
    crc_errors: int
    framing_errors: int
    decode_errors: int
    seq_gaps: int  #: unsolicited frames (Sample, Fault) missing from the device's sequence
    frames_sent: int
    rtt_min: float | None
    rtt_median: float | None
    rtt_p99: float | None
    naks: int
    timeouts: int
    retries: int = 0
    unmatched: int = 0  #: good frames nobody expected (late replies, host-to-device types)
    samples_received: int = 0
    samples_dropped: int = 0  #: samples lost because the queue was full
    bytes_received: int = 0
    bytes_sent: int = 0
    rtt_count: int = 0
    handler_errors: int = 0

    @property
    def errors(self) -> int:
        """Frames rejected on reception (CRC, framing, undecodable)."""
        return self.crc_errors + self.framing_errors + self.decode_errors


def percentile(values: list[float], q: float) -> float:
    """Nearest-rank percentile (q in 0..100) of a non-empty list."""
    ordered = sorted(values)
    rank = max(1, min(len(ordered), -(-len(ordered) * q // 100)))
    return ordered[int(rank) - 1]


def _median(values: list[float]) -> float:
    ordered = sorted(values)
    n = len(ordered)
    mid = n // 2
    return ordered[mid] if n % 2 else 0.5 * (ordered[mid - 1] + ordered[mid])


def classify_open_error(url: str, exc: BaseException) -> LinkError:
    """Turn an exception from opening a port into a LinkError with an actionable message."""
    code = getattr(exc, "errno", None)
    text = str(exc)
    if code in (errno_mod.EACCES, errno_mod.EPERM) or "Permission denied" in text:
        return PortPermission(
            f"permission denied opening {url}: add your user to the 'dialout' group "
            "(sudo usermod -aG dialout $USER), then log out and in again"
        )
    if code in (errno_mod.EBUSY, errno_mod.EAGAIN) or "exclusively lock" in text or "busy" in text:
        return PortBusy(
            f"{url} is in use by another program (a serial terminal, another autotune?); "
            "close it and try again"
        )
    if code == errno_mod.ENOENT or "No such file" in text:
        return PortNotFound(f"no such port: {url} (`autotune ports` lists the serial ports)")
    if "refused" in text or "Name or service not known" in text or "timed out" in text:
        return PortNotFound(f"nothing to connect to at {url}: {text}")
    return LinkError(f"cannot open {url}: {text}")


def open_serial(url: str, baudrate: int = 115200) -> serial.SerialBase:
    """Open ``url`` with serial.serial_for_url (read timeout READ_TIMEOUT, write timeout
    WRITE_TIMEOUT, exclusive access); raise a LinkError subclass on failure."""
    try:
        return serial.serial_for_url(
            url,
            baudrate=baudrate,
            timeout=READ_TIMEOUT,
            write_timeout=WRITE_TIMEOUT,
            exclusive=True,
        )
    except ValueError as exc:
        raise PortNotFound(f"{url!r} is not a port pyserial can open: {exc}") from None
    except (serial.SerialException, OSError) as exc:
        raise classify_open_error(url, exc) from None


class _Waiter:
    __slots__ = ("event", "expected", "received_at", "reply")

    def __init__(self, expected: int) -> None:
        self.event = threading.Event()
        self.expected = expected
        self.reply: Message | None = None
        self.received_at = 0.0


class PendingRequest:
    """One request in flight (from `Link.begin`): one frame, one sequence number for every
    resend, so a reply to any of the sends matches, however late it comes.

    ``send()`` writes the frame (again); ``wait(timeout)`` waits up to ``timeout`` s for the
    reply; ``result()`` returns it (raises NakError for a Nak, LinkTimeout when none came);
    ``close()`` stops listening (also as a context manager). Host monotonic seconds.
    """

    def __init__(self, link: Link, msg: Message, check_reset: bool = True) -> None:
        self.link = link
        self.msg = msg
        self.check_reset = check_reset
        self.seq = link._next_seq()
        self.sends = 0
        self.sent_at = 0.0  #: host time of the last send, s
        self._frame = encode(msg, self.seq)
        self._waiter = _Waiter(expected_reply(msg.TYPE))
        with link._pending_lock:
            link._pending[self.seq] = self._waiter

    @property
    def done(self) -> bool:
        """True once the reply (or the link's loss) arrived."""
        return self._waiter.event.is_set()

    @property
    def reply(self) -> Message | None:
        return self._waiter.reply

    @property
    def received_at(self) -> float:
        return self._waiter.received_at

    def send(self) -> float:
        """Write the frame (a resend after the first: counted in ``retries``); returns the host
        time it went out. Raises LinkLost, DeviceReset, StopOnly."""
        link = self.link
        link._raise_if_dead(self.check_reset)
        if self.sends:
            with link._pending_lock:
                link._counts["retries"] += 1
        self.sent_at = link._write(self._frame, self.msg.TYPE)
        self.sends += 1
        return self.sent_at

    def wait(self, timeout: float) -> bool:
        """Wait up to ``timeout`` s for the reply; True when it is there. Raises LinkLost and
        DeviceReset (checked at least every 0.1 s)."""
        deadline = time.monotonic() + max(0.0, timeout)
        while not self._waiter.event.is_set():
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                break
            self._waiter.event.wait(min(remaining, 0.1))
            self.link._raise_if_dead(self.check_reset)
        self.link._raise_if_dead(self.check_reset)
        return self._waiter.reply is not None

    def result(self) -> Message:
        """The reply; NakError for a Nak, LinkTimeout when none came (counted)."""
        self.link._raise_if_dead(self.check_reset)
        reply = self._waiter.reply
        if reply is None:
            with self.link._pending_lock:
                self.link._counts["timeouts"] += 1
            n = max(1, self.sends)
            raise LinkTimeout(f"no reply to {type_name(self.msg.TYPE)} from {self.link.url} "
                              f"({n} attempt{'s' if n > 1 else ''})")
        if isinstance(reply, Nak):
            raise NakError(reply.acked_type, reply.code, reply.detail)
        return reply

    def close(self) -> None:
        with self.link._pending_lock:
            self.link._pending.pop(self.seq, None)

    def __enter__(self) -> PendingRequest:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


_LOST = object()
_WAKE = object()  # wakes a reader of the sample queue (a device reset was noticed)


class Link:
    """Host end of the protocol over ``serial.serial_for_url(url)``.

    ``reply_timeout`` s per attempt, ``retries`` extra attempts (same sequence number: every
    request is idempotent), ``heartbeat_interval`` s between Pings once ``start_heartbeat()``
    ran, ``silence_timeout`` s without any frame while the heartbeat runs -> LinkLost
    (None: never). ``port`` lets a caller pass an already open pyserial object instead of a URL.
    Writes are thread-safe; reading is done by the Link's own thread.
    """

    def __init__(
        self,
        url: str,
        *,
        baudrate: int = 115200,
        reply_timeout: float = 0.25,
        retries: int = 2,
        heartbeat_interval: float = 0.05,
        silence_timeout: float | None = 1.0,
        sample_queue_size: int = 1 << 16,
        port: serial.SerialBase | None = None,
    ) -> None:
        self.url = url
        self.reply_timeout = reply_timeout
        self.retries = retries
        self.heartbeat_interval = heartbeat_interval
        self.silence_timeout = silence_timeout
        self._ser = port if port is not None else open_serial(url, baudrate)
        self.baudrate = baudrate
        self.samples: queue.Queue[Any] = queue.Queue(maxsize=sample_queue_size)
        self.faults: queue.Queue[FaultRecord] = queue.Queue()
        self.device_info: DeviceInfo | None = None
        self.device_reset = False
        self.last_nak: tuple[int, Nak] | None = None  #: (seq, Nak) of a fire-and-forget send
        self.last_pong: Pong | None = None
        self.handler_error: BaseException | None = None  #: last exception of the sample handler
        self._clock = DeviceClock()
        self._decoder = FrameDecoder()
        self._write_lock = threading.Lock()
        self._seq_lock = threading.Lock()
        self._seq = 0
        self._pending: dict[int, _Waiter] = {}
        self._hb_pings: dict[int, float] = {}  # heartbeat Ping seq -> host time sent, s
        self._pending_lock = threading.Lock()
        self._lost: str | None = None
        self._stop_only = False
        self._closing = False
        self._last_rx = time.monotonic()
        self._last_unsolicited: int | None = None
        self._boot_id: int | None = None
        self._rtts: deque[float] = deque(maxlen=4096)
        self._counts = dict.fromkeys(
            (
                "decode_errors", "seq_gaps", "frames_sent", "naks", "timeouts", "retries",
                "unmatched", "samples_received", "samples_dropped", "bytes_sent",
                "handler_errors",
            ),
            0,
        )
        self._sample_handler: Callable[[SampleRecord], None] | None = None
        self._hb_thread: threading.Thread | None = None
        self._hb_stop = threading.Event()
        self._reader = threading.Thread(target=self._read_loop, name=f"link-reader {url}", daemon=True)
        self._reader.start()

    # ------------------------------------------------------------------ construction

    @classmethod
    def open(cls, url: str, **kwargs: Any) -> Link:
        """Open ``url`` (device path, socket://, rfc2217://, loop://); raises PortNotFound,
        PortBusy, PortPermission or LinkError with a message meant for the user."""
        return cls(url, **kwargs)

    def __enter__(self) -> Link:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    @property
    def lost(self) -> bool:
        """True once the port is gone."""
        return self._lost is not None

    @property
    def lost_reason(self) -> str | None:
        return self._lost

    # ------------------------------------------------------------------ public API

    def handshake(self, timeout: float | None = None, retries: int | None = None) -> DeviceInfo:
        """Hello/HelloReply; returns DeviceInfo. Raises NoResponse when nothing answers,
        VersionMismatch when the device speaks another protocol version. Clears a
        DeviceReset condition (the new boot id becomes the reference)."""
        version = PROTOCOL_VERSION
        while True:
            try:
                reply, _, _ = self._transact(
                    Hello(version),
                    timeout if timeout is not None else self.reply_timeout,
                    retries if retries is not None else max(self.retries, 3),
                    check_reset=False,
                )
                break
            except NakError as exc:
                if exc.code != NakCode.BAD_VERSION:
                    raise
                theirs = int(exc.detail) if math.isfinite(exc.detail) else -1
                if version == PROTOCOL_VERSION and theirs in OLDER_VERSIONS:
                    version = theirs  # an older board: speak its version (SPEC.md 9)
                    continue
                raise VersionMismatch(PROTOCOL_VERSION, theirs) from None
            except NoResponse:
                raise
            except LinkTimeout:
                raise NoResponse(
                    f"nothing answered on {self.url}: check that the board is powered and connected, "
                    f"runs firmware speaking this protocol, and uses {self.baudrate} baud"
                ) from None
        assert isinstance(reply, HelloReply)
        if reply.protocol_version != version:
            raise VersionMismatch(PROTOCOL_VERSION, reply.protocol_version)
        info = DeviceInfo.from_reply(reply)
        if self._boot_id is not None and self._boot_id != info.boot_id:
            self._clock.reset()
        self._boot_id = info.boot_id
        self.device_reset = False
        self.device_info = info
        return info

    def request(
        self, msg: Message, timeout: float | None = None, retries: int | None = None
    ) -> Message:
        """Send ``msg`` and return its reply (Ack, Pong, Limits, Stopped, HelloReply).

        Raises NakError (device refused), LinkTimeout (no reply after 1 + retries attempts of
        ``timeout`` s each), LinkLost, DeviceReset.
        """
        reply, _, _ = self._transact(
            msg,
            self.reply_timeout if timeout is None else timeout,
            self.retries if retries is None else retries,
        )
        return reply

    def begin(self, msg: Message, check_reset: bool = True) -> PendingRequest:
        """Register ``msg`` as a request in flight without sending it yet: call ``send()`` on
        the result (and again to retry, same sequence number), then ``wait``/``result``, and
        ``close()`` it. For callers that must go on with other work while a reply is due."""
        return PendingRequest(self, msg, check_reset)

    def send(self, msg: Message) -> int:
        """Send ``msg`` without waiting for its reply; returns its sequence number.

        A Nak to it is counted and kept in ``last_nak``. Raises LinkLost, DeviceReset, StopOnly.
        """
        self._raise_if_dead()
        seq = self._next_seq()
        self._write(encode(msg, seq), msg.TYPE)
        return seq

    @property
    def stop_only(self) -> bool:
        """True while only Stop frames may go out (see enter_stop_only)."""
        return self._stop_only

    def enter_stop_only(self) -> None:
        """From now on write nothing but Stop frames: every other send (the heartbeat's Pings
        included) is refused with StopOnly, so the host no longer feeds the device watchdog
        and a device that ignores Stop is zeroed by its own watchdog. Takes effect for every
        frame not yet started (under the write lock)."""
        with self._write_lock:
            self._stop_only = True

    def leave_stop_only(self) -> None:
        """Allow every frame again (once the device has confirmed zero output)."""
        with self._write_lock:
            self._stop_only = False

    def ping(self, timeout: float | None = None) -> float:
        """One Ping/Pong round trip; returns the round-trip time, s (also recorded in stats)."""
        host_us = int(time.monotonic() * 1e6) & (_WRAP - 1)
        reply, sent_at, received_at = self._transact(
            Ping(self._seq & 0xFFFF, host_us),
            self.reply_timeout if timeout is None else timeout,
            0,
        )
        assert isinstance(reply, Pong)
        rtt = received_at - sent_at
        self._rtts.append(rtt)
        self._note_pong(reply)
        return rtt

    def next_sample(self, timeout: float | None = None) -> SampleRecord | None:
        """Next sample from the queue, waiting up to ``timeout`` s (None: forever); None on
        timeout. Samples already queued are delivered before LinkLost is raised."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            if self.device_reset:
                raise DeviceReset(
                    "the device restarted (boot id changed): its state and limits are gone"
                )
            wait = 0.1 if deadline is None else min(0.1, deadline - time.monotonic())
            try:
                item = self.samples.get(timeout=max(0.0, wait)) if wait > 0 else self.samples.get_nowait()
            except queue.Empty:
                if self._lost is not None:
                    raise LinkLost(self._lost) from None
                if deadline is not None and time.monotonic() >= deadline:
                    return None
                continue
            if item is _LOST:
                raise LinkLost(self._lost or "link lost")
            if item is _WAKE:
                continue  # the reset check at the top of the loop
            return item

    def drain_samples(self) -> list[SampleRecord]:
        """All samples queued right now (never blocks, never raises)."""
        out: list[SampleRecord] = []
        while True:
            try:
                item = self.samples.get_nowait()
            except queue.Empty:
                return out
            if item is _LOST:
                self.samples.put_nowait(_LOST)
                return out
            if item is not _WAKE:
                out.append(item)

    def poll_faults(self) -> list[FaultRecord]:
        """All Fault reports received and not yet polled."""
        out: list[FaultRecord] = []
        while True:
            try:
                out.append(self.faults.get_nowait())
            except queue.Empty:
                return out

    def set_sample_handler(self, handler: Callable[[SampleRecord], None] | None) -> None:
        """Call ``handler(record)`` in the reader thread for every sample, before it is queued
        (the lowest-latency way to answer samples in a host loop: no thread hand-off).

        The handler must be quick and must not wait for replies (use ``send``, not
        ``request``). An exception from it is counted (``handler_errors``) and kept in
        ``handler_error``; it never stops the reader. None removes the handler.
        """
        self._sample_handler = handler

    def stop(self, timeout: float = 1.0, resend: float | None = None,
             until: Callable[[], bool] | None = None) -> bool:
        """Send one Stop request, resending the same frame (same sequence number: Stop is
        idempotent) every ``resend`` s (default: from the measured round-trip time, see
        `resend_interval`) until Stopped arrives, ``until()`` holds (e.g. a zero-output sample
        was seen), or ``timeout`` s pass. A reply to any of the sends counts, however late.
        True when Stopped arrived. Never raises (works after DeviceReset too)."""
        deadline = time.monotonic() + timeout
        every = self.resend_interval() if resend is None else resend
        with self.begin(Stop(), check_reset=False) as req:
            next_send = 0.0
            while self._lost is None:
                now = time.monotonic()
                if now >= next_send:
                    with contextlib.suppress(LinkError):
                        req.send()
                    next_send = now + every
                if isinstance(req.reply, Stopped):
                    return True
                if until is not None and until():
                    return False
                if now >= deadline:
                    return False
                with contextlib.suppress(LinkError):
                    req.wait(min(0.01, max(0.0, deadline - now), max(0.0, next_send - now)))
            return isinstance(req.reply, Stopped)

    def resend_interval(self) -> float:
        """How long to wait for a reply before sending a request again, s: twice the 99th
        percentile of the measured round-trip times (the reply timeout before any was
        measured), at least 20 ms and at most the reply timeout when that is longer."""
        rtts = list(self._rtts)
        if not rtts:
            return self.reply_timeout
        return max(0.02, 2.0 * percentile(rtts, 99))

    def start_heartbeat(self) -> None:
        """Start the Ping thread (every ``heartbeat_interval`` s). Idempotent."""
        if self._hb_thread is not None and self._hb_thread.is_alive():
            return
        self._hb_stop.clear()
        self._last_rx = time.monotonic()
        self._hb_thread = threading.Thread(
            target=self._heartbeat_loop, name=f"link-heartbeat {self.url}", daemon=True
        )
        self._hb_thread.start()

    def stop_heartbeat(self) -> None:
        """Stop the Ping thread (the device watchdog then runs out unless the host sends)."""
        self._hb_stop.set()
        thread = self._hb_thread
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout=2.0)
        self._hb_thread = None

    def counters(self) -> dict[str, int]:
        """The reception counters of `stats()` without the round-trip statistics: cheap enough
        to read on every sample (frames_good, crc_errors, framing_errors, decode_errors,
        seq_gaps, samples_received)."""
        c = self._counts
        return {
            "frames_good": self._decoder.frames_good,
            "crc_errors": self._decoder.crc_errors,
            "framing_errors": self._decoder.framing_errors,
            "decode_errors": c["decode_errors"],
            "seq_gaps": c["seq_gaps"],
            "samples_received": c["samples_received"],
        }

    def stats(self) -> LinkStats:
        """Snapshot of the counters."""
        rtts = list(self._rtts)
        c = self._counts
        return LinkStats(
            frames_good=self._decoder.frames_good,
            crc_errors=self._decoder.crc_errors,
            framing_errors=self._decoder.framing_errors,
            decode_errors=c["decode_errors"],
            seq_gaps=c["seq_gaps"],
            frames_sent=c["frames_sent"],
            rtt_min=min(rtts) if rtts else None,
            rtt_median=_median(rtts) if rtts else None,
            rtt_p99=percentile(rtts, 99) if rtts else None,
            naks=c["naks"],
            timeouts=c["timeouts"],
            retries=c["retries"],
            unmatched=c["unmatched"],
            samples_received=c["samples_received"],
            samples_dropped=c["samples_dropped"],
            bytes_received=self._decoder.bytes_received,
            bytes_sent=c["bytes_sent"],
            rtt_count=len(rtts),
            handler_errors=c["handler_errors"],
        )

    def close(self) -> None:
        """Stop the threads and close the port (does not send Stop: call stop() first)."""
        self.stop_heartbeat()
        self._closing = True
        cancel = getattr(self._ser, "cancel_read", None)
        if cancel is not None:
            with contextlib.suppress(Exception):  # best effort on a dying port
                cancel()
        if self._reader.is_alive() and self._reader is not threading.current_thread():
            self._reader.join(timeout=1.0)
        with contextlib.suppress(Exception):
            self._ser.close()
        if self._lost is None:
            self._lost = "link closed"
        self._wake_all()

    # ------------------------------------------------------------------ internals

    def _next_seq(self) -> int:
        with self._seq_lock:
            seq = self._seq
            self._seq = (self._seq + 1) & 0xFFFF
            return seq

    def _raise_if_dead(self, check_reset: bool = True) -> None:
        if self._lost is not None:
            raise LinkLost(self._lost)
        if check_reset and self.device_reset:
            raise DeviceReset("the device restarted (boot id changed): its state and limits are gone")

    def _write(self, frame: bytes, msg_type: int) -> float:
        """Write one frame of type ``msg_type`` under the lock; returns host monotonic time
        just before writing. Raises LinkLost, StopOnly (not a Stop while stop_only)."""
        with self._write_lock:
            if self._lost is not None:
                raise LinkLost(self._lost)
            if self._stop_only and msg_type != Stop.TYPE:
                raise StopOnly(f"{type_name(msg_type)} not sent: a stop is in progress")
            started = time.monotonic()
            try:
                self._ser.write(frame)
            except serial.SerialTimeoutException:
                self._set_lost(f"{self.url}: writing stalled for {WRITE_TIMEOUT:g} s")
                raise LinkLost(self._lost or "") from None
            except Exception as exc:  # noqa: BLE001 - SerialException, OSError, closed port
                self._set_lost(f"{self.url}: write failed ({exc})")
                raise LinkLost(self._lost or "") from None
            self._counts["frames_sent"] += 1
            self._counts["bytes_sent"] += len(frame)
            return started

    def _transact(
        self, msg: Message, timeout: float, retries: int, check_reset: bool = True
    ) -> tuple[Message, float, float]:
        self._raise_if_dead(check_reset)
        with self.begin(msg, check_reset) as req:
            for _ in range(retries + 1):
                req.send()
                if req.wait(timeout):
                    break
            reply = req.result()
        return reply, req.sent_at, req.received_at

    def _set_lost(self, reason: str) -> None:
        if self._lost is None:
            self._lost = reason
        self._wake_all()

    def _wake_all(self) -> None:
        with self._pending_lock:
            for waiter in self._pending.values():
                waiter.event.set()
        try:
            self.samples.put_nowait(_LOST)
        except queue.Full:
            try:
                self.samples.get_nowait()
                self.samples.put_nowait(_LOST)
            except (queue.Empty, queue.Full):
                pass

    def _read_loop(self) -> None:
        ser = self._ser
        while not self._closing:
            try:
                waiting = ser.in_waiting
                data = ser.read(waiting if waiting > 0 else 1)
            except Exception as exc:  # noqa: BLE001 - any failure of the port ends the link
                if not self._closing:
                    self._set_lost(f"{self.url}: port lost ({exc})")
                return
            if data:
                try:
                    self._on_bytes(data, time.monotonic())
                except Exception as exc:  # noqa: BLE001 - a bug here must not leave callers hanging
                    self._set_lost(f"{self.url}: internal error in the link's reader ({exc!r})")
                    return

    def _on_bytes(self, data: bytes, now: float) -> None:
        """Decode received bytes and dispatch frames (reader thread; public for tests)."""
        for raw in self._decoder.feed(data):
            self._last_rx = now
            try:
                msg = decode(raw)
            except DecodeError:
                self._counts["decode_errors"] += 1
                continue
            if msg.TYPE in RESPONSE_TYPES:
                with self._pending_lock:
                    waiter = self._pending.get(raw.seq)
                    if waiter is not None and not waiter.event.is_set() and (
                        waiter.expected == msg.TYPE or isinstance(msg, Nak)
                    ):
                        waiter.reply = msg
                        waiter.received_at = now
                        waiter.event.set()
                        matched = True
                    else:
                        matched = False
                    if not matched and isinstance(msg, Pong):
                        sent_at = self._hb_pings.pop(raw.seq, None)
                        if sent_at is not None:
                            self._rtts.append(now - sent_at)
                            self._note_pong(msg)
                            continue
                if isinstance(msg, Nak):
                    self._counts["naks"] += 1
                    if not matched:
                        self.last_nak = (raw.seq, msg)
                if not matched:
                    self._counts["unmatched"] += 1
                continue
            if msg.TYPE not in UNSOLICITED_TYPES:  # a host-to-device type (loop:// echo)
                self._counts["unmatched"] += 1
                continue
            self._count_unsolicited(raw.seq)
            if isinstance(msg, Sample):
                rec = SampleRecord(
                    msg.axis, self._clock.unwrap(msg.device_us), msg.pv, msg.output,
                    msg.setpoint, msg.flags, now, raw.seq,
                )
                self._counts["samples_received"] += 1
                handler = self._sample_handler
                if handler is not None:
                    try:
                        handler(rec)
                    except Exception as exc:  # noqa: BLE001 - never let it kill the reader
                        self._counts["handler_errors"] += 1
                        self.handler_error = exc
                try:
                    self.samples.put_nowait(rec)
                except queue.Full:
                    self._counts["samples_dropped"] += 1
            elif isinstance(msg, Fault):
                self.faults.put(
                    FaultRecord(msg.code, msg.axis, msg.value, self._clock.unwrap(msg.device_us), now)
                )

    def _count_unsolicited(self, seq: int) -> None:
        last = self._last_unsolicited
        self._last_unsolicited = seq
        if last is None:
            return
        gap = (seq - last - 1) & 0xFFFF
        if 0 < gap < 0x8000:
            self._counts["seq_gaps"] += gap

    def _note_pong(self, pong: Pong) -> None:
        self.last_pong = pong
        if self._boot_id is not None and pong.boot_id != self._boot_id:
            first = not self.device_reset
            self.device_reset = True
            if first:  # a caller waiting for samples (none come after a reset) hears it now
                with contextlib.suppress(queue.Full):
                    self.samples.put_nowait(_WAKE)

    def _heartbeat_loop(self) -> None:
        """Send a Ping every heartbeat_interval s on a fixed schedule, never waiting for the
        Pong (a lost reply must not delay the next Ping: it feeds the device watchdog). Pongs
        are matched in the reader thread (``_hb_pings``), late ones too; a Ping unanswered
        after HB_PONG_WAIT counts as a timeout. While stop_only, no Ping goes out."""
        nonce = 0
        next_at = time.monotonic()
        while True:
            next_at += self.heartbeat_interval
            now = time.monotonic()
            if next_at < now:  # fell behind (suspended process): do not burst
                next_at = now + self.heartbeat_interval
            if self._hb_stop.wait(max(0.0, next_at - now)):
                return
            if self._lost is not None:
                return
            now = time.monotonic()
            if self.silence_timeout is not None and now - self._last_rx > self.silence_timeout:
                self._set_lost(
                    f"{self.url}: the device stopped answering (no frame for "
                    f"{self.silence_timeout:g} s)"
                )
                return
            with self._pending_lock:
                # a late Pong still measures the round trip (a slow link is not a dead one):
                # a Ping counts as unanswered only after HB_PONG_WAIT
                stale = [q for q, t in self._hb_pings.items() if now - t > HB_PONG_WAIT]
                for q in stale:
                    del self._hb_pings[q]
                self._counts["timeouts"] += len(stale)
            if self._stop_only:
                continue  # only Stop frames go out now: the device watchdog is left to run
            nonce = (nonce + 1) & (_WRAP - 1)
            seq = self._next_seq()
            frame = encode(Ping(nonce, int(now * 1e6) & (_WRAP - 1)), seq)
            with self._pending_lock:
                self._hb_pings[seq] = now
            try:
                sent_at = self._write(frame, Ping.TYPE)
            except StopOnly:
                with self._pending_lock:
                    self._hb_pings.pop(seq, None)
                continue
            except LinkError:
                return
            with self._pending_lock:
                if seq in self._hb_pings:
                    self._hb_pings[seq] = sent_at
