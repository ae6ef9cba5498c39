"""Every registered message encodes and decodes to itself; layouts and registry rules."""

from __future__ import annotations

import dataclasses
import re
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from protocol import messages as m
from protocol.errors import BadLength, UnknownType
from protocol.framing import MAX_PAYLOAD, FrameDecoder, RawFrame

_INT_RANGES = {"B": 0xFF, "H": 0xFFFF, "I": 0xFFFFFFFF}


def _field_codes(fmt: str) -> list[tuple[str, int]]:
    out: list[tuple[str, int]] = []
    for count, code in re.findall(r"(\d*)([a-zA-Z])", fmt.lstrip("<")):
        n = int(count or "1")
        out.extend([(code, n)] if code == "s" else [(code, 1)] * n)
    return out


def _strategy(code: str, size: int) -> st.SearchStrategy[object]:
    if code in _INT_RANGES:
        return st.integers(0, _INT_RANGES[code])
    if code == "f":
        # float32 values (width=32) survive the round trip exactly; NaN never compares equal.
        return st.floats(width=32, allow_nan=False)
    if code == "s":
        return st.text(st.characters(min_codepoint=1, max_codepoint=0x2FF), max_size=size).filter(
            lambda s: len(s.encode()) <= size
        )
    raise AssertionError(f"no strategy for struct code {code!r}")


def message_strategy(cls: type[m.Message]) -> st.SearchStrategy[m.Message]:
    codes = _field_codes(cls.FORMAT)
    return st.builds(cls, *[_strategy(c, n) for c, n in codes])


ALL = sorted(m.REGISTRY.values(), key=lambda c: c.TYPE)
any_message = st.one_of([message_strategy(c) for c in ALL])


def test_registry_is_complete_and_ids_in_range() -> None:
    names = {c.__name__ for c in ALL}
    assert names == {
        "Hello", "Ping", "Stop", "ClearFault", "SetLimits", "GetLimits", "Stream", "SetOutput",
        "StartRelay", "SetPid", "SetSetpoint", "SetOffset", "StoreGains", "HelloReply", "Ack",
        "Nak", "Pong", "Limits", "Stopped", "Sample", "Fault",
    }
    for cls in ALL:
        assert m.REGISTRY[cls.TYPE] is cls
        assert 0x01 <= cls.TYPE <= 0x3F or 0x80 <= cls.TYPE <= 0xBF
        assert cls.payload_size() == struct.calcsize(cls.FORMAT) <= MAX_PAYLOAD
        assert len(dataclasses.fields(cls)) == len(_field_codes(cls.FORMAT))


@pytest.mark.parametrize("cls", ALL, ids=lambda c: c.__name__)
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_every_message_round_trips(cls: type[m.Message], data: st.DataObject) -> None:
    msg = data.draw(message_strategy(cls))
    seq = data.draw(st.integers(0, 0xFFFF))
    assert cls.unpack(msg.pack()) == msg
    wire = m.encode(msg, seq)
    assert wire.endswith(b"\x00") and wire.count(0) == 1
    frames = FrameDecoder().feed(wire)
    assert len(frames) == 1 and frames[0].type == cls.TYPE and frames[0].seq == seq
    assert m.decode(frames[0]) == msg


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.lists(st.tuples(any_message, st.integers(0, 0xFFFF)), max_size=20), st.data())
def test_a_stream_of_messages_in_random_chunks(
    msgs: list[tuple[m.Message, int]], data: st.DataObject
) -> None:
    wire = b"".join(m.encode(msg, seq) for msg, seq in msgs)
    cuts = sorted(data.draw(st.lists(st.integers(0, len(wire)), max_size=10)))
    dec = FrameDecoder()
    frames: list[RawFrame] = []
    for a, b in zip([0, *cuts], [*cuts, len(wire)], strict=True):
        frames += dec.feed(wire[a:b])
    assert [(m.decode(f), f.seq) for f in frames] == msgs
    assert dec.crc_errors == dec.framing_errors == 0


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.floats(allow_nan=False, allow_infinity=False, min_value=-1e30, max_value=1e30))
def test_float_fields_are_float32(x: float) -> None:
    # IEEE-754 binary32: the decoded value is the nearest float32, struct's rounding.
    back = m.SetOutput.unpack(m.SetOutput(0, x).pack()).output
    assert back == struct.unpack("<f", struct.pack("<f", x))[0]
    # Half an ulp: relative 2**-24 for normal numbers, 2**-150 absolute for subnormal ones.
    assert abs(back - x) <= max(abs(x) * 2.0**-24, 2.0**-150)


def test_text_fields() -> None:
    r = m.HelloReply(device_name="cart-wheel sim", firmware="v1.2")
    assert m.HelloReply.unpack(r.pack()).device_name == "cart-wheel sim"
    with pytest.raises(ValueError):
        m.HelloReply(device_name="x" * 17).pack()


def test_out_of_range_fields_raise_valueerror() -> None:
    with pytest.raises(ValueError):
        m.SetOutput(axis=256, output=0.0).pack()
    with pytest.raises(ValueError):
        m.Ping(nonce=-1).pack()


