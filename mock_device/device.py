"""Device state machine of the mock controller board (one or several axes). No I/O, no clock.

The I/O loop (mock_device.server) feeds it received frames with ``handle_frame`` between ticks
and calls ``tick`` once per device period; both return the frames to send as ``Outgoing``
(message, seq). Replies (including Stopped, which is sent from ``tick``) echo the request's
seq; the unsolicited Sample and Fault frames use the device's own incrementing counter.

Tick k at device time t_k = k * tick_us (microseconds):
  1. pv_k = sensor(plant.y) (after any sensor faults)
  2. mode logic: idle -> 0; host -> last SetOutput; relay -> relay on pv_k; pid -> PID on pv_k;
     plus the SetOffset offset in every non-idle mode
  3. safety: clamp to +/- output_limit; while not idle, PV outside [pv_low, pv_high] or
     |dPV/dt| > pv_rate_limit (rate from a median-of-3 filtered PV, so a one-tick spike alone
     does not trip it) -> output 0, fault latched, Fault sent, mode idle; watchdog: no frame
     for watchdog period while not idle -> same with WATCHDOG. A latched fault keeps the
     output at 0 until ClearFault.
  4. the applied drive (after actuator saturation) is held by the plant for [t_k, t_k+1)
  5. streaming and k % decimation == 0 -> Sample(t_k, pv_k, applied u_k, setpoint, flags);
     then the Fault frame of a fault latched in this tick (after the Sample that shows it);
     Stop requests received before this tick are answered with Stopped now (output is zero).

Several axes (a plant file with ``[[axis]]`` tables): each axis has its own plant, mode,
limits, relay, PID, offset, stream and fault latch (as in protocol/board's C library), and
the tick runs steps 1-4 on every axis in axis order, then 5 for each axis (its Sample, then
the Fault frame naming it). Shared: one watchdog clock (any good frame from the host but Stop
feeds it, so a silent host trips every non-idle axis, each after its own watchdog period),
Stop, which idles every axis, and ClearFault, which clears every axis's latch. A fault on one
axis leaves the others moving: the host stops them all when it sees the Fault frame. The
injected device faults (sensor, actuator sign) act on axis 0.
"""

from __future__ import annotations

import dataclasses
import math
import secrets
from collections.abc import Callable
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from mock_device.config import AxisConfig, MockConfig
from mock_device.faults import DeviceFaults, FaultSpec
from mock_device.plant import Actuator, LtiPlant, Sensor
from protocol import messages as m
from protocol.errors import BadLength, DecodeError, UnknownType
from protocol.framing import RawFrame

FIRMWARE = "mock-1.0"


class Outgoing(NamedTuple):
    """One frame to send: the message and its sequence number."""

    msg: m.Message
    seq: int


@dataclass
class AxisLimits:
    """Loaded device-side limits: output units, PV units, PV units/s, seconds."""

    output_limit: float
    pv_low: float
    pv_high: float
    pv_rate_limit: float
    watchdog_ms: int
    watchdog: float  # effective watchdog period, s


@dataclass
class PidState:
    """Device-side PID (parallel form, derivative on measurement, filtered, anti-windup)."""

    kp: float
    ki: float
    kd: float
    b: float
    n: float
    tt: float
    setpoint: float
    bias: float
    integral: float = 0.0
    deriv: float = 0.0
    pv_prev: float | None = None


@dataclass(frozen=True)
class _HelloReplyV1(m.HelloReply):
    """A HelloReply sent with the version-1 layout (44 bytes, no pv_resolution)."""

    def pack(self) -> bytes:
        return self.pack_v1()


def _default_boot_id() -> int:
    return secrets.randbits(32) or 1


