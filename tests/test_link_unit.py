"""Link mechanics: framing and queues over pyserial's loop:// port, a silent or scripted peer
on a real pseudo-terminal, a real TCP socket. Device behaviour is tested in tests/integration/
against the mock device."""

from __future__ import annotations

import os
import socket
import threading
import time
from collections.abc import Iterator

import pytest
import serial
from hypothesis import given, settings
from hypothesis import strategies as st

from protocol import messages as m
from protocol.errors import (
    DeviceReset,
    LinkLost,
    LinkTimeout,
    NakError,
    NoResponse,
    PortBusy,
    PortNotFound,
    PortPermission,
    VersionMismatch,
)
from protocol.framing import FrameDecoder
from protocol.link import DeviceClock, Link, SampleRecord, classify_open_error, percentile


@pytest.fixture
def link() -> Iterator[Link]:
    lk = Link("loop://", reply_timeout=0.1, retries=2, silence_timeout=None)
    yield lk
    lk.close()


def inject(link: Link, msg: m.Message, seq: int) -> None:
    """Make ``msg`` arrive at the link as if the device sent it (loop:// echoes writes)."""
    link._ser.write(m.encode(msg, seq))


def reply_to_next_request(link: Link, reply: m.Message, delay: float = 0.01) -> threading.Thread:
    seq = link._seq

    def run() -> None:
        time.sleep(delay)
        inject(link, reply, seq)

    t = threading.Thread(target=run, daemon=True)
    t.start()
    return t


# ------------------------------------------------------------------ device time


def test_clock_unwraps_at_2_32() -> None:
    c = DeviceClock()
    assert c.unwrap(2**32 - 1000) == pytest.approx((2**32 - 1000) / 1e6)
    assert c.unwrap(500) == pytest.approx((2**32 + 500) / 1e6)
    assert c.unwrap(2**31) == pytest.approx((2**32 + 2**31) / 1e6)
    assert c.unwrap(2**31 + 2**30) == pytest.approx((2**32 + 2**31 + 2**30) / 1e6)
    assert c.unwrap(10) == pytest.approx((2 * 2**32 + 10) / 1e6)
    c.reset()
    assert c.unwrap(10) == pytest.approx(10e-6)


@settings(deadline=None)  # no per-example time limit: CI machines are shared
@given(st.integers(0, 2**32 - 1), st.lists(st.integers(0, 2**31 - 1), max_size=50))
def test_clock_unwrap_equals_running_sum(start: int, steps: list[int]) -> None:
    c = DeviceClock()
    total = start
    assert c.unwrap(start) == total / 1e6
    for s in steps:
        total += s
        assert c.unwrap(total % 2**32) == total / 1e6


def test_clock_tolerates_small_backward_steps() -> None:
    # A Pong stamped just before an already-received Sample must not look like a wrap.
    c = DeviceClock()
    c.unwrap(1_000_000)
    assert c.unwrap(999_000) == pytest.approx(0.999)


def test_samples_across_the_wrap_through_the_port(link: Link) -> None:
    us = [2**32 - 20_000, 2**32 - 10_000, 0, 10_000]
    for i, u in enumerate(us):
        inject(link, m.Sample(0, u, float(i), 0.0, 0.0, m.FLAG_STREAMING), i)
    recs = [link.next_sample(timeout=1.0) for _ in us]
    assert all(r is not None for r in recs)
    ts = [r.t for r in recs if r is not None]
    assert ts == pytest.approx([(2**32 - 20_000) / 1e6 + 0.01 * i for i in range(4)])
    assert [r.pv for r in recs if r is not None] == [0.0, 1.0, 2.0, 3.0]


# ------------------------------------------------------------------ queues and counters


def test_sequence_gaps_are_counted(link: Link) -> None:
    seqs = (65532, 65533, 0, 1, 4, 3)  # 65534, 65535 missing (across the wrap), then 2, 3
    for seq in seqs:
        inject(link, m.Sample(0, seq, 0.0, 0.0, 0.0, 0), seq)
    for _ in seqs:
        assert link.next_sample(timeout=1.0) is not None
    # A step backwards (3 after 4: duplicate or late frame) is not counted as a gap.
    assert link.stats().seq_gaps == 4


def test_fault_reports_arrive_on_their_queue(link: Link) -> None:
    inject(link, m.Fault(m.FaultCode.WATCHDOG, 0, 0.21, 5_000_000), 1)
    deadline = time.monotonic() + 1.0
    faults: list = []
    while not faults and time.monotonic() < deadline:
        faults = link.poll_faults()
        time.sleep(0.005)
    assert len(faults) == 1
    assert faults[0].name == "watchdog" and faults[0].t == pytest.approx(5.0)


