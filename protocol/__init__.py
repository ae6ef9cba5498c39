"""Wire protocol: COBS/CRC framing, typed messages and the Link transport.

See protocol/SPEC.md for the byte-level specification.
"""

from protocol.cobs import cobs_decode, cobs_encode
from protocol.crc import crc16_ccitt_false
from protocol.errors import (
    BadLength,
    CobsError,
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
    ProtocolError,
    UnknownType,
    VersionMismatch,
)
from protocol.framing import MAX_FRAME, FrameDecoder, RawFrame, encode_frame
from protocol.link import DeviceInfo, FaultRecord, Link, LinkStats, SampleRecord
from protocol.messages import PROTOCOL_VERSION, REGISTRY, Message, decode, encode

__version__ = "0.1.0"

__all__ = [
    "MAX_FRAME",
    "PROTOCOL_VERSION",
    "REGISTRY",
    "BadLength",
    "CobsError",
    "DecodeError",
    "DeviceInfo",
    "DeviceReset",
    "FaultRecord",
    "FrameDecoder",
    "Link",
    "LinkError",
    "LinkLost",
    "LinkStats",
    "LinkTimeout",
    "Message",
    "NakError",
    "NoResponse",
    "PortBusy",
    "PortNotFound",
    "PortPermission",
    "ProtocolError",
    "RawFrame",
    "SampleRecord",
    "UnknownType",
    "VersionMismatch",
    "cobs_decode",
    "cobs_encode",
    "crc16_ccitt_false",
    "decode",
    "encode",
    "encode_frame",
]
