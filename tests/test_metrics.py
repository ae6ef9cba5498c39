"""Tests for autotune.core.metrics.step_metrics.

Outside references: python-control 0.10 control.step_info on the same arrays (it takes the
first sample at or beyond a level, so its times are compared within one sample period), and
analytic first-order results.
"""

from __future__ import annotations

import math

import control  # python-control, the outside reference for step-response figures
import numpy as np
import pytest

from autotune.core.metrics import step_metrics


def _second_order(t: np.ndarray, zeta: float, wn: float) -> np.ndarray:
    sys = control.tf([wn * wn], [1.0, 2 * zeta * wn, wn * wn])
    return np.ravel(control.forced_response(sys, T=t, U=np.ones_like(t)).outputs)


@pytest.mark.parametrize("zeta", [0.3, 0.6, 0.9, 1.5])
def test_against_python_control_step_info(zeta: float) -> None:
    # Reference: control.step_info(y, T, yfinal=...) on the same recorded arrays.
    t = np.linspace(0.0, 30.0, 3001)
    dt = t[1] - t[0]
    y = _second_order(t, zeta, 1.3)
    ref = control.step_info(y, t, yfinal=1.0)
    m = step_metrics(t, y, 0.0, 1.0)
    assert m.rise_time == pytest.approx(ref["RiseTime"], abs=dt)
    assert m.settling_time == pytest.approx(ref["SettlingTime"], abs=dt)
    assert m.overshoot == pytest.approx(ref["Overshoot"], abs=1e-9)
    if zeta < 1:  # analytic overshoot of a second-order system: exp(-pi zeta/sqrt(1-zeta^2))
        assert m.overshoot == pytest.approx(100 * math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2)),
                                            rel=1e-3)


def test_offset_and_downward_step_give_the_same_figures() -> None:
    # A step from 5 down to 3 is the same response scaled by -2 and shifted (the metrics are
    # defined on the normalised response); python-control on the normalised arrays agrees.
    t = np.linspace(0.0, 20.0, 2001)
    r = _second_order(t, 0.4, 2.0)
    y = 5.0 - 2.0 * r
    m = step_metrics(t + 100.0, y, 5.0, 3.0)
    ref = control.step_info(r, t, yfinal=1.0)
    assert m.overshoot == pytest.approx(ref["Overshoot"], abs=1e-9)
    assert m.rise_time == pytest.approx(ref["RiseTime"], abs=0.01)
    assert m.settling_time == pytest.approx(ref["SettlingTime"], abs=0.01)


def test_first_order_analytic() -> None:
    # y = 1 - exp(-t/T): rise time T ln 9, settling (2 %) T ln 50, IAE = T, no overshoot.
    tau = 0.7
    t = np.linspace(0.0, 15.0, 150001)
    y = 1.0 - np.exp(-t / tau)
    m = step_metrics(t, y, 0.0, 1.0)
    assert m.rise_time == pytest.approx(tau * math.log(9.0), rel=1e-6)
    assert m.settling_time == pytest.approx(tau * math.log(50.0), rel=1e-6)
    assert m.iae == pytest.approx(tau, rel=1e-6)
    assert m.overshoot == 0.0
    assert m.steady_state_error == pytest.approx(0.0, abs=1e-9)


def test_step_time_and_steady_state_error() -> None:
    t = np.arange(0.0, 10.0, 0.01)
    y = np.where(t < 2.0, 0.0, 0.9 * (1.0 - np.exp(-(t - 2.0) / 0.3)))
    m = step_metrics(t, y, 0.0, 1.0, t_step=2.0)
    assert m.steady_state_error == pytest.approx(0.1, abs=1e-6)
    assert math.isnan(m.settling_time)  # never inside the 2 % band
    assert math.isnan(m.rise_time)  # never reaches 90 %
    assert m.iae == pytest.approx(0.1 * 8.0 + 0.9 * 0.3, rel=1e-3)  # analytic integral


def test_output_peak_and_time_saturated() -> None:
    t = np.arange(0.0, 1.0, 0.01)
    y = np.minimum(t * 2.0, 1.0)
    u = np.where(t < 0.25, 10.0, 3.0)
    u[50] = -12.0
    m = step_metrics(t, y, 0.0, 1.0, u=u, u_limit=10.0)
    assert m.peak_output == 12.0
    assert m.time_saturated == pytest.approx(0.26, abs=1e-9)  # 25 samples high, one low
    assert math.isnan(step_metrics(t, y, 0.0, 1.0).peak_output)


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError):
        step_metrics(np.arange(3.0), np.zeros(3), 1.0, 1.0)
    with pytest.raises(ValueError):
        step_metrics(np.arange(3.0), np.zeros(4), 0.0, 1.0)


# ---------------------------------------------------------------- noise filter and swings
def test_moving_average_is_centred_and_keeps_the_ends() -> None:
    from autotune.core.metrics import RunningMean, moving_average

    rng = np.random.default_rng(3)
    y = rng.normal(size=50)
    out = moving_average(y, 5)
    # interior: numpy's convolution with a flat kernel (the textbook moving average)
    assert np.allclose(out[2:-2], np.convolve(y, np.ones(5) / 5, mode="valid"))
    assert out[0] == pytest.approx(y[0]) and out[-1] == pytest.approx(y[-1])  # shrinks at the ends
    assert out[1] == pytest.approx(np.mean(y[:3]))
    assert np.array_equal(moving_average(y, 1), y)
    with pytest.raises(ValueError):
        moving_average(y, 4)
    rm = RunningMean(5)
    causal = [rm.update(v) for v in y]
    assert causal[-1] == pytest.approx(np.mean(y[-5:])) and causal[0] == y[0]


@pytest.mark.parametrize("zeta", [0.05, 0.1, 0.2])
def test_decay_ratio_of_a_second_order_step_response(zeta: float) -> None:
    """Swing k+2 over swing k of a second-order step response is the analytic decay ratio
    exp(-2 pi zeta / sqrt(1 - zeta^2)) and the period 2 pi / (wn sqrt(1 - zeta^2))
    (python-control computes the response)."""
    from autotune.core.metrics import SwingTracker, decay_ratios, half_swings

    wn = 2.0
    t = np.linspace(0.0, 40.0, 40001)
    y = _second_order(t, zeta, wn)
    tracker = SwingTracker(1e-4)
    for ti, yi in zip(t, y, strict=True):
        tracker.update(float(ti), float(yi))
    ex = tracker.extrema
    assert ex[0].kind == 1 and all(a.kind != b.kind for a, b in zip(ex, ex[1:], strict=False))
    dr = math.exp(-2 * math.pi * zeta / math.sqrt(1 - zeta**2))
    period = 2 * math.pi / (wn * math.sqrt(1 - zeta**2))
    ratios = decay_ratios(ex, min_swing=0.01)
    assert ratios and all(r.decay_ratio == pytest.approx(dr, rel=2e-3) for r in ratios)
    assert all(r.period == pytest.approx(period, rel=2e-3) for r in ratios)
    # the first peak is the overshoot peak (analytic peak time pi / wd)
    assert ex[0].t == pytest.approx(period / 2, abs=2e-3)
    assert half_swings(ex)[0] == pytest.approx(ex[0].y - ex[1].y)


def test_swings_below_the_threshold_are_no_turning_points() -> None:
    from autotune.core.metrics import SwingTracker

    rng = np.random.default_rng(0)
    tracker = SwingTracker(0.5)
    for k, v in enumerate(rng.uniform(-0.2, 0.2, 500)):  # noise of peak-to-peak 0.4 < 0.5
        tracker.update(k * 0.01, float(v))
    assert tracker.extrema == []
