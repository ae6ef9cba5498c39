"""The protocol contract (protocol/SPEC.md) on both boards: handshake, limits, Naks, stop,
decimation, bad frames. Each test runs against the mock device and against board-sim."""

from __future__ import annotations

import math
import re
import time
from typing import Any

import pytest

from protocol import messages as m
from protocol.cobs import cobs_encode
from protocol.errors import NakError
from protocol.framing import build_raw_frame, encode_frame
from protocol.link import Link
from tests.conformance.conftest import f32, raw_request

LIMITS = m.SetLimits(0, 30.0, -10.0, 10.0, 0.0, 1000)


def nak_of(link: Link, msg: m.Message) -> tuple[int, float]:
    """(code, detail) of the Nak the board answers ``msg`` with (fails if it accepts it)."""
    with pytest.raises(NakError) as err:
        link.request(msg)
    return err.value.code, err.value.detail


def samples(link: Link, n: int, timeout: float = 5.0) -> list[Any]:
    out = []
    deadline = time.monotonic() + timeout
    while len(out) < n and time.monotonic() < deadline:
        rec = link.next_sample(timeout=0.5)
        if rec is not None:
            out.append(rec)
    assert len(out) == n, f"only {len(out)} of {n} samples"
    return out


def test_handshake(board, open_link) -> None:
    b = board(resolution=0.05)
    info = open_link(b).handshake()
    assert info.protocol_version == m.PROTOCOL_VERSION == 2
    assert info.tick_us == 10000 and info.axis_count == 1 and info.max_output == 100.0
    assert info.has_host_loop and info.has_device_relay and info.has_device_pid
    assert info.has_store_gains
    assert info.pv_resolution == f32(0.05)  # the sensor step the board declares
    assert info.boot_id != 0


def test_version_mismatch(board, open_link) -> None:
    link = open_link(board())
    for other in (1, 3, 0xFFFF):
        assert nak_of(link, m.Hello(other)) == (m.NakCode.BAD_VERSION, 2.0)
    assert link.handshake().protocol_version == 2  # nothing else changed


def test_limits_read_back(board, open_link) -> None:
    link = open_link(board())
    link.handshake()
    assert nak_of(link, m.GetLimits(0)) == (m.NakCode.LIMITS_NOT_SET, 0.0)
    for lim in (m.SetLimits(0, 12.5, -1.25, 3.75, 2.5, 1234), m.SetLimits(0, 100.0, -1e6, 1e6,
                                                                           0.0, 0)):
        assert isinstance(link.request(lim), m.Ack)
        back = link.request(m.GetLimits(0))
        assert isinstance(back, m.Limits)
        assert (back.axis, back.output_limit, back.pv_low, back.pv_high, back.pv_rate_limit,
                back.watchdog_ms) == (0, f32(lim.output_limit), f32(lim.pv_low),
                                      f32(lim.pv_high), f32(lim.pv_rate_limit), lim.watchdog_ms)


NAN = math.nan