def test_full_sample_queue_drops_and_counts() -> None:
    lk = Link("loop://", sample_queue_size=2, silence_timeout=None)
    try:
        for i in range(5):
            inject(lk, m.Sample(0, i, 0.0, 0.0, 0.0, 0), i)
        deadline = time.monotonic() + 1.0
        while lk.stats().samples_received < 5 and time.monotonic() < deadline:
            time.sleep(0.005)
        assert lk.stats().samples_dropped == 3
        assert len(lk.drain_samples()) == 2
    finally:
        lk.close()


def test_next_sample_times_out_with_none(link: Link) -> None:
    assert link.next_sample(timeout=0.05) is None


# ------------------------------------------------------------------ requests


def test_request_matches_reply_by_seq(link: Link) -> None:
    reply_to_next_request(link, m.Ack(m.SetOutput.TYPE))
    assert link.request(m.SetOutput(0, 1.0)) == m.Ack(m.SetOutput.TYPE)
    s = link.stats()
    assert s.frames_sent == 1 and s.timeouts == 0


def test_reply_with_other_seq_or_type_is_not_taken(link: Link) -> None:
    seq = link._seq
    inject(link, m.Ack(m.SetOutput.TYPE), (seq + 1) & 0xFFFF)  # wrong seq
    reply_to_next_request(link, m.Pong(), delay=0.0)  # right seq, wrong type for SetOutput
    with pytest.raises(LinkTimeout):
        link.request(m.SetOutput(0, 1.0), retries=0)
    assert link.stats().unmatched >= 2


def test_retries_resend_the_same_frame(link: Link) -> None:
    reply_to_next_request(link, m.Ack(m.Stream.TYPE), delay=0.15)  # after the first timeout
    assert link.request(m.Stream(0, 1, 1), timeout=0.1, retries=2) == m.Ack(m.Stream.TYPE)
    s = link.stats()
    assert s.retries == 1 and s.frames_sent == 2


def test_timeout_after_all_retries_and_late_reply_counted(link: Link) -> None:
    seq = link._seq
    with pytest.raises(LinkTimeout, match="3 attempts"):
        link.request(m.ClearFault(), timeout=0.03, retries=2)
    s = link.stats()
    assert (s.frames_sent, s.timeouts, s.retries) == (3, 1, 2)
    before = link.stats().unmatched
    inject(link, m.Ack(m.ClearFault.TYPE), seq)
    deadline = time.monotonic() + 1.0
    while link.stats().unmatched == before and time.monotonic() < deadline:
        time.sleep(0.005)
    assert link.stats().unmatched == before + 1


def test_nak_raises_nak_error(link: Link) -> None:
    reply_to_next_request(link, m.Nak(m.SetOutput.TYPE, m.NakCode.OUT_OF_RANGE, 150.0))
    with pytest.raises(NakError, match="OUT_OF_RANGE") as err:
        link.request(m.SetOutput(0, 150.0))
    assert err.value.code == m.NakCode.OUT_OF_RANGE and err.value.detail == 150.0
    assert link.stats().naks == 1


def test_nak_to_fire_and_forget_is_kept(link: Link) -> None:
    seq = link.send(m.SetOutput(0, 3.0))
    assert link.send(m.SetOutput(0, 3.0)) == (seq + 1) & 0xFFFF
    inject(link, m.Nak(m.SetOutput.TYPE, m.NakCode.NOT_ALLOWED, 2.0), seq)
    deadline = time.monotonic() + 1.0
    while link.last_nak is None and time.monotonic() < deadline:
        time.sleep(0.005)
    assert link.last_nak == (seq, m.Nak(m.SetOutput.TYPE, m.NakCode.NOT_ALLOWED, 2.0))
    assert link.stats().naks == 1


def test_sequence_numbers_wrap(link: Link) -> None:
    link._seq = 0xFFFF
    assert link.send(m.Stop()) == 0xFFFF
    assert link.send(m.Stop()) == 0


# ------------------------------------------------------------------ handshake


HELLO = m.HelloReply(
    protocol_version=m.PROTOCOL_VERSION, device_name="bench", firmware="t1", boot_id=5,
    axis_count=1, tick_us=10_000, capabilities=m.CAP_HOST_LOOP | m.CAP_DEVICE_RELAY,
    max_output=24.0,
)


