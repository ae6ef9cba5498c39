"""Tests for autotune.core.pid (gain forms, DiscretePid) and autotune.core.closedloop.

Outside references: python-control 0.10 (control.sample_system, control.forced_response,
control.feedback) for the sampled and continuous closed loops; analytic results otherwise.
"""

from __future__ import annotations

import math

import control  # python-control, the outside reference for linear system responses
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from autotune.core.closedloop import simulate_closed_loop
from autotune.core.lti import DelayedTF, sopdt
from autotune.core.metrics import step_metrics
from autotune.core.pid import (
    DiscretePid,
    PidGains,
    PidSettings,
    filter_time,
    from_series,
    from_standard,
    per_tick,
    to_standard,
)

pos = st.floats(min_value=1e-3, max_value=1e3, allow_nan=False, allow_infinity=False)


@given(kp=pos, ki=pos, kd=st.floats(min_value=0.0, max_value=1e3))
def test_parallel_standard_round_trip(kp: float, ki: float, kd: float) -> None:
    g = PidGains(kp, ki, kd)
    back = from_standard(*to_standard(g))
    assert back.kp == pytest.approx(kp, rel=1e-12)
    assert back.ki == pytest.approx(ki, rel=1e-12)
    assert back.kd == pytest.approx(kd, rel=1e-12, abs=1e-300)


@given(kc=pos, ti=pos, td=st.floats(min_value=0.0, max_value=1e3))
def test_standard_parallel_round_trip(kc: float, ti: float, td: float) -> None:
    kc2, ti2, td2 = to_standard(from_standard(kc, ti, td))
    assert (kc2, ti2, td2) == pytest.approx((kc, ti, td), rel=1e-12, abs=1e-300)


def test_no_integral_action_is_infinite_ti() -> None:
    assert to_standard(PidGains(2.0, 0.0, 1.0)) == (2.0, math.inf, 0.5)
    assert from_standard(2.0) == PidGains(2.0, 0.0, 0.0)
    with pytest.raises(ValueError):
        to_standard(PidGains(0.0, 1.0))


def test_series_form_is_the_product_of_its_factors() -> None:
    # Analytic: Kc (1 + 1/(Ti s)) (1 + Td s) = Kc [(1 + Td/Ti) + 1/(Ti s) + Td s].
    kc, ti, td = 3.0, 2.0, 0.5
    g = from_series(kc, ti, td)
    s = 1j * np.array([0.1, 1.0, 7.0])
    series = kc * (1 + 1 / (ti * s)) * (1 + td * s)
    parallel = g.kp + g.ki / s + g.kd * s
    assert np.allclose(series, parallel)


def test_per_tick_coefficients() -> None:
    g = PidGains(2.0, 4.0, 0.5)
    c = per_tick(g, 0.01, 10.0)
    tf = 0.5 / (2.0 * 10.0)  # Td/N, Td = kd/kp
    assert c["tf"] == pytest.approx(tf)
    assert c["ki_ts"] == pytest.approx(0.04)
    assert c["kd_ts"] == pytest.approx(50.0)
    assert c["ad"] == pytest.approx(tf / (tf + 0.01))
    assert c["bd"] == pytest.approx(0.5 / (tf + 0.01))
    assert filter_time(PidGains(2.0, 1.0, 0.0), 10) == 0.0


def test_difference_equations_by_hand() -> None:
    # The docstring's equations evaluated by hand for three ticks (analytic).
    g = PidGains(2.0, 5.0, 0.3)
    ts, n, b = 0.1, 10.0, 0.5
    pid = DiscretePid(PidSettings(g, ts, n, setpoint_weight=b, bias=0.25))
    tf = 0.3 / (2.0 * 10.0)
    ad, bd = tf / (tf + ts), 0.3 / (tf + ts)
    sp, ys = 1.0, [0.0, 0.2, 0.5]
    i_state, d_state, y_prev = 0.0, 0.0, ys[0]
    for y in ys:
        d_state = ad * d_state - bd * (y - y_prev)
        expected = 2.0 * (b * sp - y) + i_state + d_state + 0.25
        assert pid.update(sp, y) == pytest.approx(expected, rel=1e-14)
        i_state += 5.0 * ts * (sp - y)
        y_prev = y
    assert pid.integral == pytest.approx(i_state)


