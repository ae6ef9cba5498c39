"""Several axes on one board (protocol/SPEC.md: axes 0 .. axis_count - 1, a state machine per
axis, Stop on every axis): each test runs against board-sim with two axes of different plants
and against the mock device once its drive-base scenario answers the handshake with two or
more axes (until then that parametrisation is skipped with the reason). Every board is its
own process behind a real pseudo-terminal, reached through protocol.link.Link.

The board-sim plants are invented for the tests (a two-wheel drive base of our own): axis 0
K = 2 / (0.5 s + 1) e^{-0.05 s}, axis 1 K = 3 / (0.8 s + 1) e^{-0.1 s}. Checks that need the
plant's figures run on board-sim only; the rest hold for any plant.
"""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
import pytest

from autotune.boardsim import board_sim_command
from autotune.core.pid import DiscretePid, PidGains, PidSettings
from autotune.errors import UserError
from autotune.simdevice import SimDevice, launch
from protocol import messages as m
from protocol.errors import NakError
from protocol.link import DeviceInfo, Link, SampleRecord
from tests.conformance.conftest import BOARDS, f32
from tests.conformance.test_safety_loops import relay_period, wait_fault

SPEED = 10.0
PERIOD = 0.01
# (gain PV units per output unit, lag s, delay s) of each board-sim axis: invented demo plants
PLANTS = ((2.0, 0.5, 0.05), (3.0, 0.8, 0.1))
MOCK_SCENARIO = "drive-base"
ONE_AXIS = "mock device offers one axis"
_mock_skip: list[str] = []  # the reason, once a mock start has shown there is no second axis


@dataclass
class TwoAxes:
    """A running board with at least two axes and a Link on it (handshake done, heartbeat not
    started). ``plants`` holds each axis's (gain, lag s, delay s) when the test knows them
    (board-sim), else None."""

    kind: str
    sim: SimDevice
    link: Link
    info: DeviceInfo
    plants: tuple[tuple[float, float, float], ...] | None

    @property
    def tick(self) -> float:
        """Device tick, s."""
        return self.info.tick_us * 1e-6


def _start(kind: str) -> tuple[SimDevice, tuple[tuple[float, float, float], ...] | None]:
    if kind == "board-sim":
        (k0, t0, l0), (k1, t1, l1) = PLANTS
        cmd = board_sim_command(k0, t0, l0, period=PERIOD, speed=SPEED, axes=2,
                                axis_plants={1: {"gain": k1, "lag": t1, "delay": l1}})
        return launch(cmd, kind, SPEED, startup_timeout=20.0, what=kind), PLANTS
    if _mock_skip:
        pytest.skip(_mock_skip[0])
    cmd = [sys.executable, "-m", "mock_device", "--plant", MOCK_SCENARIO, "--pty", "--speed",
           repr(SPEED)]
    try:
        return launch(cmd, kind, SPEED, startup_timeout=20.0, what=kind), None
    except UserError as exc:
        _mock_skip.append(f"{ONE_AXIS} (no '{MOCK_SCENARIO}' scenario: {exc})")
        pytest.skip(_mock_skip[0])


@pytest.fixture(params=BOARDS)
def two_axes(request: pytest.FixtureRequest) -> Iterator[TwoAxes]:
    """Board-sim with two axes, or the mock device's drive-base scenario (skipped while the
    mock answers the handshake with one axis)."""
    kind: str = request.param
    if kind == "board-sim":
        request.getfixturevalue("c_build")
    sim, plants = _start(kind)
    link = None
    try:
        link = Link.open(sim.url, heartbeat_interval=0.05 / SPEED)
        info = link.handshake()
        if info.axis_count < 2:
            _mock_skip.append(ONE_AXIS)
            pytest.skip(ONE_AXIS)
        yield TwoAxes(kind, sim, link, info, plants)
    finally:
        if link is not None:
            link.close()
        sim.close()


def pct(board: TwoAxes, percent: float) -> float:
    """``percent`` % of the board's largest output, in single precision (output units)."""
    return f32(board.info.max_output * percent / 100)