def test_handshake_gives_device_info(link: Link) -> None:
    reply_to_next_request(link, HELLO)
    info = link.handshake()
    assert info.device_name == "bench" and info.boot_id == 5 and info.tick == 0.01
    assert info.has_host_loop and info.has_device_relay and not info.has_device_pid
    assert link.device_info == info


def test_handshake_version_nak(link: Link) -> None:
    newer = m.PROTOCOL_VERSION + 1
    reply_to_next_request(link, m.Nak(m.Hello.TYPE, m.NakCode.BAD_VERSION, float(newer)))
    with pytest.raises(VersionMismatch, match=f"version {m.PROTOCOL_VERSION}.*version {newer}"
                       ) as err:
        link.handshake()
    assert (err.value.host_version, err.value.device_version) == (m.PROTOCOL_VERSION, newer)


def test_handshake_reply_with_other_version(link: Link) -> None:
    reply_to_next_request(link, m.HelloReply(protocol_version=7))
    with pytest.raises(VersionMismatch, match="version 7"):
        link.handshake()


def test_handshake_without_answer(link: Link) -> None:
    with pytest.raises(NoResponse, match="nothing answered"):
        link.handshake(timeout=0.02, retries=1)


def test_boot_id_change_raises_device_reset(link: Link) -> None:
    reply_to_next_request(link, HELLO)
    link.handshake()
    reply_to_next_request(link, m.Pong(boot_id=6))
    link.ping()
    assert link.device_reset
    with pytest.raises(DeviceReset):
        link.next_sample(timeout=0.01)
    with pytest.raises(DeviceReset):
        link.request(m.ClearFault())
    reply_to_next_request(link, m.Stopped())
    assert link.stop(timeout=1.0)  # stop still goes out after a reset
    reply_to_next_request(link, HELLO)
    link.handshake()
    assert not link.device_reset


# ------------------------------------------------------------------ lost port


def test_lost_port_wakes_every_caller_quickly(link: Link) -> None:
    errors: list[BaseException] = []

    def wait_sample() -> None:
        try:
            link.next_sample(timeout=None)
        except BaseException as exc:  # noqa: BLE001
            errors.append(exc)

    waiter = threading.Thread(target=wait_sample, daemon=True)
    waiter.start()
    requester_errors: list[BaseException] = []

    def wait_request() -> None:
        try:
            link.request(m.Stop(), timeout=30.0, retries=0)
        except BaseException as exc:  # noqa: BLE001
            requester_errors.append(exc)

    req = threading.Thread(target=wait_request, daemon=True)
    req.start()
    time.sleep(0.05)
    link._ser.close()  # the port disappears under the link
    waiter.join(timeout=1.0)
    req.join(timeout=1.0)
    assert not waiter.is_alive() and not req.is_alive()
    assert isinstance(errors[0], LinkLost) and isinstance(requester_errors[0], LinkLost)
    assert link.lost
    with pytest.raises(LinkLost):
        link.send(m.Stop())
    assert link.stop(timeout=0.5) is False


def test_lost_socket_is_link_lost_within_a_second() -> None:
    server = socket.create_server(("127.0.0.1", 0))
    port = server.getsockname()[1]
    lk = Link(f"socket://127.0.0.1:{port}", silence_timeout=None)
    conn, _ = server.accept()
    try:
        conn.close()
        server.close()
        t0 = time.monotonic()
        with pytest.raises(LinkLost):
            lk.next_sample(timeout=5.0)
        assert time.monotonic() - t0 < 1.0
    finally:
        lk.close()


def test_silent_device_is_link_lost_when_heartbeat_runs() -> None:
    master, slave = os.openpty()
    lk = Link(os.ttyname(slave), heartbeat_interval=0.02, reply_timeout=0.05, silence_timeout=0.3)
    try:
        lk.start_heartbeat()
        with pytest.raises(LinkLost, match="stopped answering"):
            lk.next_sample(timeout=3.0)
    finally:
        lk.close()
        os.close(master)
        os.close(slave)


