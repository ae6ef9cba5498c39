"""Prechecks (pure evaluators over recorded arrays) and the output profiles the runner plays."""

from __future__ import annotations

import math

import numpy as np
import pytest

from autotune.core.lti import DelayedTF, fopdt
from autotune.core.prechecks import (
    MSG_NO_RESPONSE,
    MSG_SIGN_DISAGREE,
    PrecheckFailed,
    assess_breakaway,
    assess_direction,
    assess_rest,
    breakaway_ramp,
    breakaway_ramp_duration,
    direction_pulse,
    smallest_step,
    trailing_median3,
    weak_response,
)

DT = 0.01


def quantise(x: np.ndarray, q: float) -> np.ndarray:
    return np.round(x / q) * q if q > 0 else x


# ---------------------------------------------------------------------------------- rest
def test_rest_noise_drift_and_resolution() -> None:
    rng = np.random.default_rng(7)
    t = 50.0 + np.arange(2000) * DT
    noise, drift, q = 0.02, 0.003, 0.005
    pv = quantise(3.0 + drift * (t - t[0]) + rng.normal(0, noise, t.size), q)
    r = assess_rest(t, pv, np.full(t.size, 1.5))
    # quantisation adds q^2/12 of variance (uniform rounding error; standard result, from memory)
    assert r.noise_std == pytest.approx(math.hypot(noise, q / math.sqrt(12)), rel=0.05)
    assert r.drift == pytest.approx(drift, rel=0.1)
    assert r.resolution == pytest.approx(q, rel=1e-6)
    assert r.mean == pytest.approx(3.0 + drift * (t[-1] - t[0]) / 2, abs=0.005)
    # default hysteresis = max(3 x noise, 2 x resolution) (common practice, no source)
    assert r.suggested_hysteresis == pytest.approx(3 * r.noise_std)
    assert r.output_mean == 1.5 and r.samples == t.size and r.duration == pytest.approx(19.99)
    assert r.ok and r.message == ""


def test_rest_noise_is_not_widened_by_spikes() -> None:
    """One-sample spikes of 50 sigma on 1 % of the samples (a corrupt reading) leave the noise
    at the sensor's own (its standard deviation, within sampling error) and the drift at the
    line's; the plain standard deviation would be five times larger."""
    rng = np.random.default_rng(3)
    t = np.arange(1000) * DT
    pv = 1.0 + 0.002 * t + rng.normal(0, 0.02, t.size)
    hit = rng.random(t.size) < 0.01
    pv[hit] += rng.choice([-1.0, 1.0], hit.sum())
    r = assess_rest(t, pv, np.zeros(t.size))
    assert np.std(pv) > 4 * 0.02
    assert r.noise_std == pytest.approx(0.02, rel=0.1)
    assert r.drift == pytest.approx(0.002, abs=0.003)


def test_rest_coarse_resolution_sets_hysteresis() -> None:
    rng = np.random.default_rng(3)
    t = np.arange(500) * DT
    pv = quantise(rng.normal(0, 0.03, t.size), 0.1)  # mostly one level, now and then a step
    r = assess_rest(t, pv, np.zeros(t.size))
    assert r.resolution == pytest.approx(0.1)
    assert 3 * r.noise_std < 0.2
    assert r.suggested_hysteresis == pytest.approx(0.1)  # one step (prechecks.relay_hysteresis)


def test_rest_perfect_sensor() -> None:
    t = np.arange(100) * DT
    r = assess_rest(t, np.full(100, 2.0), np.zeros(100))
    assert r.noise_std == 0.0 and r.drift == 0.0 and r.resolution == 0.0
    assert r.suggested_hysteresis == 0.0


def test_rest_fails_when_window_is_narrower_than_noise() -> None:
    rng = np.random.default_rng(5)
    t = np.arange(1000) * DT
    pv = rng.normal(0, 0.5, t.size)
    r = assess_rest(t, pv, np.zeros(t.size), pv_window=2.0)
    assert not r.ok and "window" in r.message
    assert assess_rest(t, pv, np.zeros(t.size), pv_window=10.0).ok


def test_rest_needs_data() -> None:
    with pytest.raises(ValueError):
        assess_rest([0.0, 0.1], [1.0, 1.0], [0.0, 0.0])
    with pytest.raises(ValueError):
        assess_rest([0.0, 0.1, 0.2], [1.0, 1.0], [0.0, 0.0, 0.0])
    with pytest.raises(ValueError):
        assess_rest([0.0, 0.1, 0.2], [1.0, math.nan, 1.0], [0.0, 0.0, 0.0])


