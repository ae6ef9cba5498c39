"""The mock device process over a real pty (and loopback TCP), reached with protocol.Link.

Device timestamps, not the wall clock, are compared; wall-clock bounds appear only where the
requirement itself is one ("LinkLost within one second") or as guards against hangs.
"""

from __future__ import annotations

import signal
import subprocess
import sys

import pytest

from protocol import messages as m
from protocol.errors import LinkLost, NakError, VersionMismatch
from tests.integration.conftest import REPO, wait_for

TICK = 0.01


def collect(link, n: int, timeout: float = 5.0) -> list:
    out = []
    while len(out) < n:
        rec = link.next_sample(timeout)
        assert rec is not None, f"no sample within {timeout} s after {len(out)}"
        out.append(rec)
    return out


def test_handshake_and_ping(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=10)
    link = open_link(dev.port, speed=10)
    info = link.handshake()
    assert info.protocol_version == m.PROTOCOL_VERSION
    assert info.device_name == "cart-wheel"
    assert info.firmware.startswith("mock-")
    assert info.tick_us == 10000
    assert info.axis_count == 1
    assert info.has_host_loop and info.has_device_relay and info.has_device_pid
    assert info.max_output == 100.0
    link.ping()
    assert link.last_pong is not None
    assert link.last_pong.boot_id == info.boot_id


def test_boot_id_random_per_start(mock_device, open_link):
    ids = []
    for _ in range(2):
        dev = mock_device("mast-pan", speed=10)
        ids.append(open_link(dev.port, speed=10).handshake().boot_id)
    assert ids[0] != ids[1]


def test_streaming_100hz_two_seconds_zero_loss(mock_device, open_link):
    speed = 5.0
    dev = mock_device("cart-wheel", speed=speed)
    link = open_link(dev.port, speed=speed)
    link.handshake()
    link.start_heartbeat()
    link.request(m.Stream(0, 1, 1))
    first = link.next_sample(5.0)
    assert first is not None
    recs = [first]
    while round((recs[-1].t - first.t) / TICK) < 200:
        recs += collect(link, 1)
    assert len(recs) == 201
    for a, b in zip(recs, recs[1:], strict=False):
        assert (b.seq - a.seq) & 0xFFFF == 1  # continuous sequence numbers
        assert b.t - a.t == pytest.approx(TICK, abs=1e-9)  # continuous device time, 100 Hz
    stats = link.stats()
    assert stats.seq_gaps == 0
    assert stats.crc_errors == 0 and stats.framing_errors == 0
    assert stats.samples_dropped == 0


def test_out_of_range_output_refused_output_unchanged(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=5)
    link = open_link(dev.port, speed=5)
    link.handshake()
    link.start_heartbeat()
    link.request(m.SetLimits(0, 30.0, -100.0, 100.0, 0.0, 5000))
    link.request(m.SetOutput(0, 10.0))
    with pytest.raises(NakError) as info:
        link.request(m.SetOutput(0, 55.0))
    assert info.value.code == m.NakCode.OUT_OF_RANGE
    assert info.value.detail == 55.0
    link.request(m.Stream(0, 1, 1))
    recs = collect(link, 20)
    assert all(r.output == 10.0 for r in recs)
    assert all(r.mode == m.Mode.HOST for r in recs)
    assert link.stop() is True
    link.drain_samples()  # everything sent before Stopped
    after = collect(link, 3)
    assert all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in after)


def test_motion_before_limits_refused(mock_device, open_link):
    dev = mock_device("mast-pan", speed=5)
    link = open_link(dev.port, speed=5)
    link.handshake()
    with pytest.raises(NakError) as info:
        link.request(m.SetOutput(0, 5.0))
    assert info.value.code == m.NakCode.LIMITS_NOT_SET


def test_watchdog_zero_output_and_fault_reported_on_reconnect(mock_device, open_link):
    speed = 1.0  # the host must get its last two frames out well within the watchdog period
    watchdog = 0.3  # s, device time
    dev = mock_device("cart-wheel", speed=speed)
    link = open_link(dev.port, speed=speed)
    link.handshake()
    link.request(m.SetLimits(0, 50.0, -100.0, 100.0, 0.0, int(watchdog * 1000)))
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetOutput(0, 20.0))
    link.ping()  # the host's last frame; the Pong carries the device time it was handled at
    t_last = link.last_pong.device_us * 1e-6
    recs = []
    while not recs or recs[-1].output != 0.0 or recs[-1].t < t_last:
        recs += collect(link, 1)
    zero = next(r for r in recs if r.t >= t_last and r.output == 0.0)
    silence = zero.t - t_last
    assert watchdog - 1e-9 <= silence <= watchdog + TICK + 1e-9
    assert all(r.output == 20.0 for r in recs if t_last <= r.t < zero.t)
    assert zero.fault_latched
    assert wait_for(lambda: not link.faults.empty(), 2.0)
    fault = link.poll_faults()[0]
    assert fault.name == "watchdog"
    link.close()
    # the host comes back: same device process, same port; the fault is reported again
    link2 = open_link(dev.port, speed=speed)
    link2.handshake()
    assert wait_for(lambda: not link2.faults.empty(), 2.0)
    again = link2.poll_faults()
    assert again[0].name == "watchdog"
    with pytest.raises(NakError) as info:
        link2.request(m.SetOutput(0, 5.0))
    assert info.value.code == m.NakCode.FAULT_LATCHED
    link2.request(m.ClearFault())
    link2.start_heartbeat()
    link2.request(m.SetOutput(0, 5.0))
    assert link2.stop() is True


