"""Frames: type, sequence number, payload and CRC, COBS-encoded and 0x00-delimited.

Raw frame (before COBS), all little-endian::

    offset 0       type     u8
    offset 1       seq      u16
    offset 3       payload  0..MAX_PAYLOAD bytes
    offset 3+n     crc      u16   CRC-16/CCITT-FALSE over bytes 0..3+n-1

On the wire: ``cobs_encode(raw) + b"\\x00"``.
"""

from __future__ import annotations

import struct
from typing import NamedTuple

from protocol.cobs import cobs_decode, cobs_encode
from protocol.crc import crc16_ccitt_false
from protocol.errors import CobsError

MAX_FRAME = 256
"""Largest raw frame (type + seq + payload + crc), bytes."""
HEADER_SIZE = 3
CRC_SIZE = 2
MIN_FRAME = HEADER_SIZE + CRC_SIZE
MAX_PAYLOAD = MAX_FRAME - MIN_FRAME
MAX_ENCODED = MAX_FRAME + (MAX_FRAME + 253) // 254
"""Largest COBS-encoded frame, bytes, without the delimiter."""
DELIMITER = b"\x00"

_HEADER = struct.Struct("<BH")
_CRC = struct.Struct("<H")


class RawFrame(NamedTuple):
    """A frame that passed COBS and CRC checks; ``payload`` is not yet interpreted."""

    type: int
    seq: int
    payload: bytes


def build_raw_frame(msg_type: int, seq: int, payload: bytes) -> bytes:
    """Raw frame bytes (header, payload, CRC), before COBS."""
    if not 0 <= msg_type <= 0xFF:
        raise ValueError(f"message type {msg_type} out of range 0..255")
    if len(payload) > MAX_PAYLOAD:
        raise ValueError(f"payload of {len(payload)} bytes exceeds {MAX_PAYLOAD}")
    body = _HEADER.pack(msg_type, seq & 0xFFFF) + payload
    return body + _CRC.pack(crc16_ccitt_false(body))


def encode_frame(msg_type: int, seq: int, payload: bytes) -> bytes:
    """Wire bytes of one frame, including the trailing 0x00 delimiter. ``seq`` is taken mod 2**16."""
    return cobs_encode(build_raw_frame(msg_type, seq, payload)) + DELIMITER


def parse_raw_frame(raw: bytes) -> RawFrame | None:
    """Check length and CRC of a decoded raw frame; None when the CRC does not match.

    Raises ValueError when the frame is too short or too long.
    """
    if len(raw) < MIN_FRAME or len(raw) > MAX_FRAME:
        raise ValueError(f"raw frame of {len(raw)} bytes")
    (crc,) = _CRC.unpack_from(raw, len(raw) - CRC_SIZE)
    if crc16_ccitt_false(memoryview(raw)[: len(raw) - CRC_SIZE]) != crc:
        return None
    msg_type, seq = _HEADER.unpack_from(raw, 0)
    return RawFrame(msg_type, seq, bytes(raw[HEADER_SIZE : len(raw) - CRC_SIZE]))


class FrameDecoder:
    """Incremental decoder: feed it bytes in any chunks, get back whole good frames.

    Never raises on bad input. Counters:
    ``frames_good``; ``crc_errors`` (COBS valid, CRC wrong); ``framing_errors`` (invalid
    COBS, frame too short, or too long: bytes beyond MAX_ENCODED without a delimiter are
    discarded up to the next delimiter and count as one error). Empty frames (two 0x00 in a
    row, e.g. a sender flushing the line) are ignored and not counted.
    """

    def __init__(self) -> None:
        self._buf = bytearray()
        self._discarding = False
        self.frames_good = 0
        self.crc_errors = 0
        self.framing_errors = 0
        self.bytes_received = 0

    def reset(self) -> None:
        """Drop any partial frame (counters are kept)."""
        self._buf.clear()
        self._discarding = False

    def feed(self, data: bytes | bytearray | memoryview) -> list[RawFrame]:
        """Consume ``data``; return the good frames completed by it, in order."""
        self.bytes_received += len(data)
        frames: list[RawFrame] = []
        if DELIMITER not in data:
            if not self._discarding:
                self._buf += data
                if len(self._buf) > MAX_ENCODED:
                    self._buf.clear()
                    self._discarding = True
                    self.framing_errors += 1
            return frames
        parts = bytes(data).split(DELIMITER)
        for i, part in enumerate(parts[:-1]):
            if i == 0:
                if self._discarding:
                    self._discarding = False
                    self._buf.clear()
                    continue
                if self._buf:
                    self._buf += part
                    part = bytes(self._buf)
                    self._buf.clear()
            self._complete(part, frames)
        tail = parts[-1]
        if len(tail) > MAX_ENCODED:
            self._discarding = True
            self.framing_errors += 1
        else:
            self._buf += tail
        return frames

    def _complete(self, encoded: bytes, frames: list[RawFrame]) -> None:
        if not encoded:
            return
        if len(encoded) > MAX_ENCODED:
            self.framing_errors += 1
            return
        try:
            raw = cobs_decode(encoded)
        except CobsError:
            self.framing_errors += 1
            return
        if len(raw) < MIN_FRAME or len(raw) > MAX_FRAME:
            self.framing_errors += 1
            return
        frame = parse_raw_frame(raw)
        if frame is None:
            self.crc_errors += 1
            return
        self.frames_good += 1
        frames.append(frame)