def test_smallest_step_ignores_float_noise() -> None:
    assert smallest_step([1.0, 1.0, 1.0 + 1e-12, 1.25, 1.0]) == pytest.approx(0.25)
    assert smallest_step([2.0]) == 0.0


# ---------------------------------------------------------------------------------- direction
def pulse_response(plant: DelayedTF, pulse: float, t_pulse: float = 1.0, width: float = 0.5,
                   noise: float = 0.0, seed: int = 0, n: int = 300):
    """Simulated direction check: a pulse of `pulse` output units at t_pulse for `width` s."""
    t = np.arange(n) * DT
    u = np.array([direction_pulse(tk - t_pulse, abs(pulse), width, sign=int(np.sign(pulse)))
                  for tk in t])
    y = plant.simulate_zoh(u, DT) + np.random.default_rng(seed).normal(0, noise, n) + 4.0
    return t, y


def test_direction_ok() -> None:
    t, y = pulse_response(fopdt(2.0, 0.5, 0.1), 1.0, noise=0.01)
    r = assess_direction(t, y, 1.0, +1, noise_std=0.01)
    assert r.ok and r.moved and r.sign_ok and r.message == ""
    assert r.change > 0.05 and r.threshold == pytest.approx(0.05)
    assert r.t_response is not None and 1.1 < r.t_response < 1.5


def test_direction_negative_pulse_ok() -> None:
    t, y = pulse_response(fopdt(2.0, 0.5, 0.1), -1.0, noise=0.01)
    r = assess_direction(t, y, 1.0, -1, noise_std=0.01)
    assert r.ok and r.change < 0


def test_direction_wrong_way() -> None:
    t, y = pulse_response(fopdt(-2.0, 0.5, 0.1), 1.0, noise=0.01)
    r = assess_direction(t, y, 1.0, +1, noise_std=0.01)
    assert not r.ok and r.moved and not r.sign_ok
    assert r.message == "actuator and sensor signs disagree; flip `sign` in the config"
    assert r.message == MSG_SIGN_DISAGREE


def test_direction_expected_sign_reversed_loop() -> None:
    t, y = pulse_response(fopdt(-2.0, 0.5, 0.1), 1.0, noise=0.01)
    assert assess_direction(t, y, 1.0, +1, noise_std=0.01, expected_sign=-1).ok


def test_direction_no_response() -> None:
    t, y = pulse_response(fopdt(0.01, 0.5, 0.1), 1.0, noise=0.01, seed=2)
    r = assess_direction(t, y, 1.0, +1, noise_std=0.01)
    assert not r.ok and not r.moved
    assert r.message == "no response: check power, wiring, deadband; try a larger pulse"
    assert r.message == MSG_NO_RESPONSE


def test_direction_single_spike_is_not_motion() -> None:
    t = np.arange(300) * DT
    y = np.full(300, 1.0)
    y[150] += 5.0  # one corrupt sample
    r = assess_direction(t, y, 1.0, +1, noise_std=0.01)
    assert not r.moved and r.message == MSG_NO_RESPONSE


def test_direction_spike_on_the_first_or_last_pulse_sample_is_not_motion() -> None:
    """The live check stops the pulse on the sample that crossed: a spike there (or on the
    pulse's first sample) must neither count as motion nor decide the sign (causal median)."""
    for k in (100, 299):
        for spike in (+5.0, -5.0):
            t = np.arange(300) * DT
            y = np.full(300, 1.0)
            y[k] += spike
            r = assess_direction(t, y, 1.0, +1, noise_std=0.01)
            assert not r.moved and abs(r.change) < 1e-12, (k, spike, r)


def test_trailing_median_is_what_a_live_check_sees() -> None:
    """y[k] depends on x[k-2..k] only: every prefix gives the same values (the live check during
    the pulse and the assessment after it agree sample by sample)."""
    x = np.random.default_rng(4).normal(size=40)
    full = trailing_median3(x)
    for n in range(3, 41):
        assert trailing_median3(x[:n])[-1] == full[n - 1]
        assert full[n - 1] == np.median(x[n - 3:n])
    assert list(trailing_median3([1.0, 9.0])) == [1.0, 9.0]


def test_weak_response_asks_for_a_larger_pulse() -> None:
    """A move between half the threshold and the threshold (two counts of a coarse sensor) is
    too weak to decide but not "no response"."""
    t = np.arange(300) * DT
    q = 0.088
    y = np.where(t >= 1.2, 2 * q, 0.0)  # two counts: 0.176
    weak = assess_direction(t, y, 1.0, +1, noise_std=0.0, min_change=0.25)
    assert not weak.moved and weak_response(weak)
    strong = assess_direction(t, y, 1.0, +1, noise_std=0.0, min_change=0.15)
    assert strong.ok and not weak_response(strong)
    none = assess_direction(t, np.zeros_like(t), 1.0, +1, noise_std=0.0, min_change=0.25)
    assert not weak_response(none)


