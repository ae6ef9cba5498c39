"""Board-side safety (watchdog, fault latch) and the loops the board runs itself (relay, PID),
on both boards: the mock device and board-sim."""

from __future__ import annotations

import math
import time

import control
import numpy as np
import pytest

from autotune.core.pid import DiscretePid, PidGains, PidSettings
from protocol import messages as m
from protocol.errors import NakError
from tests.conformance.conftest import f32


def wait_fault(link, timeout: float = 10.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = link.poll_faults()
        if got:
            return got[0]
        time.sleep(0.01)
    raise AssertionError("no Fault frame")


def test_watchdog_latch_and_clear(board, open_link) -> None:
    b = board(speed=4.0)
    link = open_link(b)
    link.handshake()
    link.request(m.SetLimits(0, 30.0, -100.0, 100.0, 0.0, 1000))
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetOutput(0, 5.0))  # then silence: no heartbeat runs
    f = wait_fault(link)
    assert f.code == m.FaultCode.WATCHDOG
    # the silence it reports, device s: at least the watchdog, at most a little more (ticks
    # and a busy machine's scheduling)
    assert 1.0 <= f.value <= 1.5
    rec = [r for r in link.drain_samples() if r.t >= f.t][-1]
    assert rec.output == 0.0 and rec.mode == m.Mode.IDLE and rec.flags & m.FLAG_FAULT
    with pytest.raises(NakError) as err:
        link.request(m.SetOutput(0, 5.0))
    assert (err.value.code, err.value.detail) == (m.NakCode.FAULT_LATCHED, 1.0)
    assert isinstance(link.request(m.SetOutput(0, 0.0)), m.Ack)  # zero is always accepted
    assert isinstance(link.request(m.ClearFault()), m.Ack)
    link.start_heartbeat()
    assert isinstance(link.request(m.SetOutput(0, 5.0)), m.Ack)
    time.sleep(2.0 / b.speed)
    assert not link.poll_faults()  # the heartbeat feeds it
    assert isinstance(link.request(m.Stop()), m.Stopped)


def test_pv_window_and_rate_latch(board, open_link) -> None:
    b = board()
    link = open_link(b)
    link.handshake()
    link.start_heartbeat()
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetLimits(0, 60.0, -0.5, 0.5, 0.0, 1000))
    link.request(m.SetOutput(0, 50.0))
    f = wait_fault(link)
    assert f.code == m.FaultCode.PV_WINDOW and f.value > 0.5
    samples = link.drain_samples()
    latched = [r for r in samples if r.flags & m.FLAG_FAULT]
    assert latched and latched[0].output == 0.0 and latched[0].pv == f32(f.value)
    before = [r for r in samples if not r.flags & m.FLAG_FAULT]
    assert all(r.pv <= 0.5 for r in before)
    with pytest.raises(NakError) as err:
        link.request(m.StartRelay(0, 0.0, 0.0, 1.0, 1.0, 0.0))
    assert (err.value.code, err.value.detail) == (m.NakCode.FAULT_LATCHED, 2.0)
    # a host that reconnects learns of the latched fault: Hello is followed by the Fault again
    link.handshake()
    again = wait_fault(link)
    assert again.code == m.FaultCode.PV_WINDOW and again.value == f.value
    assert isinstance(link.request(m.ClearFault()), m.Ack)
    link.request(m.Stop())
    # the rate check: 2 PV/s allowed, a step of 50 drives the PV at about K u / T = 200 PV/s
    time.sleep(3.0 / b.speed)  # back near rest
    link.request(m.SetLimits(0, 60.0, -100.0, 100.0, 2.0, 1000))
    link.request(m.SetOutput(0, 50.0))
    f = wait_fault(link)
    assert f.code == m.FaultCode.PV_RATE and f.value > 2.0
    link.request(m.ClearFault())
    assert isinstance(link.request(m.Stop()), m.Stopped)


def relay_period(gain: float, lag: float, delay: float) -> tuple[float, float]:
    """Limit cycle of K/(T s + 1) exp(-L s) under a relay of +/-d without hysteresis around 0:
    (period s, amplitude per unit K d). Analytic result: after an upward crossing the PV rises
    for L more, to a = K d (1 - exp(-L/T)), then falls to zero in T ln(2 - exp(-L/T)); the
    period is twice that: 2 L + 2 T ln(2 - exp(-L/T))."""
    r = math.exp(-delay / lag)
    return 2 * delay + 2 * lag * math.log(2 - r), 1 - r


def collect(link, board, seconds: float, mode: int):
    """Samples in ``mode`` over ``seconds`` of device time, every tick, no gap allowed."""
    out = []
    deadline = time.monotonic() + 10 + 3 * seconds / board.speed
    while time.monotonic() < deadline:
        rec = link.next_sample(timeout=1.0)
        if rec is None or rec.mode != mode:
            continue
        out.append(rec)
        if rec.t - out[0].t >= seconds:
            break
    seqs = [r.seq for r in out]
    assert all((b - a) & 0xFFFF == 1 for a, b in zip(seqs, seqs[1:], strict=False)), "gap"
    return out


