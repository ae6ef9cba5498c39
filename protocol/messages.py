"""Typed messages of the wire protocol and their byte layouts.

Every message is a frozen dataclass with class attributes ``TYPE`` (the frame type id) and
``FORMAT`` (a little-endian ``struct`` format; ``f`` is IEEE-754 float32, ``Ns`` a fixed-size
NUL-padded UTF-8 text field held as ``str``). Type ids 0x01-0x3F travel host to device,
0x80-0xBF device to host. protocol/SPEC.md documents the same layouts for firmware authors.
"""

from __future__ import annotations

import dataclasses
import enum
import math
import struct
from dataclasses import dataclass
from typing import ClassVar, Self

from protocol.errors import BadLength, UnknownType
from protocol.framing import RawFrame, encode_frame

PROTOCOL_VERSION = 2
"""The protocol version this host speaks (SPEC.md section 9)."""
OLDER_VERSIONS: tuple[int, ...] = (1,)
"""Older versions the host still talks to when a device refuses its Hello with one of them:
version 1 is version 2 without HelloReply.pv_resolution (its HelloReply is 44 bytes and
pv_resolution reads as 0, not declared)."""
HELLO_REPLY_V1_SIZE = 44
"""Payload size of a version-1 HelloReply, bytes."""


class NakCode(enum.IntEnum):
    """Reasons a device refuses a request (Nak.code)."""

    BAD_VERSION = 1  #: Hello with another protocol version; detail = the device's version
    UNKNOWN_TYPE = 2  #: type id not known to the device
    BAD_LENGTH = 3  #: payload length does not match the type; detail = expected length
    OUT_OF_RANGE = 4  #: a field is out of its range (or NaN); detail = the offending value
    BAD_AXIS = 5  #: axis index >= axis_count; detail = axis_count
    FAULT_LATCHED = 6  #: motion refused while a fault is latched; detail = fault code
    NOT_ALLOWED = 7  #: not allowed in the current mode / not supported; detail = mode
    LIMITS_NOT_SET = 8  #: motion refused before SetLimits for that axis


class FaultCode(enum.IntEnum):
    """Reasons a device latches a fault (Fault.code)."""

    WATCHDOG = 1  #: no frame from the host for longer than watchdog_ms; value = silence, s
    PV_WINDOW = 2  #: PV left [pv_low, pv_high]; value = PV
    PV_RATE = 3  #: |dPV/dt| exceeded pv_rate_limit; value = rate, PV units/s
    OUTPUT_LIMIT = 4  #: applied output found beyond output_limit; value = output
    DRIVER = 5  #: motor driver reported a fault (overcurrent, overtemperature); value = 0
    SENSOR = 6  #: sensor read failed; value = 0


class Mode(enum.IntEnum):
    """Per-axis device mode (Sample.flags bits 1-3)."""

    IDLE = 0  #: output zero
    HOST = 1  #: output = last SetOutput (+ offset); the host runs the loop
    RELAY = 2  #: device-side relay
    PID = 3  #: device-side closed loop


# Sample.flags bits
FLAG_STREAMING = 1 << 0
FLAG_MODE_SHIFT = 1
FLAG_MODE_MASK = 0b111 << FLAG_MODE_SHIFT
FLAG_FAULT = 1 << 4
FLAG_CLAMPED = 1 << 5
FLAG_WATCHDOG_ARMED = 1 << 6
FLAG_LIMITS_SET = 1 << 7
FLAG_RELAY_HIGH = 1 << 8

# HelloReply.capabilities bits
CAP_HOST_LOOP = 1 << 0
CAP_DEVICE_RELAY = 1 << 1
CAP_DEVICE_PID = 1 << 2
CAP_STORE_GAINS = 1 << 3


def flags_mode(flags: int) -> Mode:
    """The mode encoded in Sample.flags (unknown values map to IDLE)."""
    value = (flags & FLAG_MODE_MASK) >> FLAG_MODE_SHIFT
    try:
        return Mode(value)
    except ValueError:
        return Mode.IDLE