def test_direction_late_response_outside_timeout() -> None:
    t, y = pulse_response(fopdt(2.0, 0.2, 1.5), 1.0, noise=0.0, n=400)
    assert assess_direction(t, y, 1.0, +1, noise_std=0.001, timeout=3.0).ok
    assert not assess_direction(t, y, 1.0, +1, noise_std=0.001, timeout=1.0).moved


def test_direction_inverse_response_decided_by_main_motion() -> None:
    """Non-minimum-phase plant 2(1 - s)/((0.5 s + 1)(0.2 s + 1)): brief dip, then a rise."""
    plant = DelayedTF((-2.0, 2.0), tuple(np.polymul([0.5, 1.0], [0.2, 1.0])), 0.0)
    t, y = pulse_response(plant, 1.0, width=1.0, noise=0.0, n=400)
    after = y[(t > 1.0) & (t < 1.1)] - 4.0
    assert after.min() < -0.05  # the plant does dip first
    assert assess_direction(t, y, 1.0, +1, noise_std=0.005).ok


def test_direction_argument_checks() -> None:
    with pytest.raises(ValueError):
        assess_direction([0.0], [0.0], 0.0, 0, 0.1)
    r = assess_direction([0.0, 0.1], [0.0, 0.0], 5.0, +1, 0.1)  # no samples after the pulse
    assert not r.moved and r.message == MSG_NO_RESPONSE


def test_precheck_failed_carries_message() -> None:
    e = PrecheckFailed("direction", MSG_SIGN_DISAGREE)
    assert str(e) == MSG_SIGN_DISAGREE and e.check == "direction"


# ---------------------------------------------------------------------------------- breakaway
def ramp_run(deadband: float, rate: float, noise: float, seed: int = 0, delay: float = 0.05,
             bias: float = 0.0, n: int = 1000):
    """Ramp from t = 0.5 s into a FOPDT behind a deadband (|u| < deadband moves nothing)."""
    t = np.arange(n) * DT
    u = np.array([breakaway_ramp(tk - 0.5, rate, 10.0, bias=bias) for tk in t])
    ue = np.where(np.abs(u) < deadband, 0.0, u)
    y = fopdt(1.0, 0.3, delay).simulate_zoh(ue, DT)
    y = y + np.random.default_rng(seed).normal(0, noise, n)
    return t, y, u


def test_breakaway_measures_deadband() -> None:
    t, y, u = ramp_run(deadband=2.0, rate=1.0, noise=0.002)
    r = assess_breakaway(t, y, u, noise_std=0.002)
    assert r.deadband is not None and r.message == ""
    # the estimate is an upper bound: lag and dead time let the ramp run on (here < 0.3 output)
    assert 2.0 <= r.deadband <= 2.3
    assert r.t_move is not None and r.output_at_move == pytest.approx(r.deadband)
    # a known response lag brings it closer
    r2 = assess_breakaway(t, y, u, noise_std=0.002, response_lag=0.05)  # the dead time
    assert r2.deadband is not None and 1.99 <= r2.deadband < r.deadband


def test_breakaway_relative_to_bias() -> None:
    t, y, u = ramp_run(deadband=3.0, rate=1.0, noise=0.0, bias=1.0)
    r = assess_breakaway(t, y, u, noise_std=0.0, min_change=1e-4)
    assert r.deadband is not None and 2.0 <= r.deadband <= 2.3  # moved at output 3 = bias + 2


def test_breakaway_never_moves() -> None:
    t, y, u = ramp_run(deadband=20.0, rate=1.0, noise=0.002)
    r = assess_breakaway(t, y, u, noise_std=0.002)
    assert r.deadband is None and "did not move" in r.message
    r = assess_breakaway([], [], [], noise_std=0.1)
    assert r.deadband is None


# ---------------------------------------------------------------------------------- profiles
def test_direction_pulse_profile() -> None:
    assert direction_pulse(-0.1, 5.0, 0.2, bias=1.0) == 1.0
    assert direction_pulse(0.0, 5.0, 0.2, bias=1.0) == 6.0
    assert direction_pulse(0.19, 5.0, 0.2, bias=1.0, sign=-1) == -4.0
    assert direction_pulse(0.2, 5.0, 0.2, bias=1.0) == 1.0


