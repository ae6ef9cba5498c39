"""Tests for mock_device.plant: exact ZOH + dead-time simulation, actuator, sensor."""

from __future__ import annotations

import math

import control  # python-control, the outside reference for linear system responses
import numpy as np
import pytest

from mock_device.plant import Actuator, LtiPlant, Sensor, SimulatedAxis


def _reference_step(num, den, t):
    """Undelayed unit step response from python-control (control.forced_response)."""
    sys = control.tf(num, den)
    resp = control.forced_response(sys, T=t, U=np.ones_like(t))
    return np.asarray(resp.outputs).ravel()


def test_second_order_dead_time_step_matches_python_control():
    # Reference: python-control 0.10 control.forced_response of the same rational system; the
    # dead time is applied by shifting the reference in time (exact for a step input).
    num, den, delay = [2.0], [0.1, 0.7, 1.0], 0.037  # K=2, poles at -2 and -5
    tick = 0.01
    plant = LtiPlant(num, den, delay, max_step=tick / 10)
    n = 400
    y = plant.simulate(np.ones(n), tick)  # y[k] at t = k*tick
    fine = 1e-3
    t_ref = np.arange(0, int(round(n * tick / fine)) + 1) * fine
    y_ref_undelayed = _reference_step(num, den, t_ref)
    t = np.arange(n) * tick
    shifted = t - delay
    idx = np.rint(shifted / fine).astype(int)
    y_ref = np.where(shifted >= 0, y_ref_undelayed[np.clip(idx, 0, None)], 0.0)
    final = 2.0
    assert np.max(np.abs(y - y_ref)) < 1e-3 * final
    # before the dead time has elapsed nothing moves at all
    assert np.all(y[t < delay] == 0.0)
    assert y[-1] == pytest.approx(final, rel=1e-3)


def test_piecewise_input_matches_python_control_zoh():
    # Reference: python-control control.sample_system(sys, dt, 'zoh') and forced_response of the
    # discrete system; the delay is a whole number of ticks, which the discrete model expresses
    # as an input shift.
    num, den = [1.5, 3.0], [0.2, 1.1, 1.0]  # a zero too, to exercise the tf2ss path
    tick, d_ticks = 0.01, 3
    rng = np.random.default_rng(5)
    u = np.repeat(rng.uniform(-1, 1, 30), 7)
    plant = LtiPlant(num, den, d_ticks * tick, max_step=tick / 10)
    y = plant.simulate(u, tick)
    sysd = control.sample_system(control.tf(num, den), tick, method="zoh")
    u_shift = np.concatenate([np.zeros(d_ticks), u[:-d_ticks]])
    ref = control.forced_response(sysd, T=np.arange(len(u)) * tick, U=u_shift)
    y_ref = np.asarray(ref.outputs).ravel()
    assert np.max(np.abs(y - y_ref)) < 1e-9


def test_integrating_plant_ramp_analytic():
    # Analytic: K/(s(Ts+1)) e^{-Ls} with a step of size u at t=0 gives
    # y(t) = K u (t' - T + T exp(-t'/T)) with t' = t - L (t' >= 0), else 0.
    k_gain, tau, delay, u = 0.9, 0.15, 0.03, 10.0
    plant = LtiPlant([k_gain], [tau, 1.0, 0.0], delay, max_step=1e-3)
    tick = 0.01
    y = plant.simulate(np.full(300, u), tick)
    t = np.arange(300) * tick
    tp = np.clip(t - delay, 0.0, None)
    y_ref = k_gain * u * (tp - tau + tau * np.exp(-tp / tau))
    assert np.max(np.abs(y - y_ref)) < 1e-9 * max(1.0, np.max(np.abs(y_ref)))
    assert plant.dc_gain() == math.inf


def test_pure_integrator_and_static_gain():
    # Analytic: 1/s integrates; a static gain passes the delayed input.
    p = LtiPlant([2.0], [1.0, 0.0])
    p.advance(3.0, 0.5)
    assert p.y == pytest.approx(3.0, abs=1e-12)
    g = LtiPlant([4.0], [2.0], delay=0.02)
    g.advance(1.0, 0.01)
    assert g.y == 0.0
    g.advance(1.0, 0.01)
    assert g.y == pytest.approx(2.0)