def test_decode_errors() -> None:
    with pytest.raises(UnknownType) as unknown:
        m.decode(RawFrame(0x7F, 0, b""))
    assert unknown.value.msg_type == 0x7F
    with pytest.raises(BadLength) as bad:
        m.decode(RawFrame(m.SetOutput.TYPE, 0, b"\x00\x00"))
    assert (bad.value.got, bad.value.expected) == (2, 5)


def test_layout_sizes_match_spec() -> None:
    # Payload sizes as tabulated in protocol/SPEC.md.
    sizes = {
        "Hello": 2, "Ping": 8, "Stop": 0, "ClearFault": 0, "SetLimits": 19, "GetLimits": 1,
        "Stream": 4, "SetOutput": 5, "StartRelay": 21, "SetPid": 33, "SetSetpoint": 5,
        "SetOffset": 5, "StoreGains": 13, "HelloReply": 48, "Ack": 1, "Nak": 6, "Pong": 16,
        "Limits": 19, "Stopped": 0, "Sample": 19, "Fault": 10,
    }
    assert {c.__name__: c.payload_size() for c in ALL} == sizes


def test_expected_replies() -> None:
    assert m.expected_reply(m.Hello.TYPE) == m.HelloReply.TYPE
    assert m.expected_reply(m.Ping.TYPE) == m.Pong.TYPE
    assert m.expected_reply(m.GetLimits.TYPE) == m.Limits.TYPE
    assert m.expected_reply(m.Stop.TYPE) == m.Stopped.TYPE
    assert m.expected_reply(m.SetOutput.TYPE) == m.Ack.TYPE
    host = {c.TYPE for c in ALL if c.TYPE < 0x80}
    device = {c.TYPE for c in ALL if c.TYPE >= 0x80}
    assert device == m.RESPONSE_TYPES | m.UNSOLICITED_TYPES
    assert all(m.expected_reply(t) in m.RESPONSE_TYPES for t in host)


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(
    st.sampled_from(list(m.Mode)),
    st.booleans(), st.booleans(), st.booleans(), st.booleans(), st.booleans(), st.booleans(),
)
def test_flags_round_trip(
    mode: m.Mode, s: bool, f: bool, c: bool, w: bool, lim: bool, r: bool
) -> None:
    flags = m.make_flags(
        mode, streaming=s, fault=f, clamped=c, watchdog_armed=w, limits_set=lim, relay_high=r
    )
    assert 0 <= flags <= 0xFFFF
    assert m.flags_mode(flags) is mode
    assert bool(flags & m.FLAG_STREAMING) == s
    assert bool(flags & m.FLAG_FAULT) == f
    assert bool(flags & m.FLAG_CLAMPED) == c
    assert bool(flags & m.FLAG_WATCHDOG_ARMED) == w
    assert bool(flags & m.FLAG_LIMITS_SET) == lim
    assert bool(flags & m.FLAG_RELAY_HIGH) == r


def test_is_finite() -> None:
    assert m.SetOutput(0, 1.0).is_finite()
    assert not m.SetOutput(0, float("nan")).is_finite()
    assert not m.SetPid(0, kp=float("inf")).is_finite()


def test_spec_worked_example_matches_the_code() -> None:
    # protocol/SPEC.md section 10 pastes these bytes; they must stay what the code produces.
    from pathlib import Path

    spec = (Path(__file__).parents[1] / "protocol" / "SPEC.md").read_text()
    flags = m.make_flags(m.Mode.HOST, streaming=True, watchdog_armed=True, limits_set=True)
    assert flags == 0x00C3
    cases = [
        (m.SetOutput(0, 12.5), 0x0102, "04 08 02 01 01 01 05 48 41 27 D6 00"),
        (
            m.Sample(0, 1_500_000, 0.75, 12.5, 0.0, flags),
            0x0007,
            "03 90 07 01 04 60 E3 16 01 01 03 40 3F 01 03 48 41 01 01 01 02 C3 03 8A 9E 00",
        ),
        (m.Hello(1), 0, "02 01 01 02 01 03 6C 88 00"),
    ]
    for msg, seq, wire in cases:
        assert m.encode(msg, seq).hex(" ").upper() == wire
        assert wire in spec


def test_hello_reply_of_version_1_reads_without_resolution() -> None:
    # SPEC.md section 9: HelloReply grows only at its end; a version-1 reply (44 bytes) reads
    # with pv_resolution = 0 (not declared), a version-2 reply carries it at offset 44.
    r = m.HelloReply(protocol_version=1, device_name="old", tick_us=2000, pv_resolution=0.5)
    assert len(r.pack()) == 48 and len(r.pack_v1()) == m.HELLO_REPLY_V1_SIZE == 44
    old = m.HelloReply.unpack(r.pack_v1())
    assert old.pv_resolution == 0.0 and old.device_name == "old" and old.tick_us == 2000
    assert m.HelloReply.unpack(r.pack()).pv_resolution == 0.5
    with pytest.raises(BadLength):
        m.HelloReply.unpack(r.pack()[:46])
