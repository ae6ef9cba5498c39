"""The mock device with several axes (built-in scenario `drive-base`) as its own process on a
real pty, reached with protocol.Link: both wheels limited, read back, driven and streamed on
one connection; Stop (no axis) zeroes both in the same device tick; a silent host trips the
watchdog on both. Device timestamps are compared, never the wall clock.
"""

from __future__ import annotations

import pytest

from protocol import messages as m
from tests.integration.conftest import wait_for

TICK = 0.01  # s, the scenario's device tick
SPEED = 5.0


def arm(link, watchdog_ms: int = 2000) -> None:
    """Limits on both wheels, read back before any motion (as the host must)."""
    for axis, limit in ((0, 40.0), (1, 35.0)):
        link.request(m.SetLimits(axis, limit, -50.0, 50.0, 0.0, watchdog_ms))
        back = link.request(m.GetLimits(axis))
        assert isinstance(back, m.Limits)
        assert (back.axis, back.output_limit, back.watchdog_ms) == (axis, limit, watchdog_ms)


def until_both(link, pred, n_max: int = 2000) -> list:
    """Samples until each axis has one satisfying ``pred`` (guarded by a sample count)."""
    recs: list = []
    seen: set[int] = set()
    while seen != {0, 1}:
        rec = link.next_sample(5.0)
        assert rec is not None and len(recs) < n_max
        recs.append(rec)
        if pred(rec):
            seen.add(rec.axis)
    return recs


def test_two_wheels_on_one_connection(mock_device, open_link):
    dev = mock_device("drive-base", speed=SPEED)
    link = open_link(dev.port, speed=SPEED)
    info = link.handshake()
    assert info.axis_count == 2 and info.device_name == "drive-base"
    link.start_heartbeat()
    arm(link)
    for axis in (0, 1):
        link.request(m.Stream(axis, 1, 1))
    link.request(m.SetOutput(0, 30.0))
    link.request(m.SetOutput(1, 30.0))
    recs = until_both(link, lambda r: r.t >= 3.0)  # 3 s: steady (T1 about 0.5 s)
    left = [r for r in recs if r.axis == 0]
    right = [r for r in recs if r.axis == 1]
    # every tick of both wheels, no frame lost
    assert link.stats().seq_gaps == 0
    for side in (left, right):
        steps = {round((b.t - a.t) / TICK) for a, b in zip(side, side[1:], strict=False)}
        assert steps == {1}
    # steady speeds K (u - deadband), the scenario's invented figures: 0.30 (30 - 0.5) = 8.85
    # and 0.285 (30 - 1) = 8.27 rad/s (analytic static gain of a dead zone then K/(...) plant)
    assert left[-1].pv == pytest.approx(0.30 * 29.5, abs=0.15)
    assert right[-1].pv == pytest.approx(0.285 * 29.0, abs=0.15)

    # one Stop, no axis: both wheels zero from the same device tick on
    assert link.stop() is True
    after = until_both(link, lambda r: r.output == 0.0)
    first_zero = {a: min(r.t for r in after if r.axis == a and r.output == 0.0) for a in (0, 1)}
    assert first_zero[0] == first_zero[1]
    tail = link.drain_samples() + [link.next_sample(5.0) for _ in range(6)]
    assert all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in tail)


def test_silent_host_trips_the_watchdog_on_both_wheels(mock_device, open_link):
    speed = 1.0  # the host's last frames must get out well within the watchdog period
    watchdog = 0.3  # s, device time
    dev = mock_device("drive-base", speed=speed)
    link = open_link(dev.port, speed=speed)
    link.handshake()
    arm(link, int(watchdog * 1000))
    for axis in (0, 1):
        link.request(m.Stream(axis, 1, 1))
    link.request(m.SetOutput(0, 20.0))
    link.request(m.SetOutput(1, -20.0))
    link.ping()  # the host's last frame; the Pong carries the device time it was handled at
    t_last = link.last_pong.device_us * 1e-6
    recs = until_both(link, lambda r: r.t >= t_last and r.output == 0.0)
    for axis in (0, 1):
        zero = next(r for r in recs if r.axis == axis and r.t >= t_last and r.output == 0.0)
        assert watchdog - 1e-9 <= zero.t - t_last <= watchdog + TICK + 1e-9  # SPEC section 8
        assert zero.fault_latched
    assert wait_for(lambda: link.faults.qsize() >= 2, 2.0)
    faults = link.poll_faults()
    assert sorted((f.name, f.axis) for f in faults) == [("watchdog", 0), ("watchdog", 1)]