class Axis:
    """One axis of the board: its physics (kept over a reset) and its volatile state.

    Args:
        config: the axis's plant, actuator and sensor.
        period: device tick, s (the plant's integration step is a tenth of it).
        rng: sensor noise generator.
    """

    def __init__(self, config: AxisConfig, period: float, rng: np.random.Generator) -> None:
        self.config = config
        self.period = period
        self.plant = LtiPlant(
            config.plant.num, config.plant.den, config.plant.delay, max_step=period / 10
        )
        self.actuator = Actuator(config.actuator.limit, config.actuator.deadband)
        self.sensor = Sensor(
            config.sensor.noise, config.sensor.resolution, config.sensor.offset, rng
        )
        self.load = config.plant.load
        self.power_up()

    def power_up(self) -> None:
        """Volatile state after power-up or reset (the plant's physics carries on)."""
        self.mode = m.Mode.IDLE
        self.limits: AxisLimits | None = None
        self.host_output = 0.0
        self.offset = 0.0
        self.relay_centre = 0.0
        self.relay_bias = 0.0
        self.relay_high_amp = 0.0
        self.relay_low_amp = 0.0
        self.relay_hyst = 0.0
        self.relay_high = False
        self.pid: PidState | None = None
        self.streaming = False
        self.decimation = 1
        self.applied = 0.0  # drive applied over the current tick interval, output units
        self.clamped = False
        self._pv_hist: list[float] = []  # last three raw PV values (for the rate check)
        self._pvf_prev: float | None = None
        self.pv = self.sensor.offset  # last PV read
        self.stored_gains: tuple[float, float, float] | None = None
        self.fault: m.FaultCode | None = None
        self.fault_value = 0.0
        self.fault_us = 0

    def go_idle(self) -> None:
        """IDLE, output 0 (the offset is kept: only Stop clears it)."""
        self.mode = m.Mode.IDLE
        self.host_output = 0.0
        self.pid = None

    def read(self, pv: float) -> float:
        """Take this tick's PV (PV units); returns the rate of its median-of-3 filter, PV/s."""
        self.pv = pv
        self._pv_hist.append(pv)
        if len(self._pv_hist) > 3:
            del self._pv_hist[0]
        pvf = sorted(self._pv_hist)[len(self._pv_hist) // 2] if len(self._pv_hist) != 2 else (
            0.5 * (self._pv_hist[0] + self._pv_hist[1])
        )
        rate = 0.0 if self._pvf_prev is None else (pvf - self._pvf_prev) / self.period
        self._pvf_prev = pvf
        return rate

    def mode_output(self, pv: float) -> float:
        """This tick's output of the current non-idle mode, offset included (output units)."""
        assert self.limits is not None
        u = 0.0
        if self.mode == m.Mode.HOST:
            u = self.host_output
        elif self.mode == m.Mode.RELAY:
            u = self._relay_output(pv)
        elif self.mode == m.Mode.PID:
            u = self._pid_output(pv, self.limits.output_limit)
        return u + self.offset

    def _relay_output(self, pv: float) -> float:
        e = self.relay_centre - pv
        if e > self.relay_hyst:
            self.relay_high = True
        elif e < -self.relay_hyst:
            self.relay_high = False
        if self.relay_high:
            return self.relay_bias + self.relay_high_amp
        return self.relay_bias - self.relay_low_amp

    def _pid_output(self, pv: float, limit: float) -> float:
        p = self.pid
        assert p is not None
        h = self.period
        if p.pv_prev is None:
            p.pv_prev = pv
        e = p.setpoint - pv
        # derivative on measurement through a first-order filter, backward difference
        if p.kd != 0.0:
            tf = abs(p.kd / (p.kp * p.n)) if p.kp != 0.0 else 0.0
            p.deriv = (tf * p.deriv - p.kd * (pv - p.pv_prev)) / (tf + h)
        else:
            p.deriv = 0.0
        p.pv_prev = pv
        v = p.bias + p.kp * (p.b * p.setpoint - pv) + p.integral + p.deriv
        # Saturation is decided on the total drive (PID output plus the load-test offset), not by
        # comparing floats after adding and removing the offset, which rarely round-trips exactly.
        high = v + self.offset > limit
        low = v + self.offset < -limit
        u = (limit - self.offset) if high else (-limit - self.offset) if low else v
        if p.tt > 0.0:
            # back-calculation: the integral is pulled towards the saturated output
            p.integral += p.ki * h * e + (h / p.tt) * (u - v)
        elif not (high or low) or (high and p.ki * e < 0.0) or (low and p.ki * e > 0.0):
            # clamping: integrate unless saturated and the error drives further into it
            p.integral += p.ki * h * e
        return v

    def setpoint(self) -> float:
        """The Sample's setpoint field: PID setpoint, relay centre, else 0 (PV units)."""
        if self.mode == m.Mode.PID and self.pid is not None:
            return self.pid.setpoint
        if self.mode == m.Mode.RELAY:
            return self.relay_centre
        return 0.0