def test_pty_closed_under_host_raises_link_lost(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=5)
    link = open_link(dev.port, speed=5)
    link.handshake()
    link.request(m.Stream(0, 1, 1))
    collect(link, 5)
    dev.kill()
    with pytest.raises(LinkLost) as info:
        for _ in range(100000):  # drain what was already queued; LinkLost must follow
            assert link.next_sample(1.0) is not None, "no LinkLost within one second"
    assert dev.port in str(info.value)
    with pytest.raises(LinkLost):
        link.request(m.Ping(1, 2))


def test_version_mismatch_refused_on_both_sides(mock_device, open_link, monkeypatch):
    dev = mock_device("cart-wheel", speed=5)
    link = open_link(dev.port, speed=5)
    monkeypatch.setattr("protocol.link.PROTOCOL_VERSION", m.PROTOCOL_VERSION + 1)
    with pytest.raises(VersionMismatch) as info:
        link.handshake()
    text = str(info.value)
    assert f"version {m.PROTOCOL_VERSION + 1}" in text and f"version {m.PROTOCOL_VERSION}" in text
    link.close()
    err = dev.stderr_text()
    assert f"protocol version {m.PROTOCOL_VERSION + 1}" in err
    assert f"speaks version {m.PROTOCOL_VERSION}" in err


def test_device_relay_oscillates(mock_device, open_link):
    dev = mock_device("mast-pan", speed=10)
    link = open_link(dev.port, speed=10)
    link.handshake()
    link.start_heartbeat()
    link.request(m.SetLimits(0, 40.0, -90.0, 90.0, 0.0, 5000))
    link.request(m.StartRelay(0, 0.0, 0.0, 20.0, 20.0, 0.1))
    link.request(m.Stream(0, 1, 1))
    recs = collect(link, 400)
    outs = {r.output for r in recs}
    assert outs == {20.0, -20.0}
    switches = sum(1 for a, b in zip(recs, recs[1:], strict=False) if a.output != b.output)
    assert switches >= 6  # at least three periods in four simulated seconds
    assert all(r.mode == m.Mode.RELAY for r in recs)
    assert link.stop() is True


def test_tcp_loopback(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=5, tcp="127.0.0.1:0")
    assert dev.port.startswith("socket://127.0.0.1:")
    link = open_link(dev.port, speed=5)
    assert link.handshake().device_name == "cart-wheel"
    link.request(m.Stream(0, 1, 2))
    recs = collect(link, 10)
    assert all(b.t - a.t == pytest.approx(0.02, abs=1e-9) for a, b in zip(recs, recs[1:], strict=False))
    link.close()
    link2 = open_link(dev.port, speed=5)  # a second client after the first left
    assert link2.handshake().device_name == "cart-wheel"


def test_baud_pacing_keeps_frames_whole(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=2, baud=115200)
    link = open_link(dev.port, speed=2)
    link.handshake()
    link.request(m.Stream(0, 1, 1))
    recs = collect(link, 50)
    assert all((b.seq - a.seq) & 0xFFFF == 1 for a, b in zip(recs, recs[1:], strict=False))
    assert link.stats().crc_errors == 0


def test_faults_reach_the_wire(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=10, faults="corrupt=0.02,seed=1")
    link = open_link(dev.port, speed=10)
    link.handshake(retries=10)
    link.request(m.Stream(0, 1, 1), retries=10)
    collect(link, 300)
    stats = link.stats()
    assert stats.crc_errors + stats.framing_errors > 0
    assert stats.seq_gaps > 0


def test_disconnect_fault_closes_port(mock_device, open_link):
    dev = mock_device("cart-wheel", speed=2, faults="disconnect_after=1.0")
    link = open_link(dev.port, speed=2)
    link.handshake()
    link.request(m.Stream(0, 1, 1))
    recs = []
    with pytest.raises(LinkLost):
        for _ in range(10000):
            rec = link.next_sample(1.0)
            assert rec is not None, "no LinkLost within one second of the last sample"
            recs.append(rec)
    assert recs and recs[-1].t - recs[0].t < 1.0
    assert dev.proc.wait(5.0) == 0


def test_sigterm_exits_cleanly(mock_device):
    dev = mock_device("cart-wheel", speed=1)
    dev.proc.send_signal(signal.SIGTERM)
    assert dev.proc.wait(5.0) == 0
    assert "Traceback" not in dev.proc.stderr.read()


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--plant", "no-such-file.toml", "--pty"], "no such file"),
        (["--plant", "cart-wheel", "--pty", "--faults", "bogus=1"], "bogus"),
        (["--plant", "cart-wheel", "--pty", "--speed", "0"], "--speed"),
    ],
)
def test_bad_arguments_exit_2(args, needle):
    res = subprocess.run(
        [sys.executable, "-m", "mock_device", *args],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=30,
        stdin=subprocess.DEVNULL,
    )
    assert res.returncode == 2
    assert res.stdout == ""
    assert needle in res.stderr


def test_bad_plant_key_exit_2(tmp_path):
    plant = tmp_path / "p.toml"
    plant.write_text("[plant]\nnum = [1]\nden = [1, 1]\ndelay_s = 0.1\n")
    res = subprocess.run(
        [sys.executable, "-m", "mock_device", "--plant", str(plant), "--pty"],
        cwd=REPO, capture_output=True, text=True, timeout=30, stdin=subprocess.DEVNULL,
    )
    assert res.returncode == 2
    assert str(plant) in res.stderr and "[plant] delay_s" in res.stderr