def limits(axis: int, board: TwoAxes, output_limit: float | None = None, pv_low: float = -1e6,
           pv_high: float = 1e6, watchdog_ms: int = 1000) -> m.SetLimits:
    """SetLimits for ``axis``: by default half the board's largest output and a wide window."""
    out = board.info.max_output / 2 if output_limit is None else output_limit
    return m.SetLimits(axis, out, pv_low, pv_high, 0.0, watchdog_ms)


def gather(link: Link, seconds: float, until: Callable[[list[SampleRecord]], bool] | None = None
           ) -> list[SampleRecord]:
    """Samples of every axis over ``seconds`` of device time (or until ``until(samples)``)."""
    out: list[SampleRecord] = []
    deadline = time.monotonic() + 10 + 3 * seconds / SPEED
    while time.monotonic() < deadline:
        rec = link.next_sample(timeout=1.0)
        if rec is None:
            continue
        out.append(rec)
        if until is not None and until(out):
            return out
        if until is None and rec.t - out[0].t >= seconds:
            return out
    raise AssertionError(f"the samples ran dry after {len(out)}")


def every_tick(recs: list[SampleRecord], tick: float, least: float) -> bool:
    """The records span at least `least` s of device time with a sample on nearly every tick
    of it (three in four: counted in device time, whatever the host's wall clock did)."""
    if len(recs) < 2:
        return False
    span = recs[-1].t - recs[0].t
    return span >= least and len(recs) > 0.75 * span / tick


def of_axis(recs: list[SampleRecord], axis: int) -> list[SampleRecord]:
    return [r for r in recs if r.axis == axis]


def samples_from(link: Link, t0: float, n: int = 10) -> list[SampleRecord]:
    """Samples of device time ``t0`` s on, until axes 0 and 1 each have ``n`` of them."""
    recs = gather(link, 0.0, lambda rs: all(
        sum(r.t >= t0 for r in of_axis(rs, axis)) >= n for axis in (0, 1)))
    return [r for r in recs if r.t >= t0]


def pv_now(link: Link, axis: int) -> float:
    """The PV of ``axis`` on its next sample (streaming must be on)."""
    link.drain_samples()
    return of_axis(gather(link, 0.0, lambda rs: bool(of_axis(rs, axis))), axis)[-1].pv


def nak_of(link: Link, msg: m.Message) -> tuple[int, float]:
    with pytest.raises(NakError) as err:
        link.request(msg)
    return err.value.code, err.value.detail


def test_command_builder_keeps_the_single_axis_line() -> None:
    one = board_sim_command(2.0, 0.5, 0.05)
    assert "--axes" not in one and "--axis-plant" not in one
    assert board_sim_command(2.0, 0.5, 0.05, axes=1, axis_plants={}) == one
    two = board_sim_command(2.0, 0.5, 0.05, axes=2,
                            axis_plants={1: {"gain": 3, "delay": 0.1, "integrating": True}})
    assert two == one + ["--axes", "2", "--axis-plant", "1:gain=3.0,delay=0.1,integrating=1"]
    for bad in ({"axes": 0}, {"axes": 9}, {"axes": 2, "axis_plants": {2: {"gain": 1.0}}},
                {"axes": 2, "axis_plants": {1: {"gian": 1.0}}}):
        with pytest.raises(ValueError):
            board_sim_command(2.0, 0.5, 0.05, **bad)  # type: ignore[arg-type]


@pytest.mark.parametrize(("args", "says"), [
    (["--axes", "2", "--axis-plant", "2:gain=3"], "not one of 0..1"),
    (["--axes", "2", "--axis-plant", "1:gian=3"], "unknown key 'gian'"),
    (["--axes", "2", "--axis-plant", "1:lag=0"], "axis 1: the plant needs a lag"),
    (["--axes", "2", "--axis-plant", "1:delay=-1"], "axis 1: times"),
    (["--axes", "2", "--axis-plant", "1"], "expected I:KEY=VALUE"),
    (["--axes", "9"], "--axes 1..8"),
])
def test_board_sim_refuses_a_bad_axis_option(c_build, args: list[str], says: str) -> None:
    cmd = board_sim_command(2.0, 0.5, 0.05) + args
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=30,
                          stdin=subprocess.DEVNULL)
    assert proc.returncode == 2 and proc.stdout == "" and says in proc.stderr, proc.stderr