# (request, code, detail): every range rule of SPEC.md section 5, in the order of its checks
BEFORE_LIMITS = [
    (m.SetOutput(0, 1.0), m.NakCode.LIMITS_NOT_SET, 0.0),
    (m.StartRelay(0, 0.0, 0.0, 1.0, 1.0, 0.0), m.NakCode.LIMITS_NOT_SET, 0.0),
    (m.SetPid(0, 1.0, 0.0, 0.0, 1.0, 10.0, 0.0, 0.0, 0.0), m.NakCode.LIMITS_NOT_SET, 0.0),
    (m.SetOffset(0, 1.0), m.NakCode.LIMITS_NOT_SET, 0.0),
    (m.GetLimits(0), m.NakCode.LIMITS_NOT_SET, 0.0),
]
AFTER_LIMITS = [
    # type and length
    (raw_request(0x0E), m.NakCode.UNKNOWN_TYPE, 14.0),
    (raw_request(0x3F, b"\x00"), m.NakCode.UNKNOWN_TYPE, 63.0),
    (raw_request(0x90, bytes(19)), m.NakCode.UNKNOWN_TYPE, 144.0),  # a device-to-host type
    (raw_request(m.SetOutput.TYPE, bytes(4)), m.NakCode.BAD_LENGTH, 5.0),
    (raw_request(m.Stop.TYPE, b"\x01"), m.NakCode.BAD_LENGTH, 0.0),
    (raw_request(m.SetPid.TYPE, bytes(200)), m.NakCode.BAD_LENGTH, 33.0),
    (raw_request(m.Hello.TYPE, b"\x02"), m.NakCode.BAD_LENGTH, 2.0),
    # axis
    (m.SetLimits(1, 10.0, -1.0, 1.0, 0.0, 0), m.NakCode.BAD_AXIS, 1.0),
    (m.GetLimits(7), m.NakCode.BAD_AXIS, 1.0),
    (m.Stream(1, 1, 1), m.NakCode.BAD_AXIS, 1.0),
    (m.SetOutput(255, 0.0), m.NakCode.BAD_AXIS, 1.0),
    (m.StartRelay(1, 0.0, 0.0, 1.0, 1.0, 0.0), m.NakCode.BAD_AXIS, 1.0),
    (m.SetPid(1, 1.0, 0.0, 0.0, 1.0, 10.0, 0.0, 0.0, 0.0), m.NakCode.BAD_AXIS, 1.0),
    (m.SetSetpoint(1, 0.0), m.NakCode.BAD_AXIS, 1.0),
    (m.SetOffset(1, 0.0), m.NakCode.BAD_AXIS, 1.0),
    (m.StoreGains(1, 1.0, 0.0, 0.0), m.NakCode.BAD_AXIS, 1.0),
    # finite values
    (m.SetLimits(0, NAN, -1.0, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, NAN),
    (m.SetLimits(0, 10.0, -math.inf, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, NAN),
    (m.SetOutput(0, math.inf), m.NakCode.OUT_OF_RANGE, NAN),
    (m.StartRelay(0, NAN, 0.0, 1.0, 1.0, 0.0), m.NakCode.OUT_OF_RANGE, NAN),
    (m.SetPid(0, 1.0, NAN, 0.0, 1.0, 10.0, 0.0, 0.0, 0.0), m.NakCode.OUT_OF_RANGE, NAN),
    (m.SetSetpoint(0, NAN), m.NakCode.OUT_OF_RANGE, NAN),
    (m.SetOffset(0, -math.inf), m.NakCode.OUT_OF_RANGE, NAN),
    (m.StoreGains(0, 1.0, NAN, 0.0), m.NakCode.OUT_OF_RANGE, NAN),
    # the messages' own rules
    (m.SetLimits(0, 0.0, -1.0, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, 0.0),
    (m.SetLimits(0, -5.0, -1.0, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, -5.0),
    (m.SetLimits(0, 100.5, -1.0, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, 100.5),
    (m.SetLimits(0, 10.0, 1.0, 1.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, 1.0),
    (m.SetLimits(0, 10.0, 2.0, -2.0, 0.0, 0), m.NakCode.OUT_OF_RANGE, -2.0),
    (m.SetLimits(0, 10.0, -1.0, 1.0, -0.5, 0), m.NakCode.OUT_OF_RANGE, -0.5),
    (m.SetLimits(0, 10.0, -1.0, 1.0, 0.0, 9), m.NakCode.OUT_OF_RANGE, 9.0),
    (m.SetLimits(0, 10.0, -1.0, 1.0, 0.0, 60001), m.NakCode.OUT_OF_RANGE, 60001.0),
    (m.Stream(0, 2, 1), m.NakCode.OUT_OF_RANGE, 2.0),
    (m.Stream(0, 1, 0), m.NakCode.OUT_OF_RANGE, 0.0),
    (m.SetOutput(0, 30.5), m.NakCode.OUT_OF_RANGE, 30.5),
    (m.SetOutput(0, -31.0), m.NakCode.OUT_OF_RANGE, -31.0),
    (m.StartRelay(0, 0.0, 0.0, -1.0, 1.0, 0.0), m.NakCode.OUT_OF_RANGE, -1.0),
    (m.StartRelay(0, 0.0, 0.0, 1.0, -2.0, 0.0), m.NakCode.OUT_OF_RANGE, -2.0),
    (m.StartRelay(0, 0.0, 0.0, 1.0, 1.0, -0.1), m.NakCode.OUT_OF_RANGE, f32(-0.1)),
    (m.StartRelay(0, 0.0, 25.0, 10.0, 1.0, 0.0), m.NakCode.OUT_OF_RANGE, 35.0),
    (m.StartRelay(0, 0.0, -25.0, 1.0, 10.0, 0.0), m.NakCode.OUT_OF_RANGE, -35.0),
    (m.SetPid(0, 1.0, 0.0, 0.0, -0.5, 10.0, 0.0, 0.0, 0.0), m.NakCode.OUT_OF_RANGE, -0.5),
    (m.SetPid(0, 1.0, 0.0, 0.0, 1.5, 10.0, 0.0, 0.0, 0.0), m.NakCode.OUT_OF_RANGE, 1.5),
    (m.SetPid(0, 1.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0), m.NakCode.OUT_OF_RANGE, 0.0),
    (m.SetPid(0, 1.0, 0.0, 0.0, 1.0, 10.0, -1.0, 0.0, 0.0), m.NakCode.OUT_OF_RANGE, -1.0),
    (m.SetPid(0, 1.0, 0.0, 0.0, 1.0, 10.0, 0.0, 0.0, 31.0), m.NakCode.OUT_OF_RANGE, 31.0),
    (m.SetOffset(0, 30.25), m.NakCode.OUT_OF_RANGE, 30.25),
    (m.SetSetpoint(0, 1.0), m.NakCode.NOT_ALLOWED, 0.0),  # idle: no setpoint to set
]


def _same(a: float, b: float) -> bool:
    return (math.isnan(a) and math.isnan(b)) or a == b


def test_every_out_of_range_field_is_refused(board, open_link) -> None:
    link = open_link(board())
    link.handshake()
    wrong = []
    for cases, prepare in ((BEFORE_LIMITS, None), (AFTER_LIMITS, LIMITS)):
        if prepare is not None:
            link.request(prepare)
        for msg, code, detail in cases:
            got = nak_of(link, msg)
            if got[0] != code or not _same(got[1], detail):
                wrong.append(f"{m.type_name(msg.TYPE)} {msg}: got {got}, want "
                             f"{(code, detail)}")
    assert not wrong, "\n".join(wrong)
    # a refused command changed nothing: still idle, no motion
    link.request(m.Stream(0, 1, 1))
    assert all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in samples(link, 5))


def test_zero_output_always_accepted_and_store_gains(board, open_link) -> None:
    link = open_link(board())
    link.handshake()
    assert isinstance(link.request(m.SetOutput(0, 0.0)), m.Ack)  # no limits yet: harmless
    assert isinstance(link.request(m.StoreGains(0, 1.5, 0.25, 0.01)), m.Ack)


def test_stop(board, open_link) -> None:
    b = board()
    link = open_link(b)
    link.handshake()
    assert isinstance(link.request(m.Stop()), m.Stopped)  # never refused, even without limits
    link.request(LIMITS)
    link.start_heartbeat()
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetOffset(0, 3.0))
    link.request(m.SetOutput(0, 10.0))
    deadline = time.monotonic() + 5
    while True:
        rec = link.next_sample(timeout=1.0)
        if rec is not None and rec.output == 13.0:
            break
        assert time.monotonic() < deadline, "the output + offset never showed up"
    assert rec.mode == m.Mode.HOST and rec.flags & m.FLAG_WATCHDOG_ARMED
    link.drain_samples()
    reply = link.request(m.Stop())
    stopped_at = time.monotonic()
    assert isinstance(reply, m.Stopped)
    after = [r for r in samples(link, 40) if r.received_at >= stopped_at][:5]
    assert after and all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in after)
    assert not after[0].flags & m.FLAG_WATCHDOG_ARMED
    # the offset was cleared by Stop; the limits were kept
    link.request(m.SetOutput(0, 10.0))
    t0 = time.monotonic()
    while True:
        rec = link.next_sample(timeout=1.0)
        if rec is not None and rec.output != 0.0:
            break
        assert time.monotonic() - t0 < 5
    assert rec.output == 10.0 and isinstance(link.request(m.GetLimits(0)), m.Limits)
    link.request(m.Stop())


def test_sample_decimation(board, open_link) -> None:
    b = board()
    link = open_link(b)
    info = link.handshake()
    tick = info.tick_us
    for dec in (4, 1, 7):
        link.request(m.Stream(0, 1, dec))
        link.drain_samples()
        got = samples(link, 12)[1:]  # the first may precede the change
        us = [round(r.t * 1e6) for r in got]
        assert all(b - a == dec * tick for a, b in zip(us, us[1:], strict=False)), (dec, us)
        # a Sample goes out on every tick whose counter is a multiple of the decimation
        assert all((u // tick) % dec == 0 for u in us)
        seqs = [r.seq for r in got]
        assert all((b - a) & 0xFFFF == 1 for a, b in zip(seqs, seqs[1:], strict=False))
    link.request(m.Stream(0, 0, 0))  # off: the decimation is not checked
    time.sleep(0.1)
    link.drain_samples()
    assert link.next_sample(timeout=max(0.3, 20 * b.period / b.speed)) is None


def test_bad_frames_counted_and_dropped(board, open_link) -> None:
    b = board()
    link = open_link(b)
    link.handshake()
    ping = build_raw_frame(m.Ping.TYPE, 77, m.Ping(1, 2).pack())
    bad_crc = bytearray(ping)
    bad_crc[-1] ^= 0x40
    frames = [
        cobs_encode(bytes(bad_crc)) + b"\x00",  # CRC error
        bytes([0x05, 0x01, 0x02, 0x00]),  # invalid COBS: the block runs past the end
        bytes([0x04, 0x01, 0x02, 0x03, 0x00]),  # 3 bytes: shorter than a frame
        bytes(range(1, 251)) + bytes(range(1, 61)) + b"\x00",  # 310 bytes without a delimiter
        b"\x00\x00\x00",  # empty frames: ignored, not errors
    ]
    before = link.stats()
    for data in frames:
        link._write(data, m.Ping.TYPE)  # raw bytes on the line (the receiver is under test)
    assert link.ping() >= 0.0  # the board still answers
    link._write(encode_frame(m.Ping.TYPE, 78, m.Ping(3, 4).pack()), m.Ping.TYPE)  # next frame
    assert link.ping() >= 0.0
    after = link.stats()
    assert after.naks == before.naks and after.unmatched == before.unmatched + 1  # Pong 78
    text = b.counters_at_exit()
    found = re.search(r"(\d+) good, (\d+) CRC errors, (\d+) framing errors", text)
    assert found, text
    good, crc, framing = map(int, found.groups())
    assert (crc, framing) == (1, 3) and good >= 4, text