def make_flags(
    mode: Mode | int,
    *,
    streaming: bool = False,
    fault: bool = False,
    clamped: bool = False,
    watchdog_armed: bool = False,
    limits_set: bool = False,
    relay_high: bool = False,
) -> int:
    """Build Sample.flags from its parts."""
    flags = (int(mode) << FLAG_MODE_SHIFT) & FLAG_MODE_MASK
    flags |= FLAG_STREAMING if streaming else 0
    flags |= FLAG_FAULT if fault else 0
    flags |= FLAG_CLAMPED if clamped else 0
    flags |= FLAG_WATCHDOG_ARMED if watchdog_armed else 0
    flags |= FLAG_LIMITS_SET if limits_set else 0
    flags |= FLAG_RELAY_HIGH if relay_high else 0
    return flags


@dataclass(frozen=True)
class Message:
    """Base class: subclasses set TYPE and FORMAT and declare fields in FORMAT order."""

    TYPE: ClassVar[int] = -1
    FORMAT: ClassVar[str] = "<"
    _STRUCT: ClassVar[struct.Struct]
    _TEXT: ClassVar[tuple[int, ...]] = ()  # indices of text fields
    _TEXT_SIZES: ClassVar[tuple[int, ...]] = ()

    def pack(self) -> bytes:
        """Payload bytes. Raises ValueError when a field does not fit its type."""
        values = [getattr(self, f.name) for f in dataclasses.fields(self)]
        for index, size in zip(self._TEXT, self._TEXT_SIZES, strict=True):
            raw = str(values[index]).encode("utf-8")
            if len(raw) > size:
                raise ValueError(f"{type(self).__name__}: text field longer than {size} bytes")
            values[index] = raw
        try:
            return self._STRUCT.pack(*values)
        except struct.error as exc:
            raise ValueError(f"{type(self).__name__}: {exc}") from exc

    @classmethod
    def unpack(cls, payload: bytes) -> Self:
        """Message from its payload bytes. Raises BadLength on a wrong payload length."""
        if len(payload) != cls._STRUCT.size:
            raise BadLength(cls.TYPE, len(payload), cls._STRUCT.size)
        values = list(cls._STRUCT.unpack(payload))
        for index in cls._TEXT:
            values[index] = values[index].rstrip(b"\x00").decode("utf-8", errors="replace")
        return cls(*values)

    @classmethod
    def payload_size(cls) -> int:
        """Payload length in bytes."""
        return cls._STRUCT.size

    def is_finite(self) -> bool:
        """True when no float field is NaN or infinite."""
        return all(
            math.isfinite(v) for v in dataclasses.astuple(self) if isinstance(v, float)
        )


REGISTRY: dict[int, type[Message]] = {}
"""Message classes by type id."""

_TEXT_CODE = "s"


def register(cls: type[Message]) -> type[Message]:
    """Class decorator: compile FORMAT, check it against the fields, add to REGISTRY."""
    if cls.TYPE in REGISTRY:
        raise ValueError(f"type id 0x{cls.TYPE:02X} used twice")
    if not (0x01 <= cls.TYPE <= 0x3F or 0x80 <= cls.TYPE <= 0xBF):
        raise ValueError(f"type id 0x{cls.TYPE:02X} outside the allowed ranges")
    st = struct.Struct(cls.FORMAT)
    codes: list[tuple[str, int]] = []
    count = ""
    for ch in cls.FORMAT.lstrip("<"):
        if ch.isdigit():
            count += ch
            continue
        if ch == _TEXT_CODE:
            codes.append((ch, int(count or "1")))
        else:
            codes.extend((ch, 1) for _ in range(int(count or "1")))
        count = ""
    fields = dataclasses.fields(cls)
    if len(fields) != len(codes):
        raise ValueError(f"{cls.__name__}: {len(fields)} fields but FORMAT has {len(codes)}")
    cls._STRUCT = st
    cls._TEXT = tuple(i for i, (c, _) in enumerate(codes) if c == _TEXT_CODE)
    cls._TEXT_SIZES = tuple(n for c, n in codes if c == _TEXT_CODE)
    REGISTRY[cls.TYPE] = cls
    return cls


