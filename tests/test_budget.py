"""protocol.budget: frame sizes, stream rates, the decimation and the loop check."""

from __future__ import annotations

import pytest

from protocol import budget as b
from protocol.cobs import cobs_encode
from protocol.framing import build_raw_frame
from protocol.messages import Ack, Sample, SetOutput


def test_frame_sizes_match_the_encoder() -> None:
    # the wire size is the real encoder's output (worst case: no zero byte in the frame)
    for msg, size in ((Sample(0, 0x01010101, 1.0, 1.0, 1.0, 0x0101), 26),
                      (Ack(8), 8), (SetOutput(1, 1.0), 12)):
        raw = build_raw_frame(msg.TYPE, 0x0101, msg.pack())
        assert len(cobs_encode(raw)) + 1 <= b.wire_size(type(msg)) == size
    assert (b.SAMPLE_BYTES, b.ACK_BYTES, b.SET_OUTPUT_BYTES) == (26, 8, 12)


def test_capacity_and_stream_rate() -> None:
    assert b.link_capacity(115200) == 11520.0  # 10 bits a byte (8N1)
    assert b.stream_rate(0.001) == 26000.0
    assert b.stream_rate(0.001, 3) == pytest.approx(26000 / 3)
    with pytest.raises(ValueError):
        b.link_capacity(0)


def test_decimation_keeps_the_stream_below_80_percent() -> None:
    for tick in (0.0005, 0.001, 0.002, 0.005, 0.01):
        for baud in (9600, 57600, 115200, 1_000_000):
            dec = b.choose_decimation(tick, baud)
            used = b.stream_rate(tick, dec) + b.heartbeat_rate()
            assert used <= 0.8 * b.link_capacity(baud) + 1e-6
            if dec > 1:  # and it is the smallest that does
                assert b.stream_rate(tick, dec - 1) + b.heartbeat_rate() > \
                    0.8 * b.link_capacity(baud)
    assert b.choose_decimation(0.001, 115200) == 3
    assert b.choose_decimation(0.01, 115200) == 1


def test_host_loop_refused_with_figures_and_device_loop_proposed() -> None:
    ok, line = b.check_loop_budget(0.001, 115200, "host")
    assert not ok
    assert "34,460 B/s" in line and "11,520 B/s" in line and "--loop device" in line
    assert "every 3rd sample" in line
    assert b.check_loop_budget(0.01, 115200, "host")[0]
    # the shortest host-loop tick at 115 200 baud: 34 bytes a tick within 80 % of 11 520 B/s,
    # less the heartbeat
    tick = b.loop_budget(0.01, 115200, "host").min_host_tick
    assert tick == pytest.approx(34 / (0.8 * 11520 - 460))
    assert not b.check_loop_budget(tick * 0.99, 115200, "host")[0]
    assert b.check_loop_budget(tick * 1.01, 115200, "host")[0]
    ok, line = b.check_loop_budget(0.001, 115200, "device")
    assert ok and "every 3rd sample, 3 ms apart" in line
    assert b.stream_decimation(0.001, 115200, "host") == 1
    assert b.stream_decimation(0.001, 115200, "device") == 3
    assert not b.check_loop_budget(0.01, 2400, "device")[0]  # not even the heartbeat fits