def test_handshake_and_a_stream_per_axis(two_axes: TwoAxes) -> None:
    b, link = two_axes, two_axes.link
    if b.kind == "board-sim":
        assert b.info.axis_count == 2
    assert b.info.axis_count >= 2
    # SPEC.md Stream: each axis its own decimation, samples tagged with their axis, one
    # sequence counter for every unsolicited frame
    link.request(m.Stream(0, 1, 2))
    link.request(m.Stream(1, 1, 5))
    link.drain_samples()
    recs = gather(link, 0.6)[2:]  # the first may precede the change
    seqs = [r.seq for r in recs]
    assert all((y - x) & 0xFFFF == 1 for x, y in zip(seqs, seqs[1:], strict=False)), "gap"
    assert {r.axis for r in recs} == {0, 1}
    tick_us = b.info.tick_us
    for axis, dec in ((0, 2), (1, 5)):
        us = [round(r.t * 1e6) for r in of_axis(recs, axis)]
        assert len(us) >= 5
        assert all(y - x == dec * tick_us for x, y in zip(us, us[1:], strict=False)), (axis, us)
        assert all((u // tick_us) % dec == 0 for u in us)
    # on a tick that reports both axes, both samples carry that tick's time
    both = {round(r.t * 1e6) for r in of_axis(recs, 0)} & {round(r.t * 1e6)
                                                           for r in of_axis(recs, 1)}
    assert both and all(u % (10 * tick_us) == 0 for u in both)
    link.request(m.Stream(0, 0, 0))
    time.sleep(0.1)
    link.drain_samples()
    rest = gather(link, 0.3)
    assert {r.axis for r in rest} == {1}  # axis 1 streams on alone
    link.request(m.Stream(1, 0, 0))


def test_limits_per_axis_read_back(two_axes: TwoAxes) -> None:
    b, link = two_axes, two_axes.link
    assert nak_of(link, m.GetLimits(0)) == (m.NakCode.LIMITS_NOT_SET, 0.0)
    assert nak_of(link, m.GetLimits(1)) == (m.NakCode.LIMITS_NOT_SET, 0.0)
    one = m.SetLimits(1, pct(b, 12.5), -1.25, 3.75, 2.5, 1234)
    assert isinstance(link.request(one), m.Ack)
    assert nak_of(link, m.GetLimits(0)) == (m.NakCode.LIMITS_NOT_SET, 0.0)  # axis 0 untouched
    # motion on the axis without limits is refused, the other axis accepts it
    assert nak_of(link, m.SetOutput(0, pct(b, 1))) == (m.NakCode.LIMITS_NOT_SET, 0.0)
    zero = m.SetLimits(0, pct(b, 20), -7.5, 8.25, 0.0, 0)
    assert isinstance(link.request(zero), m.Ack)
    for sent in (zero, one):
        back = link.request(m.GetLimits(sent.axis))
        assert isinstance(back, m.Limits)
        assert (back.axis, back.output_limit, back.pv_low, back.pv_high, back.pv_rate_limit,
                back.watchdog_ms) == (sent.axis, f32(sent.output_limit), f32(sent.pv_low),
                                      f32(sent.pv_high), f32(sent.pv_rate_limit),
                                      sent.watchdog_ms)
    # each axis has its own output limit: 15 % is beyond axis 1's 12.5 % but within axis 0's
    assert nak_of(link, m.SetOutput(1, pct(b, 15))) == (m.NakCode.OUT_OF_RANGE, pct(b, 15))
    assert isinstance(link.request(m.SetOutput(0, pct(b, 15))), m.Ack)
    assert isinstance(link.request(m.Stop()), m.Stopped)


def test_requests_for_a_missing_axis_are_refused(two_axes: TwoAxes) -> None:
    # SPEC.md 0x82: BAD_AXIS when axis >= axis_count, detail = axis_count; the axis check
    # comes before the finite-value and range checks
    link = two_axes.link
    n = two_axes.info.axis_count
    link.request(limits(0, two_axes))
    for axis in (n, n + 1, 255):
        for msg in (m.SetLimits(axis, 10.0, -1.0, 1.0, 0.0, 0), m.GetLimits(axis),
                    m.Stream(axis, 1, 1), m.SetOutput(axis, 0.0),
                    m.StartRelay(axis, 0.0, 0.0, 1.0, 1.0, 0.0),
                    m.SetPid(axis, 1.0, 0.0, 0.0, 1.0, 10.0, 0.0, 0.0, 0.0),
                    m.SetSetpoint(axis, 0.0), m.SetOffset(axis, float("nan")),
                    m.StoreGains(axis, 1.0, 0.0, 0.0)):
            assert nak_of(link, msg) == (m.NakCode.BAD_AXIS, float(n)), msg


def _relay_rule_holds(recs: list[SampleRecord], centre: float, hyst: float, high_out: float,
                      low_out: float) -> None:
    """SPEC.md StartRelay on every sample: e = centre - pv; above +hyst high, below -hyst
    low, else the side it was on."""
    high = recs[0].output == high_out
    for r in recs[1:]:
        e = centre - r.pv
        if abs(abs(e) - hyst) <= 1e-6 * max(1.0, abs(centre)):
            # on the threshold to the wire's float32 precision (a board may decide on a
            # wider float than the Sample carries): either side is within the rule
            high = r.output == high_out
        high = True if e > hyst else False if e < -hyst else high
        assert r.output == (high_out if high else low_out), r
        assert bool(r.flags & m.FLAG_RELAY_HIGH) == high and r.setpoint == f32(centre)


def test_relay_on_axis_1_while_axis_0_idles(two_axes: TwoAxes) -> None:
    b, link = two_axes, two_axes.link
    link.start_heartbeat()
    d = f32(b.info.max_output / 10)
    link.request(limits(0, b))
    link.request(limits(1, b))
    link.request(m.Stream(0, 1, 1))
    link.request(m.Stream(1, 1, 1))
    centre = f32(pv_now(link, 1))
    link.request(m.StartRelay(1, centre, 0.0, d, d, 0.0))
    link.drain_samples()  # those queued were sent before the relay started
    recs = gather(link, 4.0)
    link.request(m.Stop())
    idle, relay = of_axis(recs, 0), [r for r in of_axis(recs, 1) if r.mode == m.Mode.RELAY]
    assert every_tick(idle, b.tick, 3.0) and every_tick(relay, b.tick, 3.0)
    assert all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in idle)
    assert not any(r.flags & m.FLAG_WATCHDOG_ARMED for r in idle)
    _relay_rule_holds(relay, centre, 0.0, d, -d)
    assert min(r.output for r in relay) == -d and max(r.output for r in relay) == d
    if b.plants is None:
        return
    # board-sim: axis 0's PV stays at rest, axis 1 cycles with the period of its own plant
    # (analytic limit cycle of K/(T s + 1) e^{-L s}, test_safety_loops.relay_period; each
    # switch is late by up to one tick, so the period lies between those for L and L + h)
    assert all(r.pv == 0.0 for r in idle)
    gain, lag, delay = b.plants[1]
    t = np.array([r.t for r in relay])
    u = np.array([r.output for r in relay])
    ups = t[1:][(u[1:] < 0) & (u[:-1] > 0)]
    periods = np.diff(ups[2:])
    lo, _ = relay_period(gain, lag, delay)
    hi, _ = relay_period(gain, lag, delay + b.tick)
    assert periods.size >= 5
    assert lo - b.tick <= periods.mean() <= hi + b.tick, (periods, lo, hi)
    other, _ = relay_period(*b.plants[0])
    assert abs(periods.mean() - other) > 0.1  # not axis 0's plant


def test_pid_on_axis_0_beside_a_relay_on_axis_1(two_axes: TwoAxes) -> None:
    # Reference for axis 0: autotune.core.pid.DiscretePid (the SPEC.md SetPid equations) fed
    # with the PV the board read; axis 1's relay must not disturb it, nor it the relay.
    b, link = two_axes, two_axes.link
    link.start_heartbeat()
    lim0 = f32(b.info.max_output / 10)
    d = f32(b.info.max_output / 20)
    link.request(limits(0, b, output_limit=lim0))
    link.request(limits(1, b))
    link.request(m.Stream(0, 1, 1))
    link.request(m.Stream(1, 1, 1))
    centre = f32(pv_now(link, 1))
    sp = f32(pv_now(link, 0) + 1.0)
    kp, ki, kd, w, n = 3.0, 4.0, 0.1, 0.7, 10.0
    link.request(m.StartRelay(1, centre, 0.0, d, d, 0.0))
    link.request(m.SetPid(0, kp, ki, kd, w, n, 0.0, sp, 0.0))
    recs = gather(link, 3.0)
    link.request(m.Stop())
    pid_recs = [r for r in of_axis(recs, 0) if r.mode == m.Mode.PID]
    relay = [r for r in of_axis(recs, 1) if r.mode == m.Mode.RELAY]
    # (the first samples may predate the PID start: a busy host reads them late)
    assert every_tick(pid_recs, b.tick, 1.5) and every_tick(relay, b.tick, 1.5)
    pid = DiscretePid(PidSettings(PidGains(f32(kp), f32(ki), f32(kd)), b.tick,
                                  deriv_filter_n=n, setpoint_weight=f32(w), out_min=-lim0,
                                  out_max=lim0))
    want = np.array([pid.update(sp, r.pv) for r in pid_recs])
    got = np.array([r.output for r in pid_recs])
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=2e-4 * lim0)
    assert all(r.setpoint == sp for r in pid_recs)
    _relay_rule_holds(relay, centre, 0.0, d, -d)


