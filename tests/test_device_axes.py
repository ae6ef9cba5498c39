"""Unit tests of the mock device with several axes (a plant file with [[axis]] tables).

No I/O: requests go to Device.handle and Device.tick is called directly (the Host helper of
test_device_unit). The protocol rules checked are those of protocol/SPEC.md: axes numbered
0 .. axis_count - 1, BAD_AXIS with detail = axis_count, limits per axis, Stop (no axis) idles
every axis, a Fault frame names its axis.
"""

from __future__ import annotations

import pytest

from mock_device.config import load_config, parse_config
from mock_device.device import Device
from protocol import messages as m
from tests.test_device_unit import Host, of_type, samples


def two_axes(watchdog: float = 0.25) -> dict:
    """Two first-order axes with different gains: K = 2 and K = 3 (PV per output unit)."""
    return {
        "device": {"period": 0.01, "watchdog": watchdog},
        "axis": [
            {"plant": {"num": [2.0], "den": [0.5, 1.0]}},
            {"plant": {"num": [3.0], "den": [0.5, 1.0]}, "sensor": {"offset": 1.0}},
        ],
    }


def make(data: dict | None = None) -> tuple[Device, Host]:
    ids = iter(range(1000, 2000))
    dev = Device(parse_config(data or two_axes(), "<test>"), boot_id=lambda: next(ids))
    return dev, Host(dev)


def limits(axis: int, output_limit: float = 50.0, watchdog_ms: int = 250,
           pv_low: float = -1e6, pv_high: float = 1e6) -> m.SetLimits:
    return m.SetLimits(axis, output_limit, pv_low, pv_high, 0.0, watchdog_ms)


def arm_both(host: Host, **kw) -> None:
    for axis in (0, 1):
        assert isinstance(host.one(limits(axis, **kw)), m.Ack)
        assert isinstance(host.one(m.Stream(axis, 1, 1)), m.Ack)


def by_axis(out, axis: int) -> list[m.Sample]:
    return [s for s in samples(out) if s.axis == axis]


def test_hello_reports_every_axis():
    _, host = make()
    reply = host.one(m.Hello(m.PROTOCOL_VERSION))
    assert isinstance(reply, m.HelloReply)
    assert reply.axis_count == 2


def test_drive_base_scenario_has_two_axes_and_one_resolution():
    dev = Device(load_config("drive-base"))
    reply = Host(dev).one(m.Hello(m.PROTOCOL_VERSION))
    assert reply.axis_count == 2 and reply.device_name == "drive-base"
    assert reply.pv_resolution == 0.05  # both wheels' encoders have the same step


def test_axes_with_different_resolutions_declare_none():
    data = two_axes()
    data["axis"][1]["sensor"]["resolution"] = 0.1
    _, host = make(data)
    assert host.one(m.Hello(m.PROTOCOL_VERSION)).pv_resolution == 0.0  # 0 = not declared


def test_axis_beyond_the_count_is_bad_axis():
    _, host = make()
    for msg in (limits(2), m.GetLimits(2), m.Stream(2, 1, 1), m.SetOutput(2, 1.0),
                m.StoreGains(2, 1.0, 0.0, 0.0)):
        reply = host.one(msg)
        assert isinstance(reply, m.Nak) and reply.code == m.NakCode.BAD_AXIS
        assert reply.detail == 2.0  # SPEC: detail = axis_count


def test_limits_are_per_axis_and_read_back_with_their_axis():
    _, host = make()
    assert isinstance(host.one(limits(1, output_limit=30.0, watchdog_ms=500)), m.Ack)
    # axis 0 has none yet: its read-back and its motion are refused
    assert host.one(m.GetLimits(0)).code == m.NakCode.LIMITS_NOT_SET
    assert host.one(m.SetOutput(0, 5.0)).code == m.NakCode.LIMITS_NOT_SET
    back = host.one(m.GetLimits(1))
    assert isinstance(back, m.Limits)
    assert (back.axis, back.output_limit, back.watchdog_ms) == (1, 30.0, 500)
    assert isinstance(host.one(limits(0, output_limit=20.0)), m.Ack)
    assert host.one(m.GetLimits(0)).output_limit == 20.0
    assert host.one(m.GetLimits(1)).output_limit == 30.0
    # each axis clamps to its own limit
    assert host.one(m.SetOutput(0, 25.0)).code == m.NakCode.OUT_OF_RANGE
    assert isinstance(host.one(m.SetOutput(1, 25.0)), m.Ack)


def test_each_axis_drives_its_own_plant():
    dev, host = make()
    arm_both(host)
    host.one(m.SetOutput(0, 10.0))
    host.one(m.SetOutput(1, -5.0))
    out = host.run(400)  # 4 s = 8 time constants
    left, right = by_axis(out, 0), by_axis(out, 1)
    assert len(left) == len(right) == 400  # one Sample an axis a tick
    assert [s.device_us for s in left] == [s.device_us for s in right]
    assert left[-1].output == 10.0 and right[-1].output == -5.0
    # static gains 2 and 3, and axis 1's sensor offset of 1.0 (analytic: K u + offset)
    assert left[-1].pv == pytest.approx(20.0, abs=0.01)
    assert right[-1].pv == pytest.approx(1.0 - 15.0, abs=0.01)
    assert dev.axes[1].mode == m.Mode.HOST and dev.mode == m.Mode.HOST


def test_stream_is_per_axis():
    _, host = make()
    assert isinstance(host.one(m.Stream(1, 1, 2)), m.Ack)
    out = host.tick(10)
    assert by_axis(out, 0) == []
    assert len(by_axis(out, 1)) == 5  # decimation 2


