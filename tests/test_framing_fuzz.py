"""Fuzzing the frame decoder and the link's receive path: no exception escapes, corrupted
frames are rejected and counted.

Detection properties used (CRC-16/CCITT, generator 0x1021 = (x+1)(x^15+x^14+x^13+x^12+x^4+x^3+x^2+x+1),
from the published literature on CRC error detection, e.g. Koopman and Chakravarty, "Cyclic
Redundancy Code (CRC) Polynomial Selection for Embedded Networks", DSN 2004): every error of
1, 2 or 3 bits and every burst of at most 16 bits is detected for data words up to 32751 bits;
our frames are at most 256 bytes (2048 bits).
"""

from __future__ import annotations

import contextlib

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from protocol import messages as m
from protocol.cobs import cobs_encode
from protocol.errors import DecodeError
from protocol.framing import (
    MAX_ENCODED,
    MAX_FRAME,
    FrameDecoder,
    RawFrame,
    build_raw_frame,
    encode_frame,
)
from protocol.link import Link

from .test_messages import any_message

# Derandomized: the same examples on every run, so CI is reproducible.
FUZZ = settings(
    max_examples=300, derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)

frames_st = st.tuples(any_message, st.integers(0, 0xFFFF))


def _flip(data: bytes, bits: list[int]) -> bytes:
    out = bytearray(data)
    for b in bits:
        out[b // 8] ^= 0x80 >> (b % 8)
    return bytes(out)


def _raw(msg: m.Message, seq: int) -> bytes:
    return build_raw_frame(msg.TYPE, seq, msg.pack())


# ------------------------------------------------------------------ decoder robustness


@FUZZ
@given(st.binary(max_size=2000), st.lists(st.integers(1, 64), max_size=40))
def test_random_bytes_never_raise(data: bytes, chunks: list[int]) -> None:
    dec = FrameDecoder()
    pos = 0
    for n in [*chunks, len(data)]:
        for frame in dec.feed(data[pos : pos + n]):
            assert isinstance(frame, RawFrame)
        pos += n
    assert dec.bytes_received == len(data)


@FUZZ
@given(st.lists(frames_st, min_size=1, max_size=8), st.lists(st.binary(max_size=40), max_size=8))
def test_good_frames_survive_garbage_between_delimiters(
    msgs: list[tuple[m.Message, int]], garbage: list[bytes]
) -> None:
    # Garbage followed by a delimiter costs at most that garbage: the next frame is intact.
    wire = b""
    for i, (msg, seq) in enumerate(msgs):
        if i < len(garbage):
            wire += garbage[i] + b"\x00"
        wire += m.encode(msg, seq)
    dec = FrameDecoder()
    decoded = [(m.decode(f), f.seq) for f in dec.feed(wire) if f.type in m.REGISTRY]
    for item in msgs:
        assert item in decoded


@FUZZ
@given(frames_st, st.data())
def test_truncated_frame_is_rejected_and_next_frame_survives(
    item: tuple[m.Message, int], data: st.DataObject
) -> None:
    msg, seq = item
    wire = m.encode(msg, seq)[:-1]
    cut = data.draw(st.integers(0, len(wire) - 1))
    dec = FrameDecoder()
    frames = dec.feed(wire[:cut] + b"\x00" + m.encode(m.Ack(7), 9))
    assert [(m.decode(f), f.seq) for f in frames] == [(m.Ack(7), 9)]
    assert dec.crc_errors + dec.framing_errors == (1 if cut else 0)


def test_oversize_frame_is_discarded_up_to_the_next_delimiter() -> None:
    dec = FrameDecoder()
    junk = b"\x01" * (MAX_ENCODED + 50)
    out = []
    for i in range(0, len(junk), 7):
        out += dec.feed(junk[i : i + 7])
    out += dec.feed(b"\x00" + m.encode(m.Ack(1), 2))
    assert out == [RawFrame(m.Ack.TYPE, 2, b"\x01")]
    assert dec.framing_errors == 1
    # And in one piece, longer than a raw frame may be:
    dec2 = FrameDecoder()
    big = cobs_encode(b"\x05" * (MAX_FRAME + 1)) + b"\x00"
    assert dec2.feed(big) == [] and dec2.framing_errors == 1


def test_short_frame_is_a_framing_error() -> None:
    dec = FrameDecoder()
    assert dec.feed(cobs_encode(b"\x81\x00\x00\x00") + b"\x00") == []
    assert dec.framing_errors == 1


def test_empty_frames_are_ignored() -> None:
    dec = FrameDecoder()
    assert dec.feed(b"\x00\x00\x00") == []
    assert dec.framing_errors == dec.crc_errors == 0


# ------------------------------------------------------------------ CRC detection properties


def test_every_single_bit_flip_of_a_raw_frame_is_a_crc_error() -> None:
    # Exhaustive over every bit of frames of several types (CRC detects all 1-bit errors).
    for msg in (m.Sample(0, 123456, 1.5, -2.0, 3.0, 0x41), m.HelloReply(device_name="x"), m.Stop()):
        raw = _raw(msg, 0x1234)
        dec = FrameDecoder()
        for bit in range(len(raw) * 8):
            assert dec.feed(cobs_encode(_flip(raw, [bit])) + b"\x00") == []
        assert dec.crc_errors == len(raw) * 8 and dec.framing_errors == 0


@FUZZ
@given(frames_st, st.data())
def test_two_and_three_bit_flips_are_crc_errors(item: tuple[m.Message, int], data: st.DataObject) -> None:
    raw = _raw(*item)
    n = data.draw(st.integers(2, 3))
    bits = data.draw(st.lists(st.integers(0, len(raw) * 8 - 1), min_size=n, max_size=n, unique=True))
    dec = FrameDecoder()
    assert dec.feed(cobs_encode(_flip(raw, bits)) + b"\x00") == []
    assert dec.crc_errors == 1


@FUZZ
@given(frames_st, st.data())
def test_bursts_up_to_16_bits_are_crc_errors(item: tuple[m.Message, int], data: st.DataObject) -> None:
    raw = _raw(*item)
    length = data.draw(st.integers(1, 16))
    start = data.draw(st.integers(0, len(raw) * 8 - length))
    # A burst of length L: first and last bit flipped, the ones between arbitrary.
    inner = data.draw(st.integers(0, (1 << max(0, length - 2)) - 1))
    bits = [start] + ([start + length - 1] if length > 1 else [])
    bits += [start + 1 + i for i in range(length - 2) if inner >> i & 1]
    dec = FrameDecoder()
    assert dec.feed(cobs_encode(_flip(raw, bits)) + b"\x00") == []
    assert dec.crc_errors == 1


def test_all_16_bit_bursts_over_a_sample_frame() -> None:
    # Exhaustive over positions, for the all-ones 16-bit burst and a fixed pattern.
    raw = _raw(m.Sample(0, 99, 0.25, 10.0, 0.0, 3), 77)
    dec = FrameDecoder()
    count = 0
    for start in range(len(raw) * 8 - 16 + 1):
        for inner in (0x3FFF, 0x1555, 0):
            bits = [start, start + 15] + [start + 1 + i for i in range(14) if inner >> i & 1]
            assert dec.feed(cobs_encode(_flip(raw, bits)) + b"\x00") == []
            count += 1
    assert dec.crc_errors == count


# ------------------------------------------------------------------ corruption on the wire


def _wire_corruption_case(msg: m.Message, seq: int, bits: list[int]) -> None:
    """Flip bits of the COBS bytes of a frame (not its delimiter), follow with a good frame.

    A flip in a COBS data byte is the same flip in the raw frame (caught by the CRC); a flip
    that creates a 0x00 splits the frame, and one in a code byte moves the block structure:
    the pieces are then rejected by the strict COBS decoder, the length check or the CRC.
    Whatever happens, nothing but the following good frame may come out as a valid message,
    and the loss is counted.
    """
    wire = m.encode(msg, seq)
    body = _flip(wire[:-1], bits)
    dec = FrameDecoder()
    frames = dec.feed(body + b"\x00" + m.encode(m.Ack(5), 4242))
    good = []
    for f in frames:
        with contextlib.suppress(DecodeError):
            good.append((m.decode(f), f.seq))
    assert good == [(m.Ack(5), 4242)]
    assert dec.crc_errors + dec.framing_errors + (len(frames) - 1) >= 1


@FUZZ
@given(frames_st, st.data())
def test_wire_bit_flips_are_rejected(item: tuple[m.Message, int], data: st.DataObject) -> None:
    msg, seq = item
    nbits = (len(m.encode(msg, seq)) - 1) * 8
    n = data.draw(st.integers(1, 3))
    bits = data.draw(st.lists(st.integers(0, nbits - 1), min_size=n, max_size=n, unique=True))
    _wire_corruption_case(msg, seq, bits)


@FUZZ
@given(frames_st, st.data())
def test_wire_bursts_are_rejected(item: tuple[m.Message, int], data: st.DataObject) -> None:
    msg, seq = item
    nbits = (len(m.encode(msg, seq)) - 1) * 8
    length = data.draw(st.integers(1, min(16, nbits)))
    start = data.draw(st.integers(0, nbits - length))
    pattern = data.draw(st.integers(0, (1 << length) - 1)) | 1 | (1 << (length - 1))
    _wire_corruption_case(msg, seq, [start + i for i in range(length) if pattern >> i & 1])


def test_every_single_wire_bit_flip_of_some_frames() -> None:
    for msg, seq in ((m.Sample(0, 1, 2.0, 3.0, 4.0, 5), 1), (m.Pong(1, 2, 3, 4), 0), (m.Stopped(), 7)):
        nbits = (len(m.encode(msg, seq)) - 1) * 8
        for bit in range(nbits):
            _wire_corruption_case(msg, seq, [bit])


def test_lost_delimiter_merges_two_frames_and_is_counted() -> None:
    a = m.encode(m.Sample(0, 1, 1.0, 0.0, 0.0, 0), 1)[:-1] + b"\x01"  # delimiter corrupted
    b = m.encode(m.Sample(0, 2, 1.0, 0.0, 0.0, 0), 2)
    c = m.encode(m.Sample(0, 3, 1.0, 0.0, 0.0, 0), 3)
    dec = FrameDecoder()
    frames = dec.feed(a + b + c)
    assert [f.seq for f in frames] == [3]
    assert dec.crc_errors + dec.framing_errors == 1


# ------------------------------------------------------------------ the link's receive path


@settings(max_examples=150, derandomize=True, deadline=None)
@given(
    st.lists(
        st.one_of(
            st.binary(max_size=80),
            frames_st.map(lambda it: m.encode(*it)),
            st.tuples(frames_st, st.integers(0, 400)).map(
                lambda t: _flip(m.encode(*t[0]), [t[1] % ((len(m.encode(*t[0])) - 1) * 8)])
            ),
            st.tuples(frames_st, st.integers(1, 60)).map(lambda t: m.encode(*t[0])[: t[1]]),
        ),
        max_size=30,
    )
)
def test_link_receive_path_never_raises(chunks: list[bytes]) -> None:
    link = Link("loop://", silence_timeout=None)
    try:
        for chunk in chunks:
            link._on_bytes(chunk, 0.0)
        link._on_bytes(b"\x00" + m.encode(m.Sample(0, 5, 1.0, 2.0, 3.0, 0), 1), 0.0)
        stats = link.stats()
        assert stats.frames_good == stats.samples_received + stats.unmatched + stats.decode_errors + link.faults.qsize()
        assert not link.lost
        samples = link.drain_samples()
        assert samples and samples[-1].pv == 1.0
    finally:
        link.close()


def test_link_counts_corrupted_frames_through_a_real_port() -> None:
    # Bytes travel through pyserial's loop:// port into the reader thread.
    link = Link("loop://", silence_timeout=None)
    try:
        good = m.encode(m.Sample(0, 10, 1.0, 0.0, 0.0, 0), 0)
        bad_crc = _flip(good[:-1], [30]) + b"\x00"
        bad_cobs = b"\x09\x01\x02\x00"
        unknown = encode_frame(0xBE, 1, b"")
        link._ser.write(bad_crc + bad_cobs + unknown + m.encode(m.Sample(0, 20, 2.0, 0.0, 0.0, 0), 3))
        rec = link.next_sample(timeout=2.0)
        assert rec is not None and rec.pv == 2.0
        s = link.stats()
        assert (s.crc_errors, s.framing_errors, s.decode_errors) == (1, 1, 1)
        assert s.errors == 3
    finally:
        link.close()