def _both_show(recs: list[SampleRecord], want: dict[int, float]) -> bool:
    last = {r.axis: r.output for r in recs}
    return all(last.get(axis) == out for axis, out in want.items())


def test_stop_zeroes_every_axis(two_axes: TwoAxes) -> None:
    b, link = two_axes, two_axes.link
    link.start_heartbeat()
    u0, u1, off0, off1 = pct(b, 10), pct(b, -5), pct(b, 3), pct(b, -2)
    link.request(limits(0, b))
    link.request(limits(1, b))
    link.request(m.Stream(0, 1, 1))
    link.request(m.Stream(1, 1, 1))
    link.request(m.SetOffset(0, off0))
    link.request(m.SetOffset(1, off1))
    link.request(m.SetOutput(0, u0))
    link.request(m.SetOutput(1, u1))
    gather(link, 0.0, lambda rs: _both_show(rs, {0: f32(u0 + off0), 1: f32(u1 + off1)}))
    link.drain_samples()
    assert isinstance(link.request(m.Stop()), m.Stopped)
    stopped_at = time.monotonic()
    after = [r for r in gather(link, 0.3) if r.received_at >= stopped_at]
    for axis in (0, 1):
        mine = of_axis(after, axis)[:5]
        assert mine and all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in mine), axis
        assert not mine[0].flags & m.FLAG_WATCHDOG_ARMED
        assert mine[0].flags & m.FLAG_LIMITS_SET  # Stop keeps the limits ...
    # ... and clears every axis's offset
    link.request(m.SetOutput(0, u0))
    link.request(m.SetOutput(1, u1))
    gather(link, 0.0, lambda rs: _both_show(rs, {0: u0, 1: u1}))
    assert isinstance(link.request(m.Stop()), m.Stopped)