def test_stop_idles_every_axis_within_one_tick():
    dev, host = make()
    arm_both(host)
    host.one(m.SetOutput(0, 10.0))
    host.one(m.StartRelay(1, 0.0, 0.0, 8.0, 8.0, 0.1))
    host.one(m.SetOffset(1, 3.0))
    host.run(50)
    host.req(m.Stop())
    out = host.tick()  # the tick after the Stop
    assert len(of_type(out, m.Stopped)) == 1
    for axis in (0, 1):
        (s,) = by_axis(out, axis)
        assert s.output == 0.0 and m.flags_mode(s.flags) == m.Mode.IDLE
        assert dev.axes[axis].offset == 0.0
    # limits kept: motion may start again at once
    assert isinstance(host.one(m.SetOutput(1, 1.0)), m.Ack)


def test_fault_latches_on_its_own_axis():
    # as protocol/board's C library: a latch an axis; the host's Stop halts the others
    dev, host = make()
    for axis in (0, 1):
        host.one(limits(axis, pv_low=-100.0, pv_high=100.0 if axis == 0 else 5.0))
        host.one(m.Stream(axis, 1, 1))
    host.one(m.SetOutput(0, 10.0))
    host.one(m.SetOutput(1, 10.0))  # K = 3 from 1.0: leaves the window at 5 within 0.1 s
    out: list = []
    for _ in range(100):
        got = host.tick()
        host.req(m.Ping(0, 0))
        out += got
        if of_type(got, m.Fault):
            break
    (fault,) = [o.msg for o in of_type(out, m.Fault)]
    assert fault.code == m.FaultCode.PV_WINDOW and fault.axis == 1
    (s0,), (s1,) = by_axis(got, 0), by_axis(got, 1)
    assert s1.output == 0.0 and s1.flags & m.FLAG_FAULT  # zero in the tick that found it
    assert s0.output == 10.0 and not s0.flags & m.FLAG_FAULT
    # the Fault frame follows its axis's Sample
    kinds = [(type(o.msg).__name__, getattr(o.msg, "axis", None)) for o in got]
    assert kinds == [("Sample", 0), ("Sample", 1), ("Fault", 1)]
    assert host.one(m.SetOutput(1, 1.0)).code == m.NakCode.FAULT_LATCHED
    assert host.one(m.SetOutput(1, 0.0)) == m.Ack(m.SetOutput.TYPE)  # zero always accepted
    # a reconnecting host hears of it again
    again = host.req(m.Hello(m.PROTOCOL_VERSION))
    assert [o.msg.axis for o in of_type(again, m.Fault)] == [1]
    # the host's one Stop halts the healthy wheel too; ClearFault clears every latch
    host.req(m.Stop())
    (s0,) = by_axis(host.tick(), 0)
    assert s0.output == 0.0
    assert isinstance(host.one(m.ClearFault()), m.Ack)
    assert dev.axes[1].fault is None
    assert isinstance(host.one(m.SetOutput(1, 1.0)), m.Ack)


def test_watchdog_covers_every_axis():
    _, host = make()
    arm_both(host, watchdog_ms=100)
    host.one(m.SetOutput(0, 10.0))
    host.one(m.StartRelay(1, 0.0, 0.0, 8.0, 8.0, 0.1))
    out = host.tick(30)  # the host falls silent: the watchdog period is 10 ticks
    assert sorted((f.msg.code, f.msg.axis) for f in of_type(out, m.Fault)) == [
        (m.FaultCode.WATCHDOG, 0), (m.FaultCode.WATCHDOG, 1)]
    zero_at = {axis: next(i for i, s in enumerate(by_axis(out, axis)) if s.output == 0.0)
               for axis in (0, 1)}
    # both zero on the same tick, the watchdog period after the last frame (SPEC section 8)
    assert zero_at[0] == zero_at[1] == 10
    assert all(s.output == 0.0 for axis in (0, 1) for s in by_axis(out, axis)[10:])


def test_each_axis_trips_after_its_own_watchdog_period():
    dev, host = make()
    host.one(limits(0, watchdog_ms=500))
    host.one(limits(1, watchdog_ms=100))
    host.one(m.SetOutput(0, 1.0))
    host.one(m.SetOutput(1, 1.0))
    out = host.tick(60)
    faults = [o.msg for o in of_type(out, m.Fault)]
    assert [(f.axis, f.device_us) for f in faults] == [(1, 10 * dev.tick_us),
                                                       (0, 50 * dev.tick_us)]
    assert dev.axes[0].applied == dev.axes[1].applied == 0.0


def test_idle_axis_does_not_arm_the_watchdog():
    dev, host = make()
    arm_both(host, watchdog_ms=100)
    host.one(m.SetOutput(1, 2.0))
    host.run(50)  # fed: no fault
    assert dev.fault is None
    assert not dev.watchdog_armed(0) and dev.watchdog_armed(1)
    out = host.tick()
    (s0,), (s1,) = by_axis(out, 0), by_axis(out, 1)
    assert not s0.flags & m.FLAG_WATCHDOG_ARMED and s1.flags & m.FLAG_WATCHDOG_ARMED


def test_stored_gains_are_per_axis():
    dev, host = make()
    assert isinstance(host.one(m.StoreGains(1, 2.0, 1.0, 0.0)), m.Ack)
    assert dev.axes[1].stored_gains == (2.0, 1.0, 0.0)
    assert dev.axes[0].stored_gains is None


def test_reset_loses_every_axis_limits():
    data = two_axes()
    data["faults"] = {"reset_after": 0.1}
    dev, host = make(data)
    host.one(m.Hello(m.PROTOCOL_VERSION))
    arm_both(host)
    host.run(20)
    assert dev.resets == 1
    assert all(a.limits is None and not a.streaming for a in dev.axes)