class Device:
    """Simulated controller board with one axis, or several (``[[axis]]`` in the plant file).

    Args:
        config: plant file contents.
        faults: device- and link-level fault spec (the config's [faults] merged with --faults).
        seed: sensor noise seed (None: the config's [device] seed); axis i > 0 draws its noise
            from the seed sequence (seed, i).
        boot_id: callable giving a fresh boot id (random by default).
        log: called with one-line messages meant for the device's stderr.
    """

    def __init__(
        self,
        config: MockConfig,
        *,
        faults: FaultSpec | None = None,
        seed: int | None = None,
        boot_id: Callable[[], int] = _default_boot_id,
        log: Callable[[str], None] = lambda _line: None,
        protocol_version: int = m.PROTOCOL_VERSION,
    ) -> None:
        if protocol_version not in (m.PROTOCOL_VERSION, *m.OLDER_VERSIONS):
            raise ValueError(f"protocol version {protocol_version} is not one this device knows")
        self.protocol_version = protocol_version  # an older one emulates an older board
        self.config = config
        dev = config.device
        self.period = dev.period
        self.tick_us = max(1, round(dev.period * 1e6))
        self._new_boot_id = boot_id
        self._log = log
        self.fault_spec = faults if faults is not None else config.faults
        self.faults = DeviceFaults(self.fault_spec)
        self._no_ack = self.fault_spec.no_ack_types
        base = dev.seed if seed is None else seed
        self.axes = [
            Axis(axis, dev.period, np.random.default_rng(base if i == 0 else [base, i]))
            for i, axis in enumerate(config.axis_configs)
        ]
        resolutions = {a.sensor.resolution for a in self.axes}
        # one declared quantisation step for the board; axes that differ declare none (0)
        self.pv_resolution = resolutions.pop() if len(resolutions) == 1 else 0.0
        self.capabilities = m.CAP_HOST_LOOP | m.CAP_STORE_GAINS
        if dev.relay:
            self.capabilities |= m.CAP_DEVICE_RELAY
        if dev.pid:
            self.capabilities |= m.CAP_DEVICE_PID
        self.total_ticks = 0  # ticks since the process started (not reset by a device reset)
        self._hello_tick: int | None = None  # total_ticks at the first Hello
        self.disconnect_requested = False
        self.resets = 0
        self._power_up()

    # ------------------------------------------------------------ state
    def _power_up(self) -> None:
        """Volatile state after power-up or reset (the plant's physics carries on)."""
        self.boot_id = self._new_boot_id() & 0xFFFFFFFF
        self.k = 0  # device tick counter; device time = k * tick_us
        self._seq = 0
        for axis in self.axes:
            axis.power_up()
        self.last_rx_k = 0
        self._pending_stops: list[int] = []
        self.last_received: int | None = None

    @property
    def axis_count(self) -> int:
        """Number of axes (the handshake's axis_count)."""
        return len(self.axes)

    # Axis 0's state, for the one-axis board and the tests written for it.
    @property
    def mode(self) -> m.Mode:
        return self.axes[0].mode

    @property
    def limits(self) -> AxisLimits | None:
        return self.axes[0].limits

    @property
    def pv(self) -> float:
        return self.axes[0].pv

    @property
    def applied(self) -> float:
        return self.axes[0].applied

    @property
    def streaming(self) -> bool:
        return self.axes[0].streaming

    @property
    def fault(self) -> m.FaultCode | None:
        return self.axes[0].fault

    @property
    def fault_us(self) -> int:
        return self.axes[0].fault_us

    @property
    def offset(self) -> float:
        return self.axes[0].offset

    @property
    def plant(self) -> LtiPlant:
        return self.axes[0].plant

    @property
    def sensor(self) -> Sensor:
        return self.axes[0].sensor

    @property
    def stored_gains(self) -> tuple[float, float, float] | None:
        return self.axes[0].stored_gains

    @property
    def device_us(self) -> int:
        """Device time of the current (next) tick, microseconds mod 2**32."""
        return (self.k * self.tick_us) & 0xFFFFFFFF

    @property
    def t(self) -> float:
        """Device time of the next tick, s."""
        return self.k * self.tick_us * 1e-6

    def _since_hello(self) -> float | None:
        if self._hello_tick is None:
            return None
        return (self.total_ticks - self._hello_tick) * self.period

    def _next_seq(self) -> int:
        seq = self._seq
        self._seq = (self._seq + 1) & 0xFFFF
        return seq

    def _unsolicited(self, msg: m.Message) -> Outgoing:
        return Outgoing(msg, self._next_seq())

    def _fault_msg(self, axis: int) -> m.Fault:
        a = self.axes[axis]
        assert a.fault is not None
        return m.Fault(int(a.fault), axis, float(a.fault_value), a.fault_us)

    def watchdog_armed(self, axis: int = 0) -> bool:
        """True while the axis is in a non-idle mode with its limits set."""
        a = self.axes[axis]
        return a.limits is not None and a.mode != m.Mode.IDLE

    def flags(self, axis: int = 0) -> int:
        """Sample.flags of an axis for the current state."""
        a = self.axes[axis]
        return m.make_flags(
            a.mode,
            streaming=a.streaming,
            fault=a.fault is not None,
            clamped=a.clamped,
            watchdog_armed=self.watchdog_armed(axis),
            limits_set=a.limits is not None,
            relay_high=a.mode == m.Mode.RELAY and a.relay_high,
        )

    # ------------------------------------------------------------ frames
    def handle_frame(self, raw: RawFrame) -> list[Outgoing]:
        """Handle one good frame from the host (decoding errors are answered with Nak).

        Every good frame except Stop feeds the watchdog (a Stop never lengthens the time the
        output may stay on while the host is otherwise silent). A request whose type is in the
        ``no_ack`` fault is acted on but not answered."""
        if raw.type != m.Stop.TYPE:
            self.last_rx_k = self.k
        self.last_received = raw.type
        out = self._handle_frame(raw)
        if raw.type in self._no_ack:
            out = [o for o in out if o.seq != raw.seq or o.msg.TYPE not in m.RESPONSE_TYPES]
        return out

    def _handle_frame(self, raw: RawFrame) -> list[Outgoing]:
        if not 0x01 <= raw.type <= 0x3F:
            return [Outgoing(m.Nak(raw.type, m.NakCode.UNKNOWN_TYPE, float(raw.type)), raw.seq)]
        try:
            msg = m.decode(raw)
        except UnknownType:
            return [Outgoing(m.Nak(raw.type, m.NakCode.UNKNOWN_TYPE, float(raw.type)), raw.seq)]
        except BadLength as exc:
            return [Outgoing(m.Nak(raw.type, m.NakCode.BAD_LENGTH, float(exc.expected)), raw.seq)]
        except DecodeError:
            return [Outgoing(m.Nak(raw.type, m.NakCode.BAD_LENGTH, 0.0), raw.seq)]
        return self.handle(msg, raw.seq)

    def handle(self, msg: m.Message, seq: int) -> list[Outgoing]:
        """Handle one decoded request; returns the replies (seq echoed) and any extra frames.
        Stop is idempotent: every Stop (a resent one too) zeroes the output and is answered
        with Stopped after the next tick."""
        t = msg.TYPE
        if t != m.Stop.TYPE:
            self.last_rx_k = self.k

        def ack() -> list[Outgoing]:
            return [Outgoing(m.Ack(t), seq)]

        def nak(code: m.NakCode, detail: float = 0.0) -> list[Outgoing]:
            return [Outgoing(m.Nak(t, int(code), float(detail)), seq)]

        if isinstance(msg, m.Hello):
            version = self.protocol_version
            if msg.protocol_version != version:
                self._log(
                    f"refused a host speaking protocol version {msg.protocol_version}; "
                    f"this device speaks version {version}"
                )
                return nak(m.NakCode.BAD_VERSION, version)
            if self._hello_tick is None:
                self._hello_tick = self.total_ticks
            reply = m.HelloReply(
                version,
                self.config.device.name,
                FIRMWARE,
                self.boot_id,
                self.axis_count,
                self.tick_us,
                self.capabilities,
                float(self.config.device.max_output),
                float(self.pv_resolution),  # the quantisation step it declares
            )
            if version == 1:
                reply = _HelloReplyV1(*dataclasses.astuple(reply))
            out = [Outgoing(reply, seq)]
            for i, a in enumerate(self.axes):  # a latched fault is reported again on reconnect
                if a.fault is not None:
                    out.append(self._unsolicited(self._fault_msg(i)))
            return out
        if isinstance(msg, m.Ping):
            return [Outgoing(m.Pong(msg.nonce, msg.host_us, self.device_us, self.boot_id), seq)]
        if isinstance(msg, m.Stop):
            if self.fault_spec.ignore_stop:
                return []
            for a in self.axes:  # Stop has no axis: it idles every one
                a.go_idle()
                a.offset = 0.0  # Stop also clears the offset
            self._pending_stops.append(seq)
            return []
        if isinstance(msg, m.ClearFault):
            for i, a in enumerate(self.axes):  # ClearFault has no axis: it clears every one
                if a.fault is not None:
                    self._log(f"fault {a.fault.name} cleared by the host{self._on(i)}")
                a.fault = None
            return ack()
        if isinstance(msg, m.StoreGains):
            if msg.axis >= self.axis_count:
                return nak(m.NakCode.BAD_AXIS, self.axis_count)
            if not msg.is_finite():
                return nak(m.NakCode.OUT_OF_RANGE, math.nan)
            self.axes[msg.axis].stored_gains = (msg.kp, msg.ki, msg.kd)
            return ack()

        axis = getattr(msg, "axis", None)
        if axis is None:  # pragma: no cover - every remaining request has an axis
            return nak(m.NakCode.UNKNOWN_TYPE, t)
        if axis >= self.axis_count:
            return nak(m.NakCode.BAD_AXIS, self.axis_count)
        if not msg.is_finite():
            return nak(m.NakCode.OUT_OF_RANGE, math.nan)
        a = self.axes[axis]

        if isinstance(msg, m.SetLimits):
            return self._set_limits(a, msg, ack, nak)
        if isinstance(msg, m.GetLimits):
            lim = a.limits
            if lim is None:
                return nak(m.NakCode.LIMITS_NOT_SET)
            reply = m.Limits(
                axis, lim.output_limit, lim.pv_low, lim.pv_high, lim.pv_rate_limit, lim.watchdog_ms
            )
            return [Outgoing(reply, seq)]
        if isinstance(msg, m.Stream):
            if msg.enable not in (0, 1):
                return nak(m.NakCode.OUT_OF_RANGE, msg.enable)
            if msg.enable and msg.decimation < 1:
                return nak(m.NakCode.OUT_OF_RANGE, msg.decimation)
            a.streaming = bool(msg.enable)
            if msg.enable:
                a.decimation = msg.decimation
            return ack()
        if isinstance(msg, m.SetOutput):
            if msg.output == 0.0 and (a.limits is None or a.fault is not None):
                a.host_output = 0.0  # a zero command is always harmless
                return ack()
            refusal = self._motion_refusal(a)
            if refusal is not None:
                return nak(*refusal)
            assert a.limits is not None
            if abs(msg.output) > a.limits.output_limit:
                return nak(m.NakCode.OUT_OF_RANGE, msg.output)
            a.host_output = float(msg.output)
            if a.mode != m.Mode.HOST:
                self._enter(a, m.Mode.HOST)
            return ack()
        if isinstance(msg, m.StartRelay):
            if not self.capabilities & m.CAP_DEVICE_RELAY:
                return nak(m.NakCode.NOT_ALLOWED, int(a.mode))
            refusal = self._motion_refusal(a)
            if refusal is not None:
                return nak(*refusal)
            assert a.limits is not None
            if msg.amp_high < 0.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.amp_high)
            if msg.amp_low < 0.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.amp_low)
            if msg.hysteresis < 0.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.hysteresis)
            lim = a.limits.output_limit
            for value in (msg.bias + msg.amp_high, msg.bias - msg.amp_low):
                if abs(value) > lim:
                    return nak(m.NakCode.OUT_OF_RANGE, value)
            a.relay_centre = msg.centre
            a.relay_bias = msg.bias
            a.relay_high_amp = msg.amp_high
            a.relay_low_amp = msg.amp_low
            a.relay_hyst = msg.hysteresis
            a.relay_high = a.pv < msg.centre
            self._enter(a, m.Mode.RELAY)
            return ack()
        if isinstance(msg, m.SetPid):
            if not self.capabilities & m.CAP_DEVICE_PID:
                return nak(m.NakCode.NOT_ALLOWED, int(a.mode))
            refusal = self._motion_refusal(a)
            if refusal is not None:
                return nak(*refusal)
            assert a.limits is not None
            if not 0.0 <= msg.setpoint_weight <= 1.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.setpoint_weight)
            if msg.deriv_filter_n <= 0.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.deriv_filter_n)
            if msg.tracking_time < 0.0:
                return nak(m.NakCode.OUT_OF_RANGE, msg.tracking_time)
            if abs(msg.bias) > a.limits.output_limit:
                return nak(m.NakCode.OUT_OF_RANGE, msg.bias)
            a.pid = PidState(
                msg.kp, msg.ki, msg.kd, msg.setpoint_weight, msg.deriv_filter_n,
                msg.tracking_time, msg.setpoint, msg.bias,
            )
            self._enter(a, m.Mode.PID)
            return ack()
        if isinstance(msg, m.SetSetpoint):
            if a.mode == m.Mode.PID and a.pid is not None:
                a.pid.setpoint = msg.setpoint
                return ack()
            if a.mode == m.Mode.RELAY:
                a.relay_centre = msg.setpoint
                return ack()
            return nak(m.NakCode.NOT_ALLOWED, int(a.mode))
        if isinstance(msg, m.SetOffset):
            if a.limits is None:
                return nak(m.NakCode.LIMITS_NOT_SET)
            if abs(msg.offset) > a.limits.output_limit:
                return nak(m.NakCode.OUT_OF_RANGE, msg.offset)
            a.offset = msg.offset
            return ack()
        return nak(m.NakCode.UNKNOWN_TYPE, t)  # pragma: no cover - registry and code in step

    def _set_limits(
        self,
        a: Axis,
        msg: m.SetLimits,
        ack: Callable[[], list[Outgoing]],
        nak: Callable[[m.NakCode, float], list[Outgoing]],
    ) -> list[Outgoing]:
        max_out = self.config.device.max_output
        if not 0.0 < msg.output_limit <= max_out:
            return nak(m.NakCode.OUT_OF_RANGE, msg.output_limit)
        if not msg.pv_low < msg.pv_high:
            return nak(m.NakCode.OUT_OF_RANGE, msg.pv_high)
        if msg.pv_rate_limit < 0.0:
            return nak(m.NakCode.OUT_OF_RANGE, msg.pv_rate_limit)
        if msg.watchdog_ms == 0:
            watchdog = self.config.device.watchdog
        elif 10 <= msg.watchdog_ms <= 60000:
            watchdog = msg.watchdog_ms / 1000.0
        else:
            return nak(m.NakCode.OUT_OF_RANGE, msg.watchdog_ms)
        a.limits = AxisLimits(
            msg.output_limit, msg.pv_low, msg.pv_high, msg.pv_rate_limit, msg.watchdog_ms,
            watchdog,
        )
        return ack()

    def _motion_refusal(self, a: Axis) -> tuple[m.NakCode, float] | None:
        if a.limits is None:
            return (m.NakCode.LIMITS_NOT_SET, 0.0)
        if a.fault is not None:
            return (m.NakCode.FAULT_LATCHED, float(a.fault))
        return None

    def _enter(self, a: Axis, mode: m.Mode) -> None:
        a.mode = mode
        self.last_rx_k = self.k

    def _on(self, axis: int) -> str:
        """" on axis N" in a log line of a board with several axes, else nothing."""
        return f" on axis {axis}" if self.axis_count > 1 else ""

    def _latch(self, axis: int, code: m.FaultCode, value: float) -> None:
        a = self.axes[axis]
        a.fault = code
        a.fault_value = value
        a.fault_us = self.device_us
        a.go_idle()
        self._log(f"fault {code.name} latched{self._on(axis)} (value {value:g}) "
                  f"at t={self.t:.3f} s")

    # ------------------------------------------------------------ tick
    def _check(self, a: Axis, pv: float, rate: float) -> tuple[m.FaultCode, float] | None:
        """The tick's safety checks of a non-idle axis: watchdog, PV window, PV rate."""
        lim = a.limits
        assert lim is not None
        silence_ticks = self.k - self.last_rx_k
        if silence_ticks * self.period >= lim.watchdog - 1e-9:
            return (m.FaultCode.WATCHDOG, silence_ticks * self.period)
        if not lim.pv_low <= pv <= lim.pv_high:
            return (m.FaultCode.PV_WINDOW, pv)
        if lim.pv_rate_limit > 0.0 and abs(rate) > lim.pv_rate_limit:
            return (m.FaultCode.PV_RATE, rate)
        return None

    def tick(self) -> list[Outgoing]:
        """Run one device tick (see the module docstring); returns the frames to send."""
        out: list[Outgoing] = []
        since = self._since_hello()
        if self.faults.reset_due(since):
            self._log("reset fault: the device restarts (new boot id, state lost)")
            self.resets += 1
            self._power_up()
        if self.faults.disconnect_due(since):
            self.disconnect_requested = True

        latched: list[bool] = []
        for i, a in enumerate(self.axes):
            raw = a.sensor.read(a.plant.y)
            pv = self.faults.pv(raw, since) if i == 0 else raw
            rate = a.read(pv)
            u = 0.0
            failed = None
            if a.fault is None and a.mode != m.Mode.IDLE and a.limits is not None:
                u = a.mode_output(pv)
                failed = self._check(a, pv, rate)
                if failed is not None:
                    self._latch(i, *failed)
                    u = 0.0
            latched.append(failed is not None)
            lim = a.limits
            a.clamped = False
            if lim is not None and abs(u) > lim.output_limit:
                u = math.copysign(lim.output_limit, u)
                a.clamped = True
            applied = a.actuator.saturate(u)
            a.applied = applied
            sign = self.faults.actuator_sign() if i == 0 else 1.0
            a.plant.advance(sign * a.actuator.apply(applied) + a.load, self.period)

        for i, a in enumerate(self.axes):
            if a.streaming and self.k % a.decimation == 0:
                sample = m.Sample(i, self.device_us, float(a.pv), float(a.applied),
                                  float(a.setpoint()), self.flags(i))
                out.append(self._unsolicited(sample))
            if latched[i]:  # after this tick's Sample, so the host has the evidence first
                out.append(self._unsolicited(self._fault_msg(i)))
        for seq in self._pending_stops:
            out.append(Outgoing(m.Stopped(), seq))
        self._pending_stops.clear()
        self.k += 1
        self.total_ticks += 1
        return out