# ---------------------------------------------------------------- host -> device


@register
@dataclass(frozen=True)
class Hello(Message):
    """Handshake request. Reply: HelloReply, or Nak(BAD_VERSION, detail=device version)."""

    TYPE: ClassVar[int] = 0x01
    FORMAT: ClassVar[str] = "<H"
    protocol_version: int = PROTOCOL_VERSION


@register
@dataclass(frozen=True)
class Ping(Message):
    """Heartbeat and round-trip probe. Reply: Pong echoing nonce and host_us."""

    TYPE: ClassVar[int] = 0x02
    FORMAT: ClassVar[str] = "<II"
    nonce: int = 0
    host_us: int = 0  #: host clock, microseconds mod 2**32 (echoed, not interpreted)


@register
@dataclass(frozen=True)
class Stop(Message):
    """All axes to zero output, mode idle. Reply: Stopped, once the applied outputs are zero."""

    TYPE: ClassVar[int] = 0x03
    FORMAT: ClassVar[str] = "<"


@register
@dataclass(frozen=True)
class ClearFault(Message):
    """Clear a latched fault (axes stay idle). Reply: Ack."""

    TYPE: ClassVar[int] = 0x04
    FORMAT: ClassVar[str] = "<"


@register
@dataclass(frozen=True)
class SetLimits(Message):
    """Device-side safety limits of one axis. Reply: Ack, or Nak(OUT_OF_RANGE / BAD_AXIS)."""

    TYPE: ClassVar[int] = 0x05
    FORMAT: ClassVar[str] = "<BffffH"
    axis: int = 0
    output_limit: float = 0.0  #: |applied output| <= this, output units; 0 < x <= max_output
    pv_low: float = 0.0  #: PV below this latches PV_WINDOW, PV units
    pv_high: float = 0.0  #: PV above this latches PV_WINDOW, PV units; pv_low < pv_high
    pv_rate_limit: float = 0.0  #: |dPV/dt| above this latches PV_RATE, PV units/s; 0 = off
    watchdog_ms: int = 500  #: host silence that latches WATCHDOG, ms; 10..60000, 0 = default


@register
@dataclass(frozen=True)
class GetLimits(Message):
    """Read back the limits of one axis. Reply: Limits, or Nak(LIMITS_NOT_SET / BAD_AXIS)."""

    TYPE: ClassVar[int] = 0x06
    FORMAT: ClassVar[str] = "<B"
    axis: int = 0


@register
@dataclass(frozen=True)
class Stream(Message):
    """Start or stop Sample frames of one axis, one every ``decimation`` ticks. Reply: Ack."""

    TYPE: ClassVar[int] = 0x07
    FORMAT: ClassVar[str] = "<BBH"
    axis: int = 0
    enable: int = 1  #: 1 on, 0 off
    decimation: int = 1  #: 1..65535 ticks between samples


@register
@dataclass(frozen=True)
class SetOutput(Message):
    """Host-loop output of one axis (mode becomes HOST). Reply: Ack or Nak.

    |output| > output_limit -> Nak(OUT_OF_RANGE), output unchanged.
    """

    TYPE: ClassVar[int] = 0x08
    FORMAT: ClassVar[str] = "<Bf"
    axis: int = 0
    output: float = 0.0  #: output units


@register
@dataclass(frozen=True)
class StartRelay(Message):
    """Start the device-side relay on one axis (mode RELAY). Reply: Ack or Nak.

    error = centre - pv; output = bias + amp_high when error > +hysteresis,
    bias - amp_low when error < -hysteresis, otherwise unchanged; starts on the high side
    when pv < centre, else on the low side.
    """

    TYPE: ClassVar[int] = 0x09
    FORMAT: ClassVar[str] = "<Bfffff"
    axis: int = 0
    centre: float = 0.0  #: PV units
    bias: float = 0.0  #: output units
    amp_high: float = 0.0  #: output units, >= 0
    amp_low: float = 0.0  #: output units, >= 0
    hysteresis: float = 0.0  #: PV units, >= 0