def test_watchdog_zeroes_every_axis(two_axes: TwoAxes) -> None:
    # SPEC.md section 8: each moving axis latches WATCHDOG when the host has been silent for
    # its watchdog_ms; with the same period on both, both latch and both outputs are zero
    b, link = two_axes, two_axes.link
    link.request(limits(0, b, watchdog_ms=1000))
    link.request(limits(1, b, watchdog_ms=1000))
    link.request(m.Stream(0, 1, 1))
    link.request(m.Stream(1, 1, 1))
    link.request(m.SetOutput(0, pct(b, 5)))
    link.request(m.SetOutput(1, pct(b, -4)))  # then silence: no heartbeat runs
    faults: list = []
    deadline = time.monotonic() + 10
    while len(faults) < 2 and time.monotonic() < deadline:
        faults += link.poll_faults()
        time.sleep(0.01)
    assert sorted(f.axis for f in faults) == [0, 1]
    for f in faults:
        assert f.code == m.FaultCode.WATCHDOG
        assert 1.0 <= f.value <= 1.5  # the silence, device s (ticks and a busy machine)
    latest = max(f.t for f in faults)
    recs = samples_from(link, latest)
    for axis in (0, 1):
        mine = of_axis(recs, axis)
        assert mine and all(r.output == 0.0 and r.mode == m.Mode.IDLE for r in mine)
        assert all(r.flags & m.FLAG_FAULT for r in mine)
    for axis in (0, 1):
        assert nak_of(link, m.SetOutput(axis, pct(b, 1))) == (m.NakCode.FAULT_LATCHED, 1.0)
    assert isinstance(link.request(m.ClearFault()), m.Ack)  # clears every axis
    link.start_heartbeat()
    for axis in (0, 1):
        assert isinstance(link.request(m.SetOutput(axis, pct(b, 1))), m.Ack)
    assert isinstance(link.request(m.Stop()), m.Stopped)


