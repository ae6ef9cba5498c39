"""CRC-16/CCITT-FALSE and COBS against published values."""

from __future__ import annotations

import contextlib
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from protocol.cobs import cobs_decode, cobs_encode
from protocol.crc import CRC_CHECK_VALUE, crc16_ccitt_false, crc16_ccitt_false_bitwise
from protocol.errors import CobsError


def test_crc_check_value() -> None:
    # Published CRC catalogue (CRC-16/IBM-3740 a.k.a. CRC-16/CCITT-FALSE): check = 0x29B1.
    assert CRC_CHECK_VALUE == 0x29B1
    assert crc16_ccitt_false(b"123456789") == 0x29B1
    assert crc16_ccitt_false_bitwise(b"123456789") == 0x29B1


def test_crc_of_empty_is_init() -> None:
    # Catalogue parameters: init 0xFFFF, xorout 0 -> the CRC of no data is the init value.
    assert crc16_ccitt_false(b"") == 0xFFFF


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.binary(max_size=300))
def test_crc_table_and_bitwise_agree(data: bytes) -> None:
    assert crc16_ccitt_false(data) == crc16_ccitt_false_bitwise(data)


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.binary(max_size=100), st.binary(max_size=100))
def test_crc_is_incremental(a: bytes, b: bytes) -> None:
    assert crc16_ccitt_false(b, crc16_ccitt_false(a)) == crc16_ccitt_false(a + b)


# Examples of Cheshire and Baker, "Consistent Overhead Byte Stuffing", IEEE/ACM Trans.
# Networking 7(2), 1999 (encoded form shown without the 0x00 frame delimiter).
PAPER_EXAMPLES = [
    (bytes.fromhex("00"), bytes.fromhex("0101")),
    (bytes.fromhex("0000"), bytes.fromhex("010101")),
    (bytes.fromhex("11220033"), bytes.fromhex("0311220233")),
    (bytes.fromhex("11223344"), bytes.fromhex("0511223344")),
    # 254 non-zero bytes: one maximal block, code 0xFF ("254 data bytes, no zero follows").
    (bytes(range(1, 255)), b"\xff" + bytes(range(1, 255))),
]

# Further cases derived from the paper's encoding rule (code byte = distance to the next
# zero, 0xFF = 254 bytes with no zero); the expected bytes were worked out by hand.
RULE_EXAMPLES = [
    (b"", b"\x01"),
    (bytes.fromhex("001100"), bytes.fromhex("01021101")),
    (bytes.fromhex("11000000"), bytes.fromhex("0211010101")),
    (bytes(range(0, 255)), b"\x01\xff" + bytes(range(1, 255))),
    (bytes(range(1, 256)), b"\xff" + bytes(range(1, 255)) + b"\x02\xff"),
    (bytes(range(2, 256)) + b"\x00", b"\xff" + bytes(range(2, 256)) + b"\x01\x01"),
    (bytes(range(3, 256)) + b"\x00\x01", b"\xfe" + bytes(range(3, 256)) + b"\x02\x01"),
]


@pytest.mark.parametrize(("raw", "encoded"), PAPER_EXAMPLES + RULE_EXAMPLES)
def test_cobs_examples(raw: bytes, encoded: bytes) -> None:
    assert cobs_encode(raw) == encoded
    assert cobs_decode(encoded) == raw


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.binary(max_size=1200))
def test_cobs_round_trip_and_overhead(data: bytes) -> None:
    enc = cobs_encode(data)
    assert 0 not in enc
    assert cobs_decode(enc) == data
    # Cheshire and Baker 1999: worst-case overhead is one byte per 254 bytes (rounded up),
    # plus the leading code byte.
    assert len(data) + 1 <= len(enc) <= len(data) + 1 + math.ceil(len(data) / 254)


@pytest.mark.parametrize(
    "bad",
    [b"", b"\x00", b"\x03\x11", b"\x05\x11\x22\x33", b"\x02\x00", b"\x03\x11\x00", b"\x01\x00\x01"],
)
def test_cobs_rejects_invalid(bad: bytes) -> None:
    with pytest.raises(CobsError):
        cobs_decode(bad)


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.binary(max_size=300))
def test_cobs_decode_never_raises_anything_else(data: bytes) -> None:
    with contextlib.suppress(CobsError):
        cobs_decode(data)
