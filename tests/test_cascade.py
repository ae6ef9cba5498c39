"""The heading loop on top of two wheel loops (autotune.core.cascade) against outside truth:
python-control for the closed loops, the outer plant's ultimate point, bandwidths and gain
crossovers; analytic results for the heading integration and the first-order bandwidth."""

from __future__ import annotations

import math

import control  # python-control: the outside reference
import numpy as np
import pytest

from autotune.core.cascade import (
    DriveGeometry,
    bandwidth,
    gain_crossover,
    heading_step,
    inner_closed_loop,
    integrate_heading,
    outer_plant,
    outer_ultimate,
    separation,
)
from autotune.core.lti import DelayedTF, fopdt
from autotune.core.pid import PidGains

TS = 0.01  # s, the drive-base scenario's board tick
# the drive-base scenario's wheel models (invented demo data, mock_device/scenarios/drive-base.toml)
LEFT = DelayedTF((0.30,), (0.027, 0.51, 1.0), 0.04)
RIGHT = DelayedTF((0.285,), (0.0312, 0.545, 1.0), 0.04)
# board-side gains of the order the design gives these wheels (invented for the test)
G_LEFT = PidGains(10.5, 67.0, 0.70)
G_RIGHT = PidGains(11.7, 72.8, 0.85)
B = 0.8  # setpoint weight
N = 10.0
GEO = DriveGeometry(0.05, 0.30)  # m: invented demo values (wheel radius, track width)


def pc_inner(model: DelayedTF, g: PidGains, ts: float, b: float = 1.0, n: float = N
             ) -> control.TransferFunction:
    """python-control's T = C_r G/(1 + C_y G), the dead time plus the hold's ts/2 as a
    6th-order Padé (control.pade), C_y = kp + ki/s + kd s/(Tf s + 1), C_r = b kp + ki/s."""
    pn, pd = control.pade(model.delay + ts / 2, 6)
    gp = control.tf(list(model.num), list(model.den)) * control.tf(pn, pd)
    s = control.tf("s")
    tf = g.kd / (g.kp * n)
    cy = g.kp + g.ki / s + g.kd * s / (tf * s + 1)
    cr = b * g.kp + g.ki / s
    return control.minreal(cr * gp * control.feedback(1, cy * gp), verbose=False)


def pc_outer(geo: DriveGeometry, extra_delay: float = 0.0) -> control.TransferFunction:
    """(r/W)(T_R + T_L)/s (differential setpoint: left base - u, right base + u) in
    python-control, with `extra_delay` as a 6th-order Padé."""
    out = geo.rate_gain * (pc_inner(LEFT, G_LEFT, TS, B) + pc_inner(RIGHT, G_RIGHT, TS, B)) \
        * control.tf([1], [1, 0])
    if extra_delay > 0:
        pn, pd = control.pade(extra_delay, 6)
        out = out * control.tf(pn, pd)
    return out


def pc_response(sys_: control.TransferFunction, w: np.ndarray) -> np.ndarray:
    return np.array([complex(sys_(1j * x)) for x in w])


def test_heading_of_a_constant_speed_difference_is_a_ramp():
    # analytic: dθ/dt = (ω_R - ω_L) r/W constant gives θ = (ω_R - ω_L) r/W t
    t = np.arange(0, 201) * TS
    wl, wr = np.full(t.size, 2.0), np.full(t.size, 3.5)
    th = integrate_heading(t, wl, wr, GEO, theta0=0.1)
    np.testing.assert_allclose(th, 0.1 + 1.5 * GEO.rate_gain * t, atol=1e-12)
    assert heading_step(0.1, 2.0, 3.5, GEO, TS) == pytest.approx(th[1])


def test_heading_of_a_ramp_speed_difference_is_a_parabola():
    # analytic: ω_R - ω_L = a t gives θ = (r/W) a t^2/2; forward Euler is below it by
    # (r/W) a t dt/2 (the sum of k dt^2 over k < K is dt^2 K(K-1)/2)
    a = 4.0
    t = np.arange(0, 301) * TS
    th = integrate_heading(t, np.zeros(t.size), a * t, GEO)
    exact = GEO.rate_gain * a * t**2 / 2
    np.testing.assert_allclose(th, exact - GEO.rate_gain * a * t * TS / 2, atol=1e-12)


def test_the_geometry_is_checked():
    with pytest.raises(ValueError, match="track_width"):
        DriveGeometry(0.05, 0.0)


