"""Unit tests of the mock device state machine (mock_device.device) and its faults.

No I/O: frames are fed to Device.handle / handle_frame and Device.tick is called directly.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from mock_device.config import MockConfig, parse_config
from mock_device.device import Device, Outgoing
from mock_device.faults import (
    DeviceFaults,
    FaultSpec,
    FaultSpecError,
    LinkFaults,
    parse_fault_spec,
)
from protocol import messages as m
from protocol.framing import FrameDecoder, RawFrame

LIMIT = 50.0


def make_config(**tables: dict) -> MockConfig:
    base: dict = {
        "plant": {"num": [2.0], "den": [0.5, 1.0], "delay": 0.0},
        "device": {"period": 0.01, "watchdog": 0.25},
    }
    for key, value in tables.items():
        base.setdefault(key, {}).update(value)
    return parse_config(base, "<test>")


def make_device(faults: FaultSpec | None = None, logs: list[str] | None = None, **tables) -> Device:
    ids = iter(range(1000, 2000))
    sink = logs if logs is not None else []
    return Device(make_config(**tables), faults=faults, boot_id=lambda: next(ids), log=sink.append)


class Host:
    """Sends requests with increasing seq and collects every frame the device returns."""

    def __init__(self, dev: Device) -> None:
        self.dev = dev
        self.seq = 100
        self.frames: list[Outgoing] = []

    def req(self, msg: m.Message) -> list[Outgoing]:
        self.seq += 1
        out = self.dev.handle(msg, self.seq)
        self.frames += out
        return out

    def one(self, msg: m.Message) -> m.Message:
        out = self.req(msg)
        assert len(out) == 1
        assert out[0].seq == self.seq  # replies echo the request's seq
        return out[0].msg

    def tick(self, n: int = 1) -> list[Outgoing]:
        got: list[Outgoing] = []
        for _ in range(n):
            got += self.dev.tick()
        self.frames += got
        return got

    def run(self, n: int) -> list[Outgoing]:
        """Tick ``n`` times, feeding the watchdog with a Ping after every tick."""
        got: list[Outgoing] = []
        for _ in range(n):
            got += self.tick()
            self.req(m.Ping(0, 0))
        return got

    def armed(self, output_limit: float = LIMIT, watchdog_ms: int = 250, **kw) -> None:
        lim = m.SetLimits(0, output_limit, kw.get("pv_low", -1e6), kw.get("pv_high", 1e6),
                          kw.get("rate", 0.0), watchdog_ms)
        assert isinstance(self.one(lim), m.Ack)


def samples(out: list[Outgoing]) -> list[m.Sample]:
    return [o.msg for o in out if isinstance(o.msg, m.Sample)]


def of_type(out: list[Outgoing], cls: type) -> list:
    return [o for o in out if isinstance(o.msg, cls)]


# ------------------------------------------------------------------ handshake and basics


def test_hello_reply_fields():
    dev = make_device(device={"name": "bench-1", "max_output": 80.0, "pid": False})
    reply = Host(dev).one(m.Hello(m.PROTOCOL_VERSION))
    assert isinstance(reply, m.HelloReply)
    assert reply.device_name == "bench-1"
    assert reply.boot_id == 1000
    assert reply.tick_us == 10000
    assert reply.axis_count == 1
    assert reply.max_output == 80.0
    assert reply.capabilities & m.CAP_HOST_LOOP
    assert reply.capabilities & m.CAP_DEVICE_RELAY
    assert not reply.capabilities & m.CAP_DEVICE_PID


def test_version_mismatch_refused_and_logged():
    logs: list[str] = []
    host = Host(make_device(logs=logs))
    reply = host.one(m.Hello(m.PROTOCOL_VERSION + 7))
    assert isinstance(reply, m.Nak)
    assert reply.code == m.NakCode.BAD_VERSION
    assert reply.detail == m.PROTOCOL_VERSION
    assert any(str(m.PROTOCOL_VERSION + 7) in line and "version" in line for line in logs)


def test_ping_pong_echo_and_device_time():
    host = Host(make_device())
    host.tick(7)
    pong = host.one(m.Ping(0xDEADBEEF, 1234))
    assert isinstance(pong, m.Pong)
    assert (pong.nonce, pong.host_us, pong.boot_id) == (0xDEADBEEF, 1234, 1000)
    assert pong.device_us == 70000


def test_unknown_type_bad_length_bad_axis():
    dev = make_device()
    out = dev.handle_frame(RawFrame(0x3E, 9, b""))
    assert isinstance(out[0].msg, m.Nak) and out[0].msg.code == m.NakCode.UNKNOWN_TYPE
    assert out[0].seq == 9
    out = dev.handle_frame(RawFrame(m.Ack.TYPE, 10, b"\x01"))  # device-to-host type
    assert out[0].msg.code == m.NakCode.UNKNOWN_TYPE
    out = dev.handle_frame(RawFrame(m.SetOutput.TYPE, 11, b"\x00\x00"))
    assert out[0].msg.code == m.NakCode.BAD_LENGTH
    assert out[0].msg.detail == m.SetOutput.payload_size()
    reply = Host(dev).one(m.SetOutput(3, 1.0))
    assert reply.code == m.NakCode.BAD_AXIS


def test_motion_refused_before_limits():
    host = Host(make_device())
    for msg in (
        m.SetOutput(0, 5.0),
        m.StartRelay(0, 0.0, 0.0, 10.0, 10.0, 0.1),
        m.SetPid(0, 1.0, 1.0, 0.0, 1.0, 10.0, 0.0, 1.0, 0.0),
    ):
        reply = host.one(msg)
        assert isinstance(reply, m.Nak) and reply.code == m.NakCode.LIMITS_NOT_SET
    assert isinstance(host.one(m.SetOutput(0, 0.0)), m.Ack)  # zero is harmless
    assert host.one(m.GetLimits(0)).code == m.NakCode.LIMITS_NOT_SET
    host.tick(5)
    assert host.dev.applied == 0.0
    assert host.dev.mode == m.Mode.IDLE


def test_set_limits_validation_and_readback():
    host = Host(make_device(device={"max_output": 80.0}))
    bad = [
        m.SetLimits(0, 90.0, -1, 1, 0, 250),  # above max_output
        m.SetLimits(0, 0.0, -1, 1, 0, 250),
        m.SetLimits(0, 10.0, 1, 1, 0, 250),  # empty window
        m.SetLimits(0, 10.0, -1, 1, -2, 250),
        m.SetLimits(0, 10.0, -1, 1, 0, 5),  # watchdog below 10 ms
        m.SetLimits(0, 10.0, -1, math.nan, 0, 250),
    ]
    for msg in bad:
        reply = host.one(msg)
        assert isinstance(reply, m.Nak) and reply.code == m.NakCode.OUT_OF_RANGE, msg
    assert host.dev.limits is None
    assert isinstance(host.one(m.SetLimits(0, 40.0, -2.5, 7.5, 3.0, 400)), m.Ack)
    lim = host.one(m.GetLimits(0))
    assert isinstance(lim, m.Limits)
    assert (lim.output_limit, lim.pv_low, lim.pv_high, lim.pv_rate_limit, lim.watchdog_ms) == (
        40.0, -2.5, 7.5, 3.0, 400,
    )
    assert isinstance(host.one(m.SetLimits(0, 40.0, -2.5, 7.5, 3.0, 0)), m.Ack)
    assert host.dev.limits.watchdog == 0.25  # 0 -> the plant file's [device] watchdog


# ------------------------------------------------------------------ host loop and streaming


def test_out_of_range_output_nak_and_output_unchanged():
    host = Host(make_device())
    host.armed()
    assert isinstance(host.one(m.SetOutput(0, 12.0)), m.Ack)
    host.tick()
    reply = host.one(m.SetOutput(0, 60.0))
    assert isinstance(reply, m.Nak)
    assert reply.code == m.NakCode.OUT_OF_RANGE
    assert reply.detail == 60.0
    host.tick()
    assert host.dev.applied == 12.0
    assert host.one(m.SetOutput(0, math.inf)).code == m.NakCode.OUT_OF_RANGE


def test_streaming_decimation_seq_and_timestamps():
    host = Host(make_device())
    assert isinstance(host.one(m.Stream(0, 1, 3)), m.Ack)
    out = host.tick(30)
    s = samples(out)
    seqs = [o.seq for o in out if isinstance(o.msg, m.Sample)]
    assert [x.device_us for x in s] == list(range(0, 300000, 30000))
    assert seqs == list(range(len(s)))
    assert all(x.flags & m.FLAG_STREAMING for x in s)
    assert host.one(m.Stream(0, 1, 0)).code == m.NakCode.OUT_OF_RANGE
    host.one(m.Stream(0, 0, 0))
    assert samples(host.tick(10)) == []


def test_host_output_applied_at_next_tick_and_plant_moves():
    # Analytic: first-order 2/(0.5 s + 1) with input 10 applied from t=0.01 reaches
    # 20 (1 - exp(-(t - 0.01)/0.5)).
    host = Host(make_device())
    host.armed()
    host.one(m.Stream(0, 1, 1))
    s0 = samples(host.tick())[0]
    assert s0.output == 0.0
    host.one(m.SetOutput(0, 10.0))
    s = samples(host.run(100))
    assert s[0].output == 10.0
    assert s[0].flags & m.FLAG_MODE_MASK == m.Mode.HOST << m.FLAG_MODE_SHIFT
    t_last = s[-1].device_us * 1e-6
    expected = 20 * (1 - math.exp(-(t_last - 0.01) / 0.5))
    assert s[-1].pv == pytest.approx(expected, rel=1e-5)


def test_output_clamped_to_limit_with_offset():
    host = Host(make_device())
    host.armed(output_limit=20.0)
    host.one(m.SetOutput(0, 15.0))
    assert isinstance(host.one(m.SetOffset(0, 10.0)), m.Ack)
    host.one(m.Stream(0, 1, 1))
    s = samples(host.tick())[0]
    assert s.output == 20.0
    assert s.flags & m.FLAG_CLAMPED
    assert host.one(m.SetOffset(0, 30.0)).code == m.NakCode.OUT_OF_RANGE


def test_actuator_saturation_reported():
    host = Host(make_device(actuator={"limit": 30.0}))
    host.armed(output_limit=50.0)
    host.one(m.SetOutput(0, 45.0))
    host.tick()
    assert host.dev.applied == 30.0


# ------------------------------------------------------------------ watchdog, faults, stop


def test_watchdog_trips_after_period_and_reported_on_reconnect():
    host = Host(make_device())
    host.armed(watchdog_ms=250)
    host.one(m.Stream(0, 1, 1))
    host.one(m.SetOutput(0, 10.0))  # last frame, handled before tick 0
    out = host.tick(40)
    s = samples(out)
    faults = of_type(out, m.Fault)
    assert len(faults) == 1
    f = faults[0].msg
    assert f.code == m.FaultCode.WATCHDOG
    # silent for 250 ms = 25 ticks: ticks 0..24 drive, tick 25 applies zero
    outputs = [x.output for x in s]
    assert outputs[:25] == [10.0] * 25
    assert outputs[25:] == [0.0] * 15
    assert f.device_us == 250000
    assert all(x.flags & m.FLAG_FAULT for x in s[25:])
    assert host.dev.mode == m.Mode.IDLE
    # reported again on reconnect
    out = host.req(m.Hello(m.PROTOCOL_VERSION))
    assert isinstance(out[0].msg, m.HelloReply)
    assert isinstance(out[1].msg, m.Fault) and out[1].msg.code == m.FaultCode.WATCHDOG
    # latched: motion refused until ClearFault
    reply = host.one(m.SetOutput(0, 5.0))
    assert reply.code == m.NakCode.FAULT_LATCHED and reply.detail == m.FaultCode.WATCHDOG
    assert isinstance(host.one(m.ClearFault()), m.Ack)
    assert isinstance(host.one(m.SetOutput(0, 5.0)), m.Ack)


def test_watchdog_fed_by_any_frame_and_idle_not_armed():
    host = Host(make_device())
    host.armed(watchdog_ms=100)
    host.tick(50)  # idle: watchdog not armed
    assert host.dev.fault is None
    host.one(m.SetOutput(0, 3.0))
    for _ in range(20):
        host.tick(9)
        host.one(m.Ping(1, 2))
    assert host.dev.fault is None
    assert host.dev.mode == m.Mode.HOST


def test_stop_answered_after_output_zero():
    host = Host(make_device())
    host.armed()
    host.one(m.Stream(0, 1, 1))
    host.one(m.SetOutput(0, 25.0))
    host.tick(3)
    assert host.req(m.Stop()) == []  # no reply before the next tick
    stop_seq = host.seq
    out = host.tick()
    stopped = of_type(out, m.Stopped)
    assert len(stopped) == 1 and stopped[0].seq == stop_seq
    assert samples(out)[0].output == 0.0
    assert out.index(stopped[0]) > out.index(of_type(out, m.Sample)[0])
    assert host.dev.mode == m.Mode.IDLE
    assert host.dev.streaming and host.dev.limits is not None  # kept over Stop


def test_stop_clears_offset_and_is_never_refused():
    host = Host(make_device())
    host.req(m.Stop())  # no limits yet: still answered
    assert of_type(host.tick(), m.Stopped)
    host.armed()
    host.one(m.SetOffset(0, 4.0))
    host.one(m.SetOutput(0, 1.0))
    host.tick()
    assert host.dev.applied == 5.0
    host.req(m.Stop())
    host.tick()
    host.one(m.SetOutput(0, 1.0))
    host.tick()
    assert host.dev.applied == 1.0


def test_ignore_stop_fault():
    host = Host(make_device(faults=FaultSpec(ignore_stop=True)))
    host.armed()
    host.one(m.SetOutput(0, 25.0))
    host.req(m.Stop())
    out = host.tick(3)
    assert of_type(out, m.Stopped) == []
    assert host.dev.applied == 25.0


def _scripted(dev: Device, values: list[float]) -> None:
    it = iter(values)
    dev.sensor.read = lambda _y: next(it)  # type: ignore[method-assign]


def test_pv_window_trip():
    host = Host(make_device())
    host.armed(pv_low=-1.0, pv_high=1.0)
    _scripted(host.dev, [0.0, 0.5, 0.9, 1.2, 1.5, 1.5])
    host.one(m.SetOutput(0, 5.0))
    host.one(m.Stream(0, 1, 1))
    out = host.tick(3)
    assert of_type(out, m.Fault) == []
    out = host.tick()
    f = of_type(out, m.Fault)
    assert len(f) == 1 and f[0].msg.code == m.FaultCode.PV_WINDOW
    assert f[0].msg.value == pytest.approx(1.2)
    assert host.dev.applied == 0.0  # zero in the very tick that saw the violation
    # the tick's Sample (offending PV, zero output) goes out before the Fault, in seq order
    [s] = of_type(out, m.Sample)
    assert s.msg.pv == pytest.approx(1.2) and s.msg.output == 0.0
    assert s.msg.flags & m.FLAG_FAULT
    assert out.index(s) < out.index(f[0]) and f[0].seq == s.seq + 1


def test_pv_rate_trip_and_single_spike_ignored():
    host = Host(make_device())
    host.armed(rate=50.0)  # PV units/s: 0.5 per tick
    pv = [0.0] * 5 + [3.0] + [0.0] * 5  # one-tick spike of 3 (300 /s) -> no trip
    pv += [0.1 * k for k in range(1, 6)]  # 10 /s: fine
    pv += [0.5 + 1.0 * k for k in range(1, 6)]  # 100 /s: trips
    _scripted(host.dev, pv)
    host.one(m.SetOutput(0, 1.0))
    out = []
    for _ in range(16):
        out += host.tick()
        host.one(m.Ping(0, 0))
    assert of_type(out, m.Fault) == []
    out = host.tick(5)
    f = of_type(out, m.Fault)
    assert len(f) == 1 and f[0].msg.code == m.FaultCode.PV_RATE
    # the median-of-3 filter delays the detection by at most one tick
    assert host.dev.fault_us <= (16 + 2) * 10000


# ------------------------------------------------------------------ relay and PID


def test_relay_switching_with_hysteresis():
    host = Host(make_device())
    host.armed()
    _scripted(host.dev, [0.0, 0.0, 0.5, 1.05, 1.2, 0.95, 0.85, 0.5, 1.0])
    host.tick()  # pv = 0 read
    reply = host.one(m.StartRelay(0, 1.0, 2.0, 10.0, 6.0, 0.1))
    assert isinstance(reply, m.Ack)
    host.one(m.Stream(0, 1, 1))
    s = samples(host.tick(8))
    # error = 1 - pv: 1, 0.5, -0.05 (inside band), -0.2 (low), 0.05, 0.15 (high), 0.5, 0
    assert [x.output for x in s] == [12.0, 12.0, 12.0, -4.0, -4.0, 12.0, 12.0, 12.0]
    assert all(x.setpoint == 1.0 for x in s)
    assert s[0].flags & m.FLAG_RELAY_HIGH
    assert not s[3].flags & m.FLAG_RELAY_HIGH
    assert host.one(m.StartRelay(0, 1.0, 45.0, 10.0, 6.0, 0.1)).code == m.NakCode.OUT_OF_RANGE


def test_relay_limit_cycle_on_cart_wheel():
    # Sanity of the demo numbers: a relay of +/-20 % oscillates with a period a little above the
    # ultimate period, 0.40-0.42 s (python-control, see the scenario file); the describing
    # function (an approximation, a = 4 d |G(j wu)| / pi) predicts ~0.45 rad/s.
    from mock_device.config import load_config

    dev = Device(load_config("cart-wheel"), boot_id=lambda: 1)
    host = Host(dev)
    host.armed()
    host.one(m.StartRelay(0, 0.0, 0.0, 20.0, 20.0, 0.05))
    host.one(m.Stream(0, 1, 1))
    s = []
    for _ in range(400):
        s += samples(host.tick())
        host.one(m.Ping(0, 0))
    u = np.array([x.output for x in s])
    t = np.array([x.device_us for x in s]) * 1e-6
    pv = np.array([x.pv for x in s])
    ups = t[1:][(u[1:] > 0) & (u[:-1] < 0)]
    periods = np.diff(ups[2:])
    # hysteresis and quantisation lengthen the period beyond Tu (see ARCHITECTURE method notes)
    assert 0.40 < periods.mean() < 0.55
    amp = (pv[t > 2].max() - pv[t > 2].min()) / 2
    assert 0.3 < amp < 0.7


def test_pid_proportional_steady_state_error():
    # Analytic: P control of K/(T s + 1), K = 2: e_ss = r / (1 + K kp).
    host = Host(make_device())
    host.armed()
    host.one(m.SetPid(0, 1.5, 0.0, 0.0, 1.0, 10.0, 0.0, 4.0, 0.0))
    host.one(m.Stream(0, 1, 1))
    s = []
    for _ in range(300):
        s += samples(host.tick())
        host.one(m.Ping(0, 0))
    assert s[-1].pv == pytest.approx(4.0 - 4.0 / (1 + 2 * 1.5), abs=1e-4)
    assert s[-1].setpoint == 4.0


def test_pid_integral_removes_error_and_setpoint_change():
    host = Host(make_device(plant={"load": -3.0}))
    host.armed()
    host.one(m.SetPid(0, 1.0, 4.0, 0.05, 1.0, 10.0, 0.0, 2.0, 0.0))
    for _ in range(500):
        host.tick()
        host.one(m.Ping(0, 0))
    assert host.dev.pv == pytest.approx(2.0, abs=1e-3)  # integral action rejects the load
    assert isinstance(host.one(m.SetSetpoint(0, 3.0)), m.Ack)
    for _ in range(500):
        host.tick()
        host.one(m.Ping(0, 0))
    assert host.dev.pv == pytest.approx(3.0, abs=1e-3)


def test_pid_derivative_on_measurement_and_setpoint_weight():
    # With derivative on measurement and setpoint weight b, a setpoint step changes the output
    # at once by exactly kp * b * step (no derivative kick): analytic from the control law.
    host = Host(make_device())
    host.armed(output_limit=100.0)
    kp, b = 2.0, 0.4
    _scripted(host.dev, [0.0] * 10)
    host.one(m.SetPid(0, kp, 0.0, 0.5, b, 8.0, 0.0, 0.0, 0.0))
    host.tick(2)
    before = host.dev.applied
    host.one(m.SetSetpoint(0, 5.0))
    host.tick()
    assert host.dev.applied - before == pytest.approx(kp * b * 5.0)


def test_pid_anti_windup_back_calculation():
    # Common practice, no source: under output saturation a PI without anti-windup overshoots
    # much more than one with back-calculation or clamping. The reference without anti-windup
    # is simulated here directly (same plant, same discrete PI, no integrator correction).
    from mock_device.plant import LtiPlant

    kp, ki, lim, sp = 0.5, 5.0, 5.0, 8.0

    def run(tt: float) -> float:
        host = Host(make_device())
        host.armed(output_limit=lim)
        host.one(m.SetPid(0, kp, ki, 0.0, 1.0, 10.0, tt, sp, 0.0))
        peak = -math.inf
        for _ in range(600):
            host.tick()
            host.one(m.Ping(0, 0))
            peak = max(peak, host.dev.pv)
        assert host.dev.pv == pytest.approx(sp, abs=1e-3)
        return peak

    plant = LtiPlant([2.0], [0.5, 1.0], max_step=1e-3)
    integral, naive_peak = 0.0, -math.inf
    for _ in range(600):
        e = sp - plant.y
        u = min(lim, max(-lim, kp * e + integral))
        integral += ki * 0.01 * e
        plant.advance(u, 0.01)
        naive_peak = max(naive_peak, plant.y)
    assert run(1e9) == pytest.approx(naive_peak, abs=0.02)  # Tt -> inf: no correction
    assert run(0.05) < naive_peak - 1.0  # back-calculation
    assert run(0.0) < naive_peak - 1.0  # clamping


def test_pid_refused_parameters_and_capability():
    host = Host(make_device())
    host.armed()
    assert host.one(m.SetPid(0, 1, 1, 0, 1.5, 10, 0, 0, 0)).code == m.NakCode.OUT_OF_RANGE
    assert host.one(m.SetPid(0, 1, 1, 0, 1.0, 0, 0, 0, 0)).code == m.NakCode.OUT_OF_RANGE
    assert host.one(m.SetSetpoint(0, 1.0)).code == m.NakCode.NOT_ALLOWED
    host2 = Host(make_device(device={"relay": False, "pid": False}))
    host2.armed()
    assert host2.one(m.SetPid(0, 1, 1, 0, 1, 10, 0, 0, 0)).code == m.NakCode.NOT_ALLOWED
    assert host2.one(m.StartRelay(0, 0, 0, 1, 1, 0)).code == m.NakCode.NOT_ALLOWED


# ------------------------------------------------------------------ device-level faults


def test_fault_clock_starts_at_first_hello():
    dev = make_device(faults=FaultSpec(stuck_after=0.1))
    host = Host(dev)
    host.armed()
    host.one(m.SetOutput(0, 10.0))
    for _ in range(30):
        host.tick()
        host.one(m.Ping(0, 0))
    assert dev.pv > 0.5  # no Hello yet: no fault
    host.one(m.Hello(m.PROTOCOL_VERSION))
    pvs = []
    for _ in range(40):
        host.tick()
        host.one(m.Ping(0, 0))
        pvs.append(dev.pv)
    assert pvs[9] < pvs[10] == pvs[-1]  # frozen from 0.1 s after the Hello on


def test_reset_fault_new_boot_id_state_lost():
    dev = make_device(faults=FaultSpec(reset_after=0.2))
    host = Host(dev)
    host.one(m.Hello(m.PROTOCOL_VERSION))
    host.armed()
    host.one(m.Stream(0, 1, 1))
    host.one(m.SetOutput(0, 10.0))
    out = []
    for _ in range(30):
        out += host.tick()
        host.one(m.Ping(0, 0))
    assert dev.resets == 1
    assert dev.boot_id == 1001
    assert dev.limits is None and dev.mode == m.Mode.IDLE and not dev.streaming
    s = samples(out)
    assert s[-1].device_us == 190000  # last sample before the reset
    pong = host.one(m.Ping(1, 1))
    assert pong.boot_id == 1001
    assert pong.device_us < 200000
    assert host.one(m.SetOutput(0, 1.0)).code == m.NakCode.LIMITS_NOT_SET


def test_reverse_sign_fault():
    host = Host(make_device(faults=FaultSpec(reverse_sign=True)))
    host.armed()
    host.one(m.SetOutput(0, 10.0))
    for _ in range(50):
        host.tick()
        host.one(m.Ping(0, 0))
    assert host.dev.pv < -5.0
    assert host.dev.applied == 10.0  # the device believes it drives +10


def test_unstable_fault_runs_away_and_window_trips():
    # Analytic: the runaway term is A (exp(R t) - 1) with t since the Hello.
    spec = FaultSpec(unstable=2.0, unstable_size=0.5)
    host = Host(make_device(faults=spec))
    host.one(m.Hello(m.PROTOCOL_VERSION))
    host.tick(100)
    assert host.dev.pv == pytest.approx(0.5 * math.expm1(2.0 * 0.99), rel=1e-9)
    host.armed(pv_low=-100.0, pv_high=100.0)
    host.one(m.SetOutput(0, 0.001))
    out = []
    for _ in range(200):
        out += host.tick()
        host.one(m.Ping(0, 0))
    f = of_type(out, m.Fault)
    assert len(f) == 1 and f[0].msg.code == m.FaultCode.PV_WINDOW
    # tripped in the first tick whose PV is beyond 100 (within one tick)
    t_trip = f[0].msg.device_us * 1e-6
    assert 0.5 * math.expm1(2.0 * (t_trip - 0.01)) <= 100.0 < 0.5 * math.expm1(2.0 * t_trip)


def test_spikes_fault():
    spec = FaultSpec(spike_rate=0.2, spike_size=4.0, seed=9)
    host = Host(make_device(faults=spec))
    host.tick(500)
    f = host.dev.faults
    assert 60 < f.spikes < 140  # binomial(500, 0.2): mean 100, sd 9
    dev2 = make_device(faults=spec)
    pv1 = []
    pv2 = []
    d1 = make_device(faults=spec)
    for _ in range(100):
        d1.tick()
        dev2.tick()
        pv1.append(d1.pv)
        pv2.append(dev2.pv)
    assert pv1 == pv2  # reproducible from the seed
    assert set(np.round(np.abs(pv1), 9)) <= {0.0, 4.0}


def test_stuck_and_disconnect_due():
    f = DeviceFaults(FaultSpec(stuck_after=1.0, disconnect_after=2.0))
    assert f.pv(1.0, None) == 1.0
    assert f.pv(2.0, 0.5) == 2.0
    assert f.pv(3.0, 1.0) == 3.0
    assert f.pv(4.0, 1.5) == 3.0
    assert not f.disconnect_due(None)
    assert not f.disconnect_due(1.99)
    assert f.disconnect_due(2.0)


def test_disconnect_requested_by_device():
    dev = make_device(faults=FaultSpec(disconnect_after=0.05))
    dev.handle(m.Hello(m.PROTOCOL_VERSION), 1)
    for _ in range(5):
        dev.tick()
    assert not dev.disconnect_requested
    dev.tick()
    assert dev.disconnect_requested


# ------------------------------------------------------------------ link faults


def _frames(n: int) -> list[bytes]:
    return [m.encode(m.Sample(0, k * 10000, 1.0, 2.0, 0.0, 1), k) for k in range(n)]


def test_link_corrupt_every_byte_rejected_by_crc():
    lf = LinkFaults(FaultSpec(corrupt=1.0, seed=1))
    dec = FrameDecoder()
    good = 0
    for frame in _frames(200):
        for _, chunk in lf.outgoing(frame, 0.0):
            assert len(chunk) == len(frame)
            diff = [bin(a ^ b).count("1") for a, b in zip(chunk, frame, strict=True)]
            assert diff == [1] * len(frame)  # exactly one bit flipped in every byte
            good += len(dec.feed(chunk))
    assert good == 0


def test_link_corrupt_rate_and_counts():
    lf = LinkFaults(FaultSpec(corrupt=0.01, seed=2))
    dec = FrameDecoder()
    frames = _frames(2000)
    for frame in frames:
        for _, chunk in lf.outgoing(frame, 0.0):
            dec.feed(chunk)
    nbytes = sum(len(f) for f in frames)
    assert lf.bits_flipped == pytest.approx(0.01 * nbytes, rel=0.15)
    assert dec.frames_good + dec.crc_errors + dec.framing_errors >= 2000 - lf.bits_flipped
    assert dec.frames_good < 2000


def test_link_drop_and_drop_bytes():
    lf = LinkFaults(FaultSpec(drop=0.25, seed=3))
    kept = sum(len(lf.outgoing(f, 0.0)) for f in _frames(1000))
    assert kept + lf.frames_dropped == 1000
    assert 200 < lf.frames_dropped < 300
    lb = LinkFaults(FaultSpec(drop_bytes=0.1, seed=3))
    frames = _frames(100)
    sent = sum(len(c) for f in frames for _, c in lb.outgoing(f, 0.0))
    assert sent + lb.bytes_dropped == sum(len(f) for f in frames)


def test_link_latency_jitter_keep_order():
    lf = LinkFaults(FaultSpec(latency=0.005, jitter=0.002, seed=4))
    last = -1.0
    for k, frame in enumerate(_frames(500)):
        t = k * 0.001
        [(release, data)] = lf.outgoing(frame, t)
        assert data == frame
        assert release >= t + 0.005
        assert release >= last
        last = release
        # never later than latency + jitter after the latest earlier write time
        assert release <= t + 0.007 + 1e-12


def test_link_garbage_rate_and_reproducible():
    spec = FaultSpec(garbage=5.0, garbage_len=8, seed=5)
    a = LinkFaults(spec)
    b = LinkFaults(spec)
    bursts_a = [x for k in range(1000) for x in a.garbage(k * 0.01, (k + 1) * 0.01)]
    bursts_b = [x for k in range(1000) for x in b.garbage(k * 0.01, (k + 1) * 0.01)]
    assert bursts_a == bursts_b
    assert 30 < len(bursts_a) < 75  # Poisson(50)
    assert all(1 <= len(data) <= 8 for _, data in bursts_a)


def test_link_corrupt_rx():
    lf = LinkFaults(FaultSpec(corrupt_rx=1.0))
    data = bytes(range(50))
    assert lf.incoming(data) != data
    assert LinkFaults(FaultSpec()).incoming(data) == data


# ------------------------------------------------------------------ fault spec syntax


def test_parse_fault_spec_full_example():
    spec = parse_fault_spec(
        "corrupt=0.01,drop=0.001,latency=0.005,jitter=0.002,garbage=0.5,disconnect_after=3.0,"
        "reset_after=2.0,stuck_after=1.0,spike_rate=0.01,spike_size=5,reverse_sign=1,unstable=1,"
        "ignore_stop=1,seed=3"
    )
    assert spec.corrupt == 0.01 and spec.drop == 0.001 and spec.latency == 0.005
    assert spec.disconnect_after == 3.0 and spec.reset_after == 2.0 and spec.stuck_after == 1.0
    assert spec.reverse_sign is True and spec.ignore_stop is True and spec.seed == 3
    assert spec.unstable == 1.0 and spec.spike_size == 5.0
    assert parse_fault_spec("") == FaultSpec()
    assert parse_fault_spec(" seed = 4 , ").seed == 4


@pytest.mark.parametrize(
    "text,key",
    [
        ("bogus=1", "bogus"),
        ("corrupt=2", "corrupt"),
        ("corrupt=x", "corrupt"),
        ("latency=-1", "latency"),
        ("seed=1.5", "seed"),
        ("reverse_sign=2", "reverse_sign"),
        ("drop", "drop"),
        ("seed=1,seed=2", "seed"),
        ("jitter=nan", "jitter"),
    ],
)
def test_parse_fault_spec_errors_name_the_key(text, key):
    with pytest.raises(FaultSpecError) as info:
        parse_fault_spec(text)
    assert info.value.key == key


def test_fault_spec_merge():
    a = FaultSpec(corrupt=0.1, seed=2)
    b = FaultSpec(drop=0.2)
    merged = a.merged(b)
    assert merged.corrupt == 0.1 and merged.drop == 0.2 and merged.seed == 2


# ------------------------------------------------------------------ server pacing (fake clock)


class _FakeClock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now

    def sleep(self, dt: float) -> None:
        self.now += max(dt, 1e-6)


class _FakeTransport:
    """No peer to wait on (so the server sleeps on the fake clock); records writes."""

    peer = False

    def __init__(self, clock: _FakeClock, inbox: list[tuple[float, bytes]], until: float,
                 server_box: list) -> None:
        self.clock = clock
        self.inbox = inbox
        self.until = until
        self.server_box = server_box
        self.writes: list[tuple[float, bytes]] = []

    def fileno(self) -> int:
        return -1

    def poll(self) -> None:
        pass

    def read(self) -> bytes:
        if self.clock.now >= self.until:
            self.server_box[0].stop()
        if self.inbox and self.inbox[0][0] <= self.clock.now:
            return self.inbox.pop(0)[1]
        return b""

    def write(self, data: bytes) -> int:
        self.writes.append((self.clock.now, data))
        return len(data)


def _serve(baud=None, faults: FaultSpec | None = None, speed=1.0, until=0.5):
    from mock_device.server import Server

    clock = _FakeClock()
    inbox = [(0.0, m.encode(m.Stream(0, 1, 1), 1))]
    box: list = []
    transport = _FakeTransport(clock, inbox, until, box)
    dev = make_device()
    server = Server(
        dev, transport, speed=speed, baud=baud, clock=clock, sleep=clock.sleep,
        link_faults=LinkFaults(faults) if faults is not None else None,
    )
    box.append(server)
    server.run()
    frames = []
    dec = FrameDecoder()
    for when, data in transport.writes:
        for raw in dec.feed(data):
            frames.append((when, m.decode(raw)))
    return server, frames


def test_server_ticks_on_schedule_with_speed():
    server, frames = _serve(speed=4.0, until=0.25)  # 0.25 wall s = 1.0 device s
    s = [(w, x) for w, x in frames if isinstance(x, m.Sample)]
    assert server.ticks == pytest.approx(100, abs=2)
    for wall, sample in s:
        # written at (or just after) its tick's wall time: device time / speed
        assert sample.device_us * 1e-6 / 4.0 == pytest.approx(wall, abs=2e-3)


def test_server_baud_pacing_like_a_uart():
    # 8N1 at 9600 baud: 10 bits a byte, so a frame of n bytes takes n * 10 / 9600 s; a sample
    # frame (27 bytes) needs 28 ms, more than the 10 ms tick: the line runs back to back.
    server, frames = _serve(baud=9600, until=3.0)
    times = [w for w, x in frames if isinstance(x, m.Sample)]
    size = len(m.encode(m.Sample(0, 0, 0.0, 0.0, 0.0, 0), 0))
    gaps = np.diff(times)
    assert np.allclose(gaps[2:], size * 10 / 9600, atol=2e-3)
    assert server.tx_overflows > 0  # the transmit buffer overflowed, frames were dropped
    # a paced line never delivers more than the baud rate allows
    total = sum(len(m.encode(x, 0)) for _, x in frames)
    assert total * 10 / 9600 <= times[-1] + 0.03


def test_server_latency_fault_delays_writes():
    server, frames = _serve(faults=FaultSpec(latency=0.05), until=0.3)
    s = [(w, x) for w, x in frames if isinstance(x, m.Sample)]
    assert s
    for wall, sample in s:
        assert wall - sample.device_us * 1e-6 == pytest.approx(0.05, abs=2e-3)
