"""Consistent Overhead Byte Stuffing (own implementation).

Reference: S. Cheshire and M. Baker, "Consistent Overhead Byte Stuffing",
IEEE/ACM Transactions on Networking 7(2):159-172, April 1999.

The encoded data contains no 0x00 byte, so 0x00 can delimit frames. The encoding is a
sequence of blocks ``code, data[code - 1]``: a block with ``code < 0xFF`` stands for its
``code - 1`` data bytes followed by a zero (the zero after the last block is implied and
dropped); ``code == 0xFF`` stands for 254 data bytes not followed by a zero.
Overhead: at most one byte per 254 bytes of data, plus one.
"""

from __future__ import annotations

from protocol.errors import CobsError

_MAX_RUN = 254


def cobs_encode(data: bytes | bytearray | memoryview) -> bytes:
    """Encode ``data`` (any bytes) into COBS; the result has no 0x00 and no delimiter."""
    out = bytearray()
    blocks = bytes(data).split(b"\x00")
    last_index = len(blocks) - 1
    for index, block in enumerate(blocks):
        full_run = False
        while len(block) >= _MAX_RUN:
            out.append(0xFF)
            out += block[:_MAX_RUN]
            block = block[_MAX_RUN:]
            full_run = True
        if full_run and not block and index == last_index:
            # The data ends right after a 254-byte run: code 0xFF already says "no zero
            # follows", so no trailing empty block is written.
            continue
        out.append(len(block) + 1)
        out += block
    return bytes(out)


def cobs_decode(data: bytes | bytearray | memoryview) -> bytes:
    """Decode one COBS-encoded frame (without its 0x00 delimiter).

    Strict: raises CobsError on an empty input, a 0x00 inside the data, or a block that runs
    past the end of the input.
    """
    data = bytes(data)
    n = len(data)
    if n == 0:
        raise CobsError("empty COBS frame")
    out = bytearray()
    i = 0
    while i < n:
        code = data[i]
        if code == 0:
            raise CobsError(f"zero byte at offset {i}")
        end = i + code
        if end > n:
            raise CobsError(f"block at offset {i} runs {end - n} bytes past the end")
        chunk = data[i + 1 : end]
        if 0 in chunk:
            raise CobsError("zero byte inside a block")
        out += chunk
        i = end
        if code != 0xFF and i < n:
            out.append(0)
    return bytes(out)