def test_clamping_holds_the_integral_while_saturated() -> None:
    pid = DiscretePid(PidSettings(PidGains(1.0, 10.0), 0.01, out_min=-1.0, out_max=1.0))
    for _ in range(100):
        u = pid.update(5.0, 0.0)  # error 5, P alone saturates
    assert u == 1.0
    assert pid.integral == 0.0  # never integrated: every increment pushed further up
    # out of saturation the error is integrated at once
    pid.update(0.5, 0.0)
    assert pid.integral == pytest.approx(0.05)
    # saturated low with an error pushing up: integrated (it drives out of saturation)
    pid.reset()
    pid.update(-5.0, 0.0)
    assert pid.integral == 0.0
    pid.reset(integral=-3.0)
    assert pid.update(0.5, 0.0) == -1.0
    assert pid.integral == pytest.approx(-3.0 + 0.05)


def test_back_calculation_settles_at_the_tracking_equilibrium() -> None:
    # Analytic: steady saturation with constant e gives ki e + (u - v)/Tt = 0, so
    # v = u + Tt ki e and I = u + Tt ki e - kp e.
    kp, ki, tt, e = 1.0, 10.0, 0.2, 5.0
    pid = DiscretePid(PidSettings(PidGains(kp, ki), 0.01, tracking_time=tt, out_min=-1.0,
                                  out_max=1.0))
    for _ in range(5000):
        pid.update(e, 0.0)
    assert pid.integral == pytest.approx(1.0 + tt * ki * e - kp * e, rel=1e-9)


def test_first_sample_has_no_derivative_kick() -> None:
    pid = DiscretePid(PidSettings(PidGains(1.0, 0.0, 5.0), 0.01))
    assert pid.update(0.0, 3.0) == pytest.approx(-3.0)
    pid.reset(pv=0.0)
    assert pid.update(0.0, 3.0) < -3.0  # measured change now acts through D


def _discrete_pid_tfs(g: PidGains, ts: float, n: float, b: float):
    """The DiscretePid's linear transfer functions u = Cr r - Cy y (python-control objects)."""
    c = per_tick(g, ts, n)
    z = control.tf([1, 0], [1], ts)
    integ = c["ki_ts"] / (z - 1)
    deriv = c["bd"] * (z - 1) / (z - c["ad"])
    return g.kp * b + integ, g.kp + integ + deriv


def test_sampled_loop_matches_python_control_exactly() -> None:
    # Reference: python-control's ZOH discretisation (control.sample_system) of the plant with
    # the dead time as z^-m, closed with the DiscretePid's transfer functions; the project's
    # simulation must agree to rounding error (same sampled loop, no saturation).
    ts, m = 0.02, 7
    plant = sopdt(1.5, 0.4, 0.1, m * ts)
    g = PidGains(1.2, 2.0, 0.08)
    b = 0.7
    settings = PidSettings(g, ts, 8.0, setpoint_weight=b)
    gd = control.sample_system(control.tf(plant.num, plant.den), ts, method="zoh")
    delay = control.tf([1], [1] + [0] * m, ts)
    cr, cy = _discrete_pid_tfs(g, ts, 8.0, b)
    closed = control.minreal(control.feedback(gd * delay, cy) * cr, verbose=False)
    for method in ("linear", "ticks"):
        run = simulate_closed_loop(plant, settings, 4.0, 1.0, method=method)
        ref = control.forced_response(closed, T=run.t, U=np.ones_like(run.t))
        assert np.max(np.abs(run.y - np.ravel(ref.outputs))) < 1e-9


def test_fractional_delay_sampled_loop_is_between_neighbours() -> None:
    # A dead time between two whole ticks gives a response between the two whole-tick ones
    # (monotone in the delay over the rise; analytic property of the exact ZOH model).
    ts = 0.02
    g = PidGains(0.8, 1.0, 0.0)
    ys = [simulate_closed_loop(sopdt(1.0, 0.5, 0.1, d), PidSettings(g, ts), 0.6, 1.0).y
          for d in (0.10, 0.11, 0.12)]
    rising = slice(10, 25)
    assert np.all(ys[0][rising] >= ys[1][rising]) and np.all(ys[1][rising] >= ys[2][rising])