def test_delay_not_multiple_of_tick_and_fast_toggle():
    # A pulse shorter than a tick boundary crossing: the plant must integrate the delayed pulse
    # exactly. Analytic for the integrator 1/s: area = pulse height * width, regardless of delay.
    p = LtiPlant([1.0], [1.0, 0.0], delay=0.0153, max_step=1e-3)
    p.advance(5.0, 0.004)  # pulse of 5 for 4 ms
    p.advance(0.0, 0.1)
    assert p.y == pytest.approx(5.0 * 0.004, abs=1e-12)
    assert p.t == pytest.approx(0.104)


def test_reset_and_cache_reuse():
    p = LtiPlant([1.0], [0.3, 1.0], delay=0.01)
    y1 = p.simulate(np.ones(50), 0.01)
    p.reset()
    y2 = p.simulate(np.ones(50), 0.01)
    assert np.array_equal(y1, y2)
    assert p.t == pytest.approx(0.5)


@pytest.mark.parametrize(
    "num,den,delay",
    [([1.0, 2.0, 3.0], [1.0, 1.0], 0.0), ([1.0], [0.0], 0.0), ([1.0], [1.0, 1.0], -0.1)],
)
def test_invalid_plants_rejected(num, den, delay):
    with pytest.raises(ValueError):
        LtiPlant(num, den, delay)


def test_actuator_saturation_and_deadband():
    a = Actuator(limit=50.0, deadband=3.0)
    assert a.saturate(80.0) == 50.0
    assert a.saturate(-80.0) == -50.0
    assert a.apply(2.9) == 0.0
    assert a.apply(-3.0) == 0.0
    assert a.apply(10.0) == pytest.approx(7.0)
    assert a.apply(-10.0) == pytest.approx(-7.0)
    assert a.apply(1000.0) == pytest.approx(47.0)


def test_sensor_quantisation_offset_and_seeded_noise():
    s = Sensor(resolution=0.5, offset=10.0)
    assert s.read(0.24) == 10.0
    assert s.read(0.26) == 10.5
    n1 = Sensor(noise=0.2, rng=np.random.default_rng(42))
    n2 = Sensor(noise=0.2, rng=np.random.default_rng(42))
    a = np.array([n1.read(1.0) for _ in range(4000)])
    b = np.array([n2.read(1.0) for _ in range(4000)])
    assert np.array_equal(a, b)  # reproducible
    assert a.mean() == pytest.approx(1.0, abs=0.02)  # 4 sigma of the mean: 4*0.2/sqrt(4000)
    assert a.std() == pytest.approx(0.2, rel=0.06)


def test_simulated_axis_load_and_deadband():
    # Analytic: integrator 1/s with deadband 2 and a load of 1: drive 1.5 is inside the deadband,
    # only the load acts: y = 1 * t.
    axis = SimulatedAxis(
        LtiPlant([1.0], [1.0, 0.0]), Actuator(limit=10.0, deadband=2.0), Sensor(), load=1.0
    )
    applied = axis.drive(1.5, 0.5)
    assert applied == 1.5
    assert axis.read() == pytest.approx(0.5)
    applied = axis.drive(20.0, 0.5)  # saturates at 10, minus deadband 2, plus load 1 -> 9
    assert applied == 10.0
    assert axis.read() == pytest.approx(0.5 + 9 * 0.5)


def test_matrix_exponential_matches_scipy() -> None:
    # reference: scipy.linalg.expm (Pade approximation with scaling and squaring)
    import numpy as np
    import scipy.linalg

    from mock_device.plant import expm

    rng = np.random.default_rng(3)
    for n in (1, 2, 3, 5, 8):
        for scale in (1e-4, 0.1, 1.0, 10.0):
            a = rng.normal(size=(n, n)) * scale
            ref = scipy.linalg.expm(a)
            assert np.max(np.abs(expm(a) - ref)) <= 1e-10 * np.max(np.abs(ref))