def test_a_fault_on_one_axis(two_axes: TwoAxes) -> None:
    # SPEC.md section 6: the fault latch sits beside each axis's mode; Fault names the axis,
    # Sample.flags bit4 is the axis's own latch; Hello reports it again; ClearFault clears it
    b, link = two_axes, two_axes.link
    link.start_heartbeat()
    link.request(m.Stream(0, 1, 1))
    link.request(m.Stream(1, 1, 1))
    pv1 = pv_now(link, 1)
    drive = f32(b.info.max_output / 2)
    link.request(limits(0, b))
    # a window of +/- 1e-3 PV units round axis 1's PV at rest: any motion leaves it
    link.request(limits(1, b, output_limit=drive, pv_low=pv1 - 1e-3, pv_high=pv1 + 1e-3))
    link.request(m.SetOutput(0, pct(b, 5)))
    link.request(m.SetOutput(1, drive))
    f = wait_fault(link)
    assert (f.code, f.axis) == (m.FaultCode.PV_WINDOW, 1)
    assert not (pv1 - 1e-3 <= f.value <= pv1 + 1e-3)
    recs = samples_from(link, f.t, 30)
    faulted, running = of_axis(recs, 1), of_axis(recs, 0)
    assert faulted and all(r.output == 0.0 and r.mode == m.Mode.IDLE and r.flags & m.FLAG_FAULT
                           for r in faulted)
    assert running and all(r.output == pct(b, 5) and r.mode == m.Mode.HOST
                           and not r.flags & m.FLAG_FAULT for r in running)
    assert not link.poll_faults()  # one Fault frame, for axis 1 only
    assert nak_of(link, m.SetOutput(1, pct(b, 1))) == (m.NakCode.FAULT_LATCHED, 2.0)
    assert isinstance(link.request(m.SetOutput(0, pct(b, 6))), m.Ack)  # axis 0 still obeys
    link.handshake()  # a host that reconnects learns of it, with its axis
    again = wait_fault(link)
    assert (again.code, again.axis, again.value) == (f.code, 1, f.value)
    assert not link.poll_faults()
    assert isinstance(link.request(m.Stop()), m.Stopped)
    assert isinstance(link.request(m.ClearFault()), m.Ack)
    link.request(limits(1, b))
    assert isinstance(link.request(m.SetOutput(1, pct(b, 1))), m.Ack)
    assert isinstance(link.request(m.Stop()), m.Stopped)


def test_check_verb_on_the_second_axis(c_build) -> None:
    (k0, t0, l0), (k1, t1, l1) = PLANTS
    cmd = board_sim_command(k0, t0, l0, period=PERIOD, speed=SPEED, axes=2,
                            axis_plants={1: {"gain": k1, "lag": t1, "delay": l1}})
    sim = launch(cmd, "board-sim", SPEED, startup_timeout=20.0, what="board-sim")
    try:
        def check(axis: int) -> subprocess.CompletedProcess[str]:
            return subprocess.run([sys.executable, "-m", "autotune", "check", "--port", sim.url,
                                   "--axis", str(axis), "--pings", "10", "--samples-time", "1"],
                                  capture_output=True, text=True, timeout=120,
                                  stdin=subprocess.DEVNULL)
        ok = check(1)
        assert ok.returncode == 0, ok.stdout[-2000:] + ok.stderr[-2000:]
        assert "2 axes, tick 10 ms" in ok.stdout and "result      ok" in ok.stdout
        assert "lost        0 of 101 samples" in ok.stdout  # 1 s at a 10 ms tick, both ends
        bad = check(2)
        assert bad.returncode != 0 and "the device has 2 axis(es)" in bad.stderr, bad.stderr
    finally:
        sim.close()