def test_inner_closed_loop_matches_python_control():
    # python-control's closed loop (6th-order Padé) against ours (3rd-order Padé) on the
    # frequencies that matter to the outer loop (up to 3x the inner bandwidth)
    ours = inner_closed_loop(LEFT, G_LEFT, TS, N, B)
    ref = pc_inner(LEFT, G_LEFT, TS, B)
    w = np.logspace(-2, math.log10(30.0), 60)
    np.testing.assert_allclose(ours.freq_response(w), pc_response(ref, w), rtol=0.01, atol=2e-3)
    assert ours.static_gain == pytest.approx(1.0, abs=1e-9)  # integral action: T(0) = 1


# control.margin evaluates the 30th-order reference far past its crossings (its own overflow)
@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
def test_outer_plant_ultimate_point_matches_python_control_margin():
    # the inner closed loops in series with the outer integrator: Ku = gain margin and
    # Tu = 2 pi / phase crossover frequency from control.margin (python-control)
    tl = inner_closed_loop(LEFT, G_LEFT, TS, N, B)
    tr = inner_closed_loop(RIGHT, G_RIGHT, TS, N, B)
    p = outer_plant(tl, tr, GEO)
    assert p.integrators == 1
    assert p.velocity_gain == pytest.approx(2 * GEO.rate_gain)  # analytic: (r/W)(1 + 1)
    for host_tick in (None, 0.05):
        extra = 0.0 if host_tick is None else host_tick / 2
        gm, _pm, wcg, _wcp = control.margin(pc_outer(GEO, extra))
        ku, tu = outer_ultimate(p, host_tick)
        assert ku == pytest.approx(gm, rel=0.01)
        assert tu == pytest.approx(2 * math.pi / wcg, rel=0.01)


def test_bandwidth_matches_analytic_and_python_control():
    # analytic: 1/(T s + 1) falls 3 dB at w = 1/T
    assert bandwidth(DelayedTF((1.0,), (0.25, 1.0))) == pytest.approx(4.0, rel=1e-3)
    tr = inner_closed_loop(RIGHT, G_RIGHT, TS, N, B)
    # control.bandwidth: the first frequency where the gain drops 3 dB below the DC gain
    assert bandwidth(tr) == pytest.approx(control.bandwidth(pc_inner(RIGHT, G_RIGHT, TS, B)),
                                          rel=0.01)


def test_gain_crossover_matches_python_control():
    # continuous PI on the outer plant: control.margin's gain crossover frequency (wcp)
    tl = inner_closed_loop(LEFT, G_LEFT, TS, N, B)
    tr = inner_closed_loop(RIGHT, G_RIGHT, TS, N, B)
    p = outer_plant(tl, tr, GEO)
    g = PidGains(2.8, 1.9, 0.0)
    s = control.tf("s")
    _gm, _pm, _wcg, wcp = control.margin((g.kp + g.ki / s) * pc_outer(GEO))
    assert gain_crossover(p, g) == pytest.approx(wcp, rel=0.01)


def test_separation_warns_when_the_outer_loop_is_not_four_times_slower():
    # 4x: common practice, no source; inner bandwidth 1/T of a first-order loop (analytic)
    inner = [DelayedTF((1.0,), (0.1, 1.0)), DelayedTF((1.0,), (0.125, 1.0))]  # 10, 8 rad/s
    ok = separation(inner, 1.5)
    assert ok.ok and ok.warning == "" and ok.ratio == pytest.approx(8 / 1.5, rel=1e-3)
    bad = separation(inner, 4.0)
    assert not bad.ok and bad.ratio == pytest.approx(2.0, rel=1e-3)
    assert "only 2.0 times slower" in bad.warning and "at least 4" in bad.warning


def test_inner_closed_loop_of_a_pi_without_derivative():
    # kd = 0: T = (b kp s + ki) G / (s + (kp s + ki) G) with G the FOPDT (python-control)
    m = fopdt(2.0, 0.5, 0.05)
    g = PidGains(0.8, 2.0, 0.0)
    ours = inner_closed_loop(m, g, TS, N, 1.0)
    pn, pd = control.pade(m.delay + TS / 2, 6)
    gp = control.tf([2.0], [0.5, 1.0]) * control.tf(pn, pd)
    s = control.tf("s")
    ref = control.feedback((g.kp + g.ki / s) * gp, 1)
    w = np.logspace(-2, 1.5, 40)
    np.testing.assert_allclose(ours.freq_response(w), pc_response(ref, w), rtol=0.01, atol=2e-3)