def test_heartbeat_records_rtt_and_detects_reset_with_scripted_peer() -> None:
    """A scripted peer on the master side of a real pty answers Hello and Ping."""
    master, slave = os.openpty()
    stop = threading.Event()
    boot = {"id": 5}

    def peer() -> None:
        dec = FrameDecoder()
        while not stop.is_set():
            try:
                data = os.read(master, 4096)
            except OSError:
                return
            for f in dec.feed(data):
                msg = m.decode(f)
                if isinstance(msg, m.Hello):
                    os.write(master, m.encode(HELLO, f.seq))
                elif isinstance(msg, m.Ping):
                    pong = m.Pong(msg.nonce, msg.host_us, 1000, boot["id"])
                    os.write(master, m.encode(pong, f.seq))

    th = threading.Thread(target=peer, daemon=True)
    th.start()
    lk = Link(os.ttyname(slave), heartbeat_interval=0.01, silence_timeout=None)
    try:
        lk.handshake()
        lk.start_heartbeat()
        deadline = time.monotonic() + 2.0
        while lk.stats().rtt_count < 5 and time.monotonic() < deadline:
            time.sleep(0.01)
        s = lk.stats()
        assert s.rtt_count >= 5 and 0 < s.rtt_min <= s.rtt_median <= s.rtt_p99  # type: ignore[operator]
        assert not lk.device_reset
        boot["id"] = 6
        deadline = time.monotonic() + 2.0
        while not lk.device_reset and time.monotonic() < deadline:
            time.sleep(0.01)
        assert lk.device_reset
        with pytest.raises(DeviceReset):
            lk.next_sample(timeout=0.1)
    finally:
        stop.set()
        lk.close()
        os.close(slave)
        os.close(master)


# ------------------------------------------------------------------ opening ports


def test_no_such_device_path() -> None:
    with pytest.raises(PortNotFound, match="no such port"):
        Link("/dev/ttyDOES-NOT-EXIST")


def test_unknown_url_scheme() -> None:
    with pytest.raises(PortNotFound):
        Link("bogus://x")


def test_socket_refused() -> None:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    with pytest.raises(PortNotFound, match="nothing to connect to"):
        Link(f"socket://127.0.0.1:{port}")


def test_port_in_use_is_busy() -> None:
    master, slave = os.openpty()
    first = Link(os.ttyname(slave), silence_timeout=None)
    try:
        with pytest.raises(PortBusy, match="in use"):
            Link(os.ttyname(slave))
    finally:
        first.close()
        os.close(master)
        os.close(slave)


def test_permission_message_names_dialout() -> None:
    # As root the OS never refuses, so the classification is checked on pyserial's exception.
    exc = serial.SerialException(13, "could not open port /dev/ttyUSB0: [Errno 13] Permission denied")
    err = classify_open_error("/dev/ttyUSB0", exc)
    assert isinstance(err, PortPermission) and "dialout" in str(err)


def test_percentile_nearest_rank() -> None:
    # Nearest-rank definition (common practice, no source): p99 of 1..100 is 99.
    assert percentile([float(i) for i in range(1, 101)], 99) == 99.0
    assert percentile([3.0], 99) == 3.0


def test_heartbeat_keeps_its_schedule_when_pongs_do_not_come() -> None:
    """Pings feed the device watchdog: an unanswered Ping must not delay the next one."""
    master, slave = os.openpty()
    lk = Link(os.ttyname(slave), heartbeat_interval=0.02, reply_timeout=0.1, silence_timeout=None)
    try:
        lk.start_heartbeat()
        dec = FrameDecoder()
        pings = 0
        t_end = time.monotonic() + 1.5  # past HB_PONG_WAIT, when a Ping counts as lost
        os.set_blocking(master, False)
        while time.monotonic() < t_end:
            try:
                data = os.read(master, 4096)
            except BlockingIOError:
                time.sleep(0.01)
                continue
            pings += sum(1 for f in dec.feed(data) if f.type == m.Ping.TYPE)
        lk.stop_heartbeat()
        # 1.5 s at 20 ms is 75 Pings; a heartbeat waiting out the 0.1 s reply timeout of
        # each lost Pong would send at most 15 (a wide margin for a loaded machine).
        assert pings >= 30
        assert lk.stats().timeouts >= 3  # unanswered Pings are counted
    finally:
        lk.close()
        os.close(master)
        os.close(slave)


def test_sample_handler_runs_in_reader_and_errors_are_contained(link: Link) -> None:
    seen: list[float] = []

    def handler(rec: SampleRecord) -> None:
        seen.append(rec.pv)
        if rec.pv == 2.0:
            raise ValueError("boom")

    link.set_sample_handler(handler)
    for i in range(4):
        inject(link, m.Sample(0, i, float(i), 0.0, 0.0, 0), i)
    recs = [link.next_sample(timeout=1.0) for _ in range(4)]
    assert [r.pv for r in recs if r is not None] == [0.0, 1.0, 2.0, 3.0]
    assert seen == [0.0, 1.0, 2.0, 3.0]
    assert link.stats().handler_errors == 1 and isinstance(link.handler_error, ValueError)
    assert not link.lost