def test_breakaway_ramp_profile() -> None:
    assert breakaway_ramp(-1.0, 2.0, 5.0) == 0.0
    assert breakaway_ramp(1.0, 2.0, 5.0, bias=1.0) == 3.0
    assert breakaway_ramp(1.0, 2.0, 5.0, sign=-1) == -2.0
    assert breakaway_ramp(10.0, 2.0, 5.0) == 5.0
    assert breakaway_ramp_duration(2.0, 5.0) == 2.5
    with pytest.raises(ValueError):
        breakaway_ramp_duration(0.0, 5.0)


# ---------------------------------------------------------------------------------- two ramps
def _ramp(rate: float, seed: int, sign: int, num, den, delay, deadband, noise, res, stop):
    from mock_device.plant import Actuator, LtiPlant, Sensor

    dt = 0.01
    plant = LtiPlant(num, den, delay, max_step=dt)
    sensor = Sensor(noise, res, rng=np.random.default_rng(seed))
    act = Actuator(100.0, deadband)
    t, y = [], []
    for k in range(3000):
        yk = sign * sensor.read(plant.y)
        t.append(k * dt)
        y.append(yk)
        if yk > stop:
            break
        plant.advance(act.apply(sign * rate * k * dt), dt)
    return np.array(t), np.array(y)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_deadband_from_two_ramps_integrating_with_lag_and_delay(seed: int) -> None:
    """mast-pan-like loop, dead zone 3: the estimate is within 0.3 (10%) of the truth, where the
    first-motion reading is an upper bound well above it. Exact in the noise-free limit
    (analytic: the two ramp responses are time-shifted copies past the dead zone)."""
    from autotune.core.prechecks import assess_breakaway, deadband_from_two_ramps

    args = ([0.9], [0.25, 1.0, 0.0], 0.06, 3.0, 0.03, 360 / 4096)
    ta, ya = _ramp(5.0, seed, +1, *args, stop=1.0)
    tb, yb = _ramp(10.0, seed + 50, -1, *args, stop=2.0)
    rep = deadband_from_two_ramps(ta, ya, 5.0, tb, yb, 10.0, level_min=0.27, level_max=0.8)
    assert rep.deadband == pytest.approx(3.0, abs=0.3)
    bound = assess_breakaway(ta, ya, 5.0 * ta, 0.03, min_change=0.18)
    assert bound.deadband is not None and bound.deadband > rep.deadband


def test_deadband_from_two_ramps_noise_free_exact_and_zero() -> None:
    from autotune.core.prechecks import deadband_from_two_ramps

    for db in (0.0, 2.0):
        args = ([0.25], [0.048, 0.68, 1.0], 0.05, db, 0.0, 0.0)
        ta, ya = _ramp(5.0, 0, +1, *args, stop=0.6)
        tb, yb = _ramp(10.0, 0, -1, *args, stop=1.2)
        rep = deadband_from_two_ramps(ta, ya, 5.0, tb, yb, 10.0, level_min=0.1, level_max=0.5)
        assert rep.deadband == pytest.approx(db, abs=0.02)


def test_significant_drift_ignores_a_slope_that_is_only_noise() -> None:
    # Statistics (least-squares slope standard error = sigma / sqrt(sum (t - tmean)^2)); a 3-sigma
    # test is common practice, no source. Ten noisy samples with no trend: the slope is noise.
    rng = np.random.default_rng(7)
    t = np.arange(10) * 0.1
    noisy = assess_rest(t, rng.normal(0.0, 0.05, t.size), np.zeros(t.size))
    assert abs(noisy.drift) > 0.0
    assert noisy.significant_drift == 0.0
    # A real drift of 0.5 PV units/s (a load on an integrating loop) stands far above the noise.
    drifting = assess_rest(t, 0.5 * t + rng.normal(0.0, 0.005, t.size), np.zeros(t.size))
    assert drifting.significant_drift == pytest.approx(0.5, rel=0.05)


def test_rest_noise_of_a_quantised_sensor_keeps_its_flicker() -> None:
    """Gaussian noise of 0.02 read through a 0.05 quantiser rests mostly on one level (its
    median absolute deviation is about zero): the flicker by one count is the sensor's noise
    and stays in the estimate (about 0.021 here, computed from the samples themselves), and
    spikes of 20 counts are still set aside."""
    rng = np.random.default_rng(5)
    t = np.arange(1000) * DT
    pv = quantise(rng.normal(0, 0.02, t.size), 0.05)
    clean = float(np.std(pv, ddof=2))
    pv[::97] += 1.0
    r = assess_rest(t, pv, np.zeros(t.size))
    assert clean > 0.01
    assert r.noise_std == pytest.approx(clean, rel=0.1)
