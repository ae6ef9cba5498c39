"""Link budget: how many bytes a second the protocol needs against what a serial line carries.

Pure functions, no I/O. Frame sizes come from the message layouts (protocol.messages FORMAT)
plus the frame overhead: type and seq (3 bytes), CRC (2), COBS (1 byte per 254, worst case)
and the 0x00 delimiter (1). A UART at ``baud`` carries ``baud / 10`` bytes a second (8N1: a
start bit, 8 data bits, a stop bit).

Directions are counted separately (a UART is full duplex); the device-to-host direction is the
one that fills up: the sample stream, the Acks of a host loop's SetOutputs and the heartbeat's
Pongs. Times in seconds, rates in bytes per second.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from protocol.framing import CRC_SIZE, HEADER_SIZE
from protocol.messages import Ack, Message, Ping, Pong, Sample, SetOutput

BITS_PER_BYTE = 10
"""A UART byte on the line: start bit, 8 data bits, stop bit."""
HEADROOM = 0.8
"""Fraction of the link's capacity the traffic may use (the rest absorbs retries, jitter and
clock error between the two UARTs; common practice, no source)."""
HEARTBEAT_INTERVAL = 0.05
"""Seconds between the host's Pings (protocol.link default)."""
MAX_DECIMATION = 65535


def wire_size(msg: type[Message]) -> int:
    """Bytes one frame of message class ``msg`` takes on the wire: header, payload, CRC, COBS
    overhead (worst case, one byte per 254 and one more) and the delimiter."""
    raw = HEADER_SIZE + msg.payload_size() + CRC_SIZE
    return raw + math.ceil(raw / 254) + 1


SAMPLE_BYTES = wire_size(Sample)  # 26
ACK_BYTES = wire_size(Ack)  # 8
SET_OUTPUT_BYTES = wire_size(SetOutput)  # 12
PING_BYTES = wire_size(Ping)  # 15
PONG_BYTES = wire_size(Pong)  # 23


def link_capacity(baud: float) -> float:
    """Bytes a second a UART at ``baud`` carries (10 bits a byte)."""
    if not baud > 0:
        raise ValueError(f"baud must be > 0, got {baud}")
    return baud / BITS_PER_BYTE


def heartbeat_rate(interval: float = HEARTBEAT_INTERVAL) -> float:
    """Device-to-host bytes a second of the Pongs answering the heartbeat."""
    return PONG_BYTES / interval


def stream_rate(tick: float, decimation: int = 1, axes: int = 1) -> float:
    """Bytes a second of the sample stream: one Sample per axis every ``decimation`` ticks."""
    if not tick > 0 or decimation < 1:
        raise ValueError("tick must be > 0 and decimation >= 1")
    return axes * SAMPLE_BYTES / (tick * decimation)


def host_loop_rates(tick: float) -> tuple[float, float]:
    """(device-to-host, host-to-device) bytes a second of a host loop at ``tick``: a Sample and
    the Ack of a SetOutput every tick one way, a SetOutput every tick the other, and the
    heartbeat (Pongs back, Pings out) on top."""
    down = (SAMPLE_BYTES + ACK_BYTES) / tick + heartbeat_rate()
    up = SET_OUTPUT_BYTES / tick + PING_BYTES / HEARTBEAT_INTERVAL
    return down, up


def choose_decimation(tick: float, baud: float, *, headroom: float = HEADROOM,
                      axes: int = 1) -> int:
    """The smallest decimation that keeps the stream and the heartbeat within ``headroom`` of
    the link's capacity (MAX_DECIMATION when even that is too much)."""
    room = headroom * link_capacity(baud) - heartbeat_rate()
    if room <= 0:
        return MAX_DECIMATION
    need = axes * SAMPLE_BYTES / (tick * room)
    # a hair of tolerance so that an exact fit is not pushed to the next divisor by rounding
    return max(1, min(MAX_DECIMATION, math.ceil(need - 1e-9)))


