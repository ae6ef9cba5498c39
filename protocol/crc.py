"""CRC-16/CCITT-FALSE, the frame check sequence of the wire protocol.

Parameters (published CRC catalogue, "CRC-16/IBM-3740", alias CRC-16/CCITT-FALSE):
width 16, poly 0x1021, init 0xFFFF, refin false, refout false, xorout 0x0000,
check value 0x29B1 for the ASCII bytes b"123456789".
"""

from __future__ import annotations

import binascii

CRC_CHECK_VALUE = 0x29B1
"""CRC of b"123456789" (published CRC catalogue check value)."""


def crc16_ccitt_false(data: bytes | bytearray | memoryview, crc: int = 0xFFFF) -> int:
    """Return the CRC-16/CCITT-FALSE of ``data`` (an int in 0..0xFFFF).

    ``crc`` lets a caller continue a running CRC over several pieces.
    """
    return binascii.crc_hqx(data, crc)


def crc16_ccitt_false_bitwise(data: bytes | bytearray | memoryview, crc: int = 0xFFFF) -> int:
    """Bit-by-bit reference implementation (what a firmware author would write); slow."""
    for byte in bytes(data):
        crc ^= byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) & 0xFFFF if crc & 0x8000 else (crc << 1) & 0xFFFF
    return crc
