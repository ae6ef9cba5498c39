"""I/O loop of the mock device: a pty or a loopback TCP socket, the tick schedule, pacing.

Time: the loop keeps an absolute schedule; tick j (counted from start) is due at wall time
``start + j * period / speed``. When it falls behind it runs the missed ticks back to back
(never skipping one). Received frames are handled as soon as they arrive, between ticks.

Pacing (``baud``): like a UART at ``baud`` bit/s, 8N1 (10 bits a byte), in *device* time, so the
link's capacity relative to the simulated plant is that of a real link at that baud rate; in wall
time bytes leave at ``baud * speed / 10`` bytes/s. A frame is written when its last byte would
have left the UART. Without ``baud`` frames are written at once. When more is sent than the
line carries, frames beyond a TX_BUFFER-byte backlog are dropped (a full transmit buffer).

pty: the slave is set to raw mode, then the device closes its own slave descriptor, so that
the kernel discards what the device sends while no host has the port open (like a UART nobody
listens to) and a host that reopens the port sees no stale frames. While no host is there the
master reads fail with EIO; the loop then polls once per tick instead of waiting on it. The host
may close and reopen the port as often as it likes. When this process exits the master closes
and the host's reads fail at once.
"""

from __future__ import annotations

import contextlib
import errno
import heapq
import os
import select
import signal
import socket
import sys
import time
import tty
from collections.abc import Callable
from typing import TextIO

from mock_device.device import Device, Outgoing
from mock_device.faults import LinkFaults
from protocol import messages as m
from protocol.framing import FrameDecoder

__all__ = ["PtyTransport", "TcpTransport", "Server", "Transport"]

TX_BUFFER = 4096
"""Transmit buffer of the paced UART, bytes: frames that would wait longer are dropped."""


class Transport:
    """One byte channel to the host. ``read`` returns b"" when nothing is there."""

    peer = True  # False while we know nobody is at the other end (nothing to wait on)

    def fileno(self) -> int:
        raise NotImplementedError

    def read(self) -> bytes:
        raise NotImplementedError

    def write(self, data: bytes) -> int:
        """Write what fits now; returns the number of bytes taken (the rest is retried)."""
        raise NotImplementedError

    def url(self) -> str:
        raise NotImplementedError

    def close(self) -> None:
        raise NotImplementedError

    def poll(self) -> None:
        """Housekeeping between reads (accept a new TCP client)."""


class PtyTransport(Transport):
    """Pseudo-terminal: the host opens ``url()`` (the slave path) with pyserial."""

    def __init__(self) -> None:
        self.master, slave = os.openpty()
        try:
            tty.setraw(slave)
            self.path = os.ttyname(slave)
        finally:
            os.close(slave)
        os.set_blocking(self.master, False)
        self.peer = False

    def fileno(self) -> int:
        return self.master

    def read(self) -> bytes:
        try:
            data = os.read(self.master, 4096)
        except BlockingIOError:
            self.peer = True
            return b""
        except OSError as exc:
            if exc.errno == errno.EIO:  # no host has the slave open
                self.peer = False
                return b""
            raise
        self.peer = True
        return data

    def write(self, data: bytes) -> int:
        try:
            return os.write(self.master, data)
        except BlockingIOError:
            return 0
        except OSError as exc:
            if exc.errno in (errno.EIO, errno.EAGAIN):
                return len(data)  # nobody there: the bytes are lost, as on a dead line
            raise

    def url(self) -> str:
        return self.path

    def close(self) -> None:
        with contextlib.suppress(OSError):
            os.close(self.master)


class TcpTransport(Transport):
    """Loopback TCP listener (one client at a time); the host opens ``socket://HOST:PORT``."""

    def __init__(self, host: str = "127.0.0.1", port: int = 0) -> None:
        self.listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.listener.bind((host, port))
        self.listener.listen(1)
        self.listener.setblocking(False)
        self.host, self.port = self.listener.getsockname()[:2]
        self.client: socket.socket | None = None

    @property  # type: ignore[override]
    def peer(self) -> bool:
        return True  # the listener or the client is always worth waiting on

    def fileno(self) -> int:
        return self.client.fileno() if self.client is not None else self.listener.fileno()

    def poll(self) -> None:
        if self.client is not None:
            return
        try:
            conn, _ = self.listener.accept()
        except (BlockingIOError, InterruptedError):
            return
        conn.setblocking(False)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.client = conn

    def _drop_client(self) -> None:
        if self.client is not None:
            self.client.close()
            self.client = None

    def read(self) -> bytes:
        self.poll()
        if self.client is None:
            return b""
        try:
            data = self.client.recv(4096)
        except (BlockingIOError, InterruptedError):
            return b""
        except OSError:
            self._drop_client()
            return b""
        if not data:
            self._drop_client()
        return data

    def write(self, data: bytes) -> int:
        if self.client is None:
            return len(data)  # nobody connected: lost
        try:
            return self.client.send(data)
        except (BlockingIOError, InterruptedError):
            return 0
        except OSError:
            self._drop_client()
            return len(data)

    def url(self) -> str:
        return f"socket://{self.host}:{self.port}"

    def close(self) -> None:
        self._drop_client()
        self.listener.close()