def test_discrete_pid_matches_continuous_counterpart_at_20_ticks_per_rise_time() -> None:
    # Reference: python-control simulation (control.forced_response) of the continuous loop:
    # PID with derivative on the measurement through 1/(1 + s Td/N) and setpoint weight b,
    # dead time as a 10th-order Padé approximant (control.pade). Expected discretisation
    # error: the hold lags the loop by half a tick (the forward-Euler integral and the
    # backward-difference derivative add a little), so the outputs differ by about
    # max|dy/dt| * ts/2 at most; 0.6 max|dy/dt| ts is allowed.
    plant = sopdt(1.0, 1.0, 0.3, 0.25)
    g = PidGains(2.0, 1.6, 0.45)
    n, b = 10.0, 1.0
    num_d, den_d = control.pade(plant.delay, 10)
    gp = control.tf(plant.num, plant.den) * control.tf(num_d, den_d)
    tf = filter_time(g, n)
    s = control.tf("s")
    cr = g.kp * b + g.ki / s
    cy = g.kp + g.ki / s + g.kd * s / (1 + tf * s)
    closed = control.feedback(gp, cy) * cr
    t_fine = np.linspace(0, 12, 12001)
    y_cont = np.ravel(control.forced_response(closed, T=t_fine, U=np.ones_like(t_fine)).outputs)
    rise = step_metrics(t_fine, y_cont, 0.0, 1.0).rise_time
    ts = rise / 20.0
    run = simulate_closed_loop(plant, PidSettings(g, ts, n, setpoint_weight=b), 12.0, 1.0)
    y_ref = np.interp(run.t, t_fine, y_cont)
    slope = np.max(np.abs(np.gradient(y_cont, t_fine)))
    err = np.max(np.abs(run.y - y_ref))
    assert err <= 0.6 * slope * ts
    assert err > 0.1 * slope * ts  # a real discretisation difference, not the same curve


def test_load_step_enters_at_the_plant_input() -> None:
    # With a P controller and a static gain K the load's steady offset is K d/(1 + K kp)
    # (analytic, final-value theorem).
    plant = DelayedTF((2.0,), (0.2, 1.0), 0.05)
    run = simulate_closed_loop(plant, PidSettings(PidGains(1.5), 0.01), 5.0, 0.0,
                               load_step=1.0, load_time=1.0)
    assert np.all(run.y[run.t < 1.0] == 0.0)
    assert run.y[-1] == pytest.approx(2.0 / (1 + 3.0), rel=1e-6)
    assert run.u[-1] == pytest.approx(-1.5 * run.y[-1])


def test_output_limits_apply_in_the_loop() -> None:
    plant = DelayedTF((1.0,), (1.0, 1.0), 0.1)
    run = simulate_closed_loop(plant, PidSettings(PidGains(5.0, 5.0), 0.01, out_min=-2.0,
                                                  out_max=2.0), 3.0, 1.0)
    assert np.max(run.u) == 2.0
    assert np.min(run.u) >= -2.0


def test_feedthrough_without_delay_is_refused() -> None:
    with pytest.raises(ValueError):
        simulate_closed_loop(DelayedTF((1.0, 1.0), (1.0, 2.0)), PidSettings(PidGains(1.0), 0.1),
                             1.0, 1.0)


@pytest.mark.parametrize("plant", [sopdt(1.5, 0.4, 0.1, 0.137), DelayedTF((2.0,), (0.3, 1.0, 0.0), 0.05)])
def test_linear_solution_equals_the_tick_loop(plant: DelayedTF) -> None:
    # Two evaluations of the same sampled loop (one difference equation vs DiscretePid tick
    # by tick) agree while the output is inside its limits; a fractional dead time and an
    # integrating plant included.
    s = PidSettings(PidGains(1.1, 0.9, 0.12), 0.01, 10.0, setpoint_weight=0.6, bias=0.3)
    a = simulate_closed_loop(plant, s, 3.0, 1.0, load_step=0.5, load_time=1.5, method="linear")
    b = simulate_closed_loop(plant, s, 3.0, 1.0, load_step=0.5, load_time=1.5, method="ticks")
    assert np.max(np.abs(a.y - b.y)) < 1e-9
    assert np.max(np.abs(a.u - b.u)) < 1e-9
    # and the plant part is the exact ZOH response: replaying the input through the
    # DelayedTF's own simulation gives the same PV
    assert np.max(np.abs(plant.simulate_zoh(b.u + b.load, 0.01) - b.y)) < 1e-9