@dataclass(frozen=True)
class LoopBudget:
    """The budget of one loop mode at one tick and baud rate (rates in bytes a second).

    needed: device-to-host traffic of the mode (the stream at ``decimation``, the host loop's
    Acks, the heartbeat); capacity: what the link carries; usable: ``headroom`` of it;
    decimation: ticks between samples (1 for a host loop); sample_interval: s between samples;
    fits: needed <= usable; full_stream: what every tick's sample alone needs.
    """

    loop_mode: str
    tick: float
    baud: float
    decimation: int
    needed: float
    capacity: float
    usable: float
    full_stream: float

    @property
    def fits(self) -> bool:
        return self.needed <= self.usable * (1 + 1e-9)

    @property
    def sample_interval(self) -> float:
        return self.tick * self.decimation

    @property
    def min_host_tick(self) -> float:
        """Shortest tick (s) at which a host loop fits this link."""
        room = self.usable - heartbeat_rate()
        return math.inf if room <= 0 else (SAMPLE_BYTES + ACK_BYTES) / room


def loop_budget(tick: float, baud: float, loop_mode: str, *, headroom: float = HEADROOM
                ) -> LoopBudget:
    """The LoopBudget of ``loop_mode`` ("host" or "device") at ``tick`` s and ``baud``."""
    if loop_mode not in ("host", "device"):
        raise ValueError(f"loop_mode must be 'host' or 'device', got {loop_mode!r}")
    capacity = link_capacity(baud)
    if loop_mode == "host":
        dec = 1
        needed = host_loop_rates(tick)[0]
    else:
        dec = choose_decimation(tick, baud, headroom=headroom)
        needed = stream_rate(tick, dec) + heartbeat_rate()
    return LoopBudget(loop_mode, tick, baud, dec, needed, capacity, headroom * capacity,
                      stream_rate(tick))


def stream_decimation(tick: float, baud: float, loop_mode: str) -> int:
    """The decimation to ask for in Stream: 1 for a host loop (it answers every tick), the
    budget's choice for a device loop."""
    return loop_budget(tick, baud, loop_mode).decimation


def _rate(x: float) -> str:
    return f"{x:,.0f} B/s"


def check_loop_budget(tick: float, baud: float, loop_mode: str) -> tuple[bool, str]:
    """Can the link carry ``loop_mode`` at the board's ``tick`` (s) and ``baud``? Returns (ok,
    one line with the figures). A host loop that does not fit is refused with the device loop
    proposed; a device loop always fits by thinning the stream (the line says how much)."""
    b = loop_budget(tick, baud, loop_mode)
    ms = tick * 1000
    if loop_mode == "host":
        if b.fits:
            return True, (f"host loop at a {ms:g} ms tick: needs {_rate(b.needed)} from the "
                          f"board, the link carries {_rate(b.capacity)} at {baud:g} baud")
        dev = loop_budget(tick, baud, "device")
        return False, (
            f"a host loop at the board's {ms:g} ms tick needs {_rate(b.needed)} from the board "
            f"(a {SAMPLE_BYTES}-byte sample and an {ACK_BYTES}-byte acknowledgement every "
            f"tick), the link carries {_rate(b.capacity)} at {baud:g} baud ({_rate(b.usable)} "
            f"usable): use --loop device (the board runs the loop; the host asks for "
            f"{describe_stream(dev)}), a faster link, or a tick of at least "
            f"{b.min_host_tick * 1000:.2g} ms")
    if b.decimation >= MAX_DECIMATION and not b.fits:
        return False, (f"the link at {baud:g} baud ({_rate(b.capacity)}) cannot even carry the "
                       f"heartbeat ({_rate(heartbeat_rate())}): use a faster link")
    return True, (f"device loop at a {ms:g} ms tick: the host asks for {describe_stream(b)}, which needs "
                  f"{_rate(b.needed)}; the link carries {_rate(b.capacity)} at {baud:g} baud")


def describe_stream(b: LoopBudget) -> str:
    """"every sample" or "every 3rd sample, 3 ms apart" for a budget's decimation."""
    if b.decimation == 1:
        return "every sample"
    return f"every {_ordinal(b.decimation)} sample, {b.sample_interval * 1000:g} ms apart"


def _ordinal(n: int) -> str:
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"