def test_relay_on_the_board(board, open_link) -> None:
    b = board(gain=2.0, lag=0.5, delay=0.05)
    link = open_link(b)
    link.handshake()
    link.start_heartbeat()
    d, hyst = 10.0, 0.0
    link.request(m.SetLimits(0, 30.0, -100.0, 100.0, 0.0, 1000))
    link.request(m.Stream(0, 1, 1))
    link.request(m.StartRelay(0, 0.0, 0.0, d, d, hyst))
    recs = collect(link, b, 4.0, m.Mode.RELAY)
    link.request(m.Stop())
    # the per-tick rule of SPEC.md (StartRelay) holds on every sample
    high = recs[0].output > 0
    for r in recs[1:]:
        e = 0.0 - r.pv
        high = True if e > hyst else False if e < -hyst else high
        assert r.output == (d if high else -d), r
        assert bool(r.flags & m.FLAG_RELAY_HIGH) == high and r.setpoint == 0.0
    # the limit cycle against the analytic one: the board samples every tick h, which delays
    # each switch by up to one tick, so the period lies between those for L and L + h
    t = np.array([r.t for r in recs])
    u = np.array([r.output for r in recs])
    ups = t[1:][(u[1:] < 0) & (u[:-1] > 0)]  # the PV crossed upwards: the relay went low
    periods = np.diff(ups[2:])
    lo, a_lo = relay_period(b.gain, b.lag, b.delay)
    hi, a_hi = relay_period(b.gain, b.lag, b.delay + b.period)
    assert periods.size >= 5
    assert lo - b.period <= periods.mean() <= hi + b.period, (periods, lo, hi)
    peak = max(r.pv for r in recs if r.t > ups[2])
    assert b.gain * d * a_lo * 0.98 <= peak <= b.gain * d * a_hi * 1.02


@pytest.mark.parametrize("tracking_time", [0.0, 0.3])
def test_pid_on_the_board_matches_discrete_pid(board, open_link, tracking_time: float) -> None:
    # Reference: autotune.core.pid.DiscretePid, the project's one PID algorithm (the equations
    # in its docstring and SPEC.md SetPid), fed with the PV the board read; saturation and
    # anti-windup (clamping for Tt = 0, back-calculation for Tt > 0) included.
    b = board(gain=2.0, lag=0.5, delay=0.05)
    link = open_link(b)
    link.handshake()
    link.start_heartbeat()
    kp, ki, kd, w, n, sp, limit = 3.0, 4.0, 0.1, 0.7, 10.0, 3.0, 6.0
    link.request(m.SetLimits(0, limit, -100.0, 100.0, 0.0, 1000))
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetPid(0, kp, ki, kd, w, n, tracking_time, sp, 0.0))
    recs = collect(link, b, 3.0, m.Mode.PID)
    link.request(m.Stop())
    pid = DiscretePid(PidSettings(PidGains(f32(kp), f32(ki), f32(kd)), b.period,
                                  deriv_filter_n=n, setpoint_weight=f32(w),
                                  tracking_time=tracking_time or None, out_min=-limit,
                                  out_max=limit))
    want = np.array([pid.update(sp, r.pv) for r in recs])
    got = np.array([r.output for r in recs])
    assert np.any(np.abs(got) == limit)  # saturation was exercised
    np.testing.assert_allclose(got, want, rtol=1e-4, atol=2e-4)


def test_pid_closed_loop_matches_python_control(board, open_link) -> None:
    # Reference: python-control's simulation of the sampled loop. Plant K/(T s + 1) e^{-L s}
    # with L a whole number of ticks, discretised with control.c2d (zero-order hold, exact),
    # the delay as z^-m; the PID of SPEC.md as transfer functions in z (forward-Euler integral
    # ki h/(z - 1), filtered derivative on the measurement bd (z - 1)/(z - ad)); the board's PV
    # must follow the simulated step response.
    b = board(gain=2.0, lag=0.5, delay=0.05)
    link = open_link(b)
    link.handshake()
    link.start_heartbeat()
    kp, ki, kd, w, n, sp = 1.5, 2.0, 0.05, 1.0, 10.0, 1.0
    link.request(m.SetLimits(0, 100.0, -100.0, 100.0, 0.0, 1000))
    link.request(m.Stream(0, 1, 1))
    link.request(m.SetPid(0, kp, ki, kd, w, n, 0.0, sp, 0.0))
    recs = collect(link, b, 3.0, m.Mode.PID)
    link.request(m.Stop())
    h = b.period
    z = control.tf([1, 0], [1], h)
    delay_ticks = round(b.delay / h)
    plant = control.c2d(control.tf([b.gain], [b.lag, 1]), h, "zoh") * z ** (-delay_ticks)
    tf_ = kd / (kp * n)
    ad, bd = tf_ / (tf_ + h), kd / (tf_ + h)
    integ = control.tf([ki * h], [1, -1], h)
    c_r = kp * w + integ
    c_y = kp + integ + control.tf([bd, -bd], [1, -ad], h)
    loop = control.feedback(plant, c_y) * c_r
    k = np.arange(len(recs))
    sim = control.forced_response(loop, timepts=k * h, inputs=np.full(k.size, sp))
    pv = np.array([r.pv for r in recs])
    assert pv[0] == 0.0  # the loop started from rest
    np.testing.assert_allclose(pv, sim.outputs, atol=2e-4)
    assert abs(pv[-1] - sp) < 0.02  # and it settled at the setpoint (integral action)