@register
@dataclass(frozen=True)
class SetPid(Message):
    """Start the device-side closed loop on one axis (mode PID). Reply: Ack or Nak.

    Parallel form u = bias + kp (b r - y) + ki integral(r - y) dt - kd dy_f/dt, derivative on
    measurement through a first-order filter with time constant kd / (kp * deriv_filter_n),
    back-calculation anti-windup with tracking time ``tracking_time`` (0 = conditional
    integration / clamping), output clamped to output_limit.
    """

    TYPE: ClassVar[int] = 0x0A
    FORMAT: ClassVar[str] = "<Bffffffff"
    axis: int = 0
    kp: float = 0.0  #: output units per PV unit
    ki: float = 0.0  #: output units per PV unit per second
    kd: float = 0.0  #: output units per PV unit times seconds
    setpoint_weight: float = 1.0  #: b, 0..1
    deriv_filter_n: float = 10.0  #: N, > 0
    tracking_time: float = 0.0  #: Tt, s, >= 0
    setpoint: float = 0.0  #: PV units
    bias: float = 0.0  #: output units


@register
@dataclass(frozen=True)
class SetSetpoint(Message):
    """New setpoint (mode PID) or relay centre (mode RELAY). Reply: Ack, or Nak(NOT_ALLOWED)."""

    TYPE: ClassVar[int] = 0x0B
    FORMAT: ClassVar[str] = "<Bf"
    axis: int = 0
    setpoint: float = 0.0  #: PV units


@register
@dataclass(frozen=True)
class SetOffset(Message):
    """Output offset added by the device in every non-idle mode (load disturbance). Reply: Ack."""

    TYPE: ClassVar[int] = 0x0C
    FORMAT: ClassVar[str] = "<Bf"
    axis: int = 0
    offset: float = 0.0  #: output units; |offset| <= output_limit


@register
@dataclass(frozen=True)
class StoreGains(Message):
    """Store PID gains in the device's non-volatile memory (capability bit 3). Reply: Ack."""

    TYPE: ClassVar[int] = 0x0D
    FORMAT: ClassVar[str] = "<Bfff"
    axis: int = 0
    kp: float = 0.0
    ki: float = 0.0
    kd: float = 0.0


# ---------------------------------------------------------------- device -> host


@register
@dataclass(frozen=True)
class HelloReply(Message):
    """Answer to Hello: who the device is and what it can do.

    The layout only ever grows at its end (SPEC.md section 9): version 1 ended after
    max_output (44 bytes); version 2 adds pv_resolution (48 bytes). ``unpack`` takes both, so
    a version-1 device's reply reads with pv_resolution = 0 (not declared).
    """

    TYPE: ClassVar[int] = 0x80
    FORMAT: ClassVar[str] = "<H16s12sIBIBff"
    protocol_version: int = PROTOCOL_VERSION
    device_name: str = ""  #: up to 16 bytes UTF-8
    firmware: str = ""  #: up to 12 bytes UTF-8
    boot_id: int = 0  #: random at every power-up/reset, u32
    axis_count: int = 1
    tick_us: int = 10000  #: device tick period, microseconds
    capabilities: int = CAP_HOST_LOOP  #: CAP_* bits
    max_output: float = 100.0  #: largest output_limit accepted, output units
    pv_resolution: float = 0.0  #: PV quantisation step the board declares, PV units; 0 = none

    @classmethod
    def unpack(cls, payload: bytes) -> Self:
        """HelloReply of version 2 (48 bytes) or version 1 (44 bytes, pv_resolution 0)."""
        if len(payload) == HELLO_REPLY_V1_SIZE:
            payload = bytes(payload) + bytes(cls._STRUCT.size - HELLO_REPLY_V1_SIZE)
        return super().unpack(payload)

    def pack_v1(self) -> bytes:
        """The version-1 payload (44 bytes, without pv_resolution)."""
        return Message.pack(self)[:HELLO_REPLY_V1_SIZE]


@register
@dataclass(frozen=True)
class Ack(Message):
    """Request accepted; the frame's seq echoes the request's."""

    TYPE: ClassVar[int] = 0x81
    FORMAT: ClassVar[str] = "<B"
    acked_type: int = 0