class Server:
    """Runs a Device on a Transport in (accelerated) real time.

    Args:
        device: the device state machine.
        transport: the byte channel.
        speed: simulated seconds per wall second (> 0).
        baud: UART pacing in bit/s (None: no pacing).
        link_faults: byte-level faults (None: none).
        clock: monotonic wall clock, s; sleep: waits that many wall seconds (both for tests).
        parent: a process id: the loop ends once this process is gone (our parent changed),
            so a simulated board started by a tool never outlives it, even a killed one.
    """

    def __init__(
        self,
        device: Device,
        transport: Transport,
        *,
        speed: float = 1.0,
        baud: int | None = None,
        link_faults: LinkFaults | None = None,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        log: TextIO = sys.stderr,
        parent: int | None = None,
    ) -> None:
        if not speed > 0:
            raise ValueError("speed must be > 0")
        self.device = device
        self.transport = transport
        self.speed = float(speed)
        self.baud = baud
        self.faults = link_faults
        self.clock = clock
        self.sleep = sleep
        self.log = log
        self.decoder = FrameDecoder()
        self.running = True
        self._queue: list[tuple[float, int, bytes]] = []  # (sim time to write, order, bytes)
        self._order = 0
        self._line_free = 0.0  # sim time the paced line is free again
        self._partial = b""  # bytes of a frame the OS did not take yet
        self._start = 0.0
        self.ticks = 0
        self.tx_overflows = 0
        self.parent = parent
        self._parent_checked = 0.0

    def stop(self, *_args: object) -> None:
        """Ask the loop to finish (signal handler)."""
        self.running = False

    def _sim_now(self) -> float:
        return (self.clock() - self._start) * self.speed

    def _enqueue(self, items: list[Outgoing], now: float) -> None:
        for item in items:
            data = m.encode(item.msg, item.seq)
            chunks = [(now, data)] if self.faults is None else self.faults.outgoing(data, now)
            for when, chunk in chunks:
                self._push(when, chunk)

    def _push(self, when: float, data: bytes) -> None:
        if self.baud:
            if self._line_free - when > TX_BUFFER * 10.0 / self.baud:
                self.tx_overflows += 1  # the UART's transmit buffer is full: frame lost
                return
            start = max(when, self._line_free)
            done = start + len(data) * 10.0 / self.baud
            self._line_free = done
            when = done
        heapq.heappush(self._queue, (when, self._order, data))
        self._order += 1

    def _flush(self, now: float) -> None:
        if self._partial:
            n = self.transport.write(self._partial)
            self._partial = self._partial[n:]
            if self._partial:
                return
        while self._queue and self._queue[0][0] <= now:
            _, _, data = heapq.heappop(self._queue)
            n = self.transport.write(data)
            if n < len(data):
                self._partial = data[n:]
                return

    def _receive(self, now: float) -> None:
        while True:
            data = self.transport.read()
            if not data:
                return
            if self.faults is not None:
                data = self.faults.incoming(data)
            frames = self.decoder.feed(data)
            for frame in frames:
                self._enqueue(self.device.handle_frame(frame), now)
            if any(f.type != m.Stop.TYPE for f in frames):
                # The host was heard at simulated time `now`, which is ahead of the tick counter
                # while the loop catches up after the process was descheduled: those catch-up
                # ticks are not host silence, so the watchdog counts from `now` (Stop frames do
                # not feed the watchdog: see Device.handle_frame).
                heard_k = int(now / self.device.period)
                self.device.last_rx_k = max(self.device.last_rx_k, heard_k)

    def _parent_gone(self) -> bool:
        """True when the process we were started for has ended (checked every 0.2 s wall)."""
        if self.parent is None:
            return False
        wall = self.clock()
        if wall - self._parent_checked < 0.2:
            return False
        self._parent_checked = wall
        return os.getppid() != self.parent

    def run(self) -> int:
        """Serve until stopped, a disconnect fault or the parent's end; returns the exit code."""
        period = self.device.period
        self._start = self.clock()
        last_garbage = 0.0
        while self.running:
            if self._parent_gone():
                print("mock_device: the process that started it has ended: exiting",
                      file=self.log)
                return 0
            now = self._sim_now()
            # run every tick that is due (catch up without skipping)
            while self.ticks * period <= now and self.running:
                self._receive(now)
                t_tick = self.ticks * period
                self._enqueue(self.device.tick(), max(t_tick, now))
                self.ticks += 1
                if self.faults is not None:
                    for when, burst in self.faults.garbage(last_garbage, t_tick):
                        self._push(when, burst)
                    last_garbage = t_tick
                if self.device.disconnect_requested:
                    print("mock_device: disconnect fault: closing the port", file=self.log)
                    return 0
                now = self._sim_now()
                self._flush(now)  # also while catching up, so replies are never held back
            self._flush(now)
            wake = self.ticks * period
            if self._queue:
                wake = min(wake, self._queue[0][0])
            timeout = max(0.0, (wake - now) / self.speed)
            if self._partial:
                timeout = min(timeout, 0.001)
            self.transport.poll()
            if self.transport.peer:
                try:
                    ready, _, _ = select.select([self.transport.fileno()], [], [], timeout)
                except InterruptedError:
                    continue
                if ready:
                    self._receive(self._sim_now())
            else:
                self.sleep(timeout)
                self._receive(self._sim_now())
        return 0


def install_signal_handlers(server: Server) -> None:
    """SIGTERM and SIGINT end the loop cleanly."""
    signal.signal(signal.SIGTERM, server.stop)
    signal.signal(signal.SIGINT, server.stop)