@register
@dataclass(frozen=True)
class Nak(Message):
    """Request refused (NakCode); the frame's seq echoes the request's."""

    TYPE: ClassVar[int] = 0x82
    FORMAT: ClassVar[str] = "<BBf"
    acked_type: int = 0
    code: int = 0
    detail: float = 0.0


@register
@dataclass(frozen=True)
class Pong(Message):
    """Answer to Ping."""

    TYPE: ClassVar[int] = 0x83
    FORMAT: ClassVar[str] = "<IIII"
    nonce: int = 0
    host_us: int = 0
    device_us: int = 0  #: device clock, microseconds mod 2**32
    boot_id: int = 0


@register
@dataclass(frozen=True)
class Limits(Message):
    """Answer to GetLimits; same fields as SetLimits."""

    TYPE: ClassVar[int] = 0x84
    FORMAT: ClassVar[str] = "<BffffH"
    axis: int = 0
    output_limit: float = 0.0
    pv_low: float = 0.0
    pv_high: float = 0.0
    pv_rate_limit: float = 0.0
    watchdog_ms: int = 0


@register
@dataclass(frozen=True)
class Stopped(Message):
    """Answer to Stop: every axis is idle and its applied output is zero."""

    TYPE: ClassVar[int] = 0x85
    FORMAT: ClassVar[str] = "<"


@register
@dataclass(frozen=True)
class Sample(Message):
    """Unsolicited: one tick's measurement of one axis (while streaming)."""

    TYPE: ClassVar[int] = 0x90
    FORMAT: ClassVar[str] = "<BIfffH"
    axis: int = 0
    device_us: int = 0  #: device clock at the sensor read, microseconds mod 2**32
    pv: float = 0.0  #: PV units
    output: float = 0.0  #: output applied during the coming tick, output units
    setpoint: float = 0.0  #: setpoint (PID) or relay centre, PV units; 0 otherwise
    flags: int = 0  #: FLAG_* bits


@register
@dataclass(frozen=True)
class Fault(Message):
    """Unsolicited: a fault was latched (outputs are already zero)."""

    TYPE: ClassVar[int] = 0x91
    FORMAT: ClassVar[str] = "<BBfI"
    code: int = 0  #: FaultCode
    axis: int = 0
    value: float = 0.0  #: see FaultCode
    device_us: int = 0


RESPONSE_TYPES: frozenset[int] = frozenset(
    {HelloReply.TYPE, Ack.TYPE, Nak.TYPE, Pong.TYPE, Limits.TYPE, Stopped.TYPE}
)
"""Device-to-host types that answer a request (their seq echoes it)."""
UNSOLICITED_TYPES: frozenset[int] = frozenset({Sample.TYPE, Fault.TYPE})
"""Device-to-host types sent on the device's own initiative (own seq counter)."""

EXPECTED_REPLY: dict[int, int] = {
    Hello.TYPE: HelloReply.TYPE,
    Ping.TYPE: Pong.TYPE,
    GetLimits.TYPE: Limits.TYPE,
    Stop.TYPE: Stopped.TYPE,
}
"""Reply type of each request type; a request not listed here is answered by Ack. Nak can
answer any request."""


def expected_reply(msg_type: int) -> int:
    """Type id of the positive reply to a request type."""
    return EXPECTED_REPLY.get(msg_type, Ack.TYPE)


def type_name(msg_type: int) -> str:
    """Class name of a type id, or its hex value when unknown."""
    cls = REGISTRY.get(msg_type)
    return cls.__name__ if cls is not None else f"type 0x{msg_type:02X}"


def encode(msg: Message, seq: int) -> bytes:
    """Wire bytes of ``msg`` with sequence number ``seq`` (mod 2**16), delimiter included."""
    return encode_frame(msg.TYPE, seq, msg.pack())


def decode(raw: RawFrame) -> Message:
    """Message of a good frame. Raises UnknownType or BadLength (both DecodeError)."""
    cls = REGISTRY.get(raw.type)
    if cls is None:
        raise UnknownType(raw.type)
    return cls.unpack(raw.payload)
