"""Tests for autotune.core.model: exact sampled responses and the low-order model fit."""

from __future__ import annotations

import control  # python-control: the outside reference for sampled (ZOH) responses
import numpy as np
import pytest

from autotune.core.lti import DelayedTF, fopdt, integrator_lag, sopdt
from autotune.core.model import (
    _modes,
    cascade_response,
    fit_models,
    modal_response,
    sampled_response,
)

RNG = np.random.default_rng(7)
U = np.repeat(RNG.uniform(-1.0, 1.0, 60), 13)


def _control_zoh(num, den, ticks_delay: int, u, dt):
    # Reference: python-control control.sample_system(sys, dt, 'zoh') and forced_response of
    # the discrete system; a whole-tick dead time is an input shift.
    sysd = control.sample_system(control.tf(num, den), dt, method="zoh")
    resp = control.forced_response(sysd, T=np.arange(u.size) * dt, U=u)
    y = np.asarray(resp.outputs).ravel()
    return np.concatenate([np.zeros(ticks_delay), y[: u.size - ticks_delay]])


@pytest.mark.parametrize("num,den", [([2.0], [1.3, 1.0]), ([1.0], [0.6, 1.7, 1.0]),
                                     ([0.5], [0.4, 1.0, 0.0]), ([-1.0, 1.0], [1, 3, 3, 1])])
def test_sampled_response_matches_python_control_zoh(num, den):
    dt, m = 0.01, 7
    y = sampled_response(DelayedTF(num, den, m * dt), U, dt)
    ref = _control_zoh(num, den, m, U, dt)
    assert np.max(np.abs(y - ref)) < 1e-9 * max(1.0, np.max(np.abs(ref)))


@pytest.mark.parametrize("tf,kind,shape", [
    (fopdt(1.0, 1.3, 0.537), "fopdt", {"time_constant": 1.3}),
    (sopdt(1.0, 2.0, 0.3, 0.0137), "sopdt", {"t1": 2.0, "t2": 0.3}),
    (integrator_lag(1.0, 0.4, 0.253), "integrator_lag", {"time_constant": 0.4}),
])
def test_modal_response_matches_exact_zoh_with_fractional_delay(tf, kind, shape):
    # Reference: DelayedTF.simulate_zoh (matrix-exponential ZOH, fractional dead time); and
    # python-control for the whole-tick part of the delay (checked above).
    poles, res = _modes(kind, shape)
    y = modal_response(poles, res, tf.delay, U, 0.01)
    ref = tf.simulate_zoh(U, 0.01)
    assert np.max(np.abs(y - ref)) < 1e-10 * np.max(np.abs(ref))
    assert np.max(np.abs(sampled_response(tf, U, 0.01) - ref)) < 1e-9 * np.max(np.abs(ref))


@pytest.mark.parametrize("true,kind", [
    (fopdt(2.0, 1.5, 0.42), "fopdt"),
    (sopdt(0.8, 2.0, 0.5, 0.31), "sopdt"),
    (integrator_lag(0.7, 0.6, 0.37), "integrator_lag"),
])
def test_fit_recovers_parameters_of_a_known_plant(true, kind):
    # The record is the exact sampled response (DelayedTF.simulate_zoh) to a relay-like
    # square wave plus an output offset; the fit must return the generating parameters.
    dt = 0.01
    u = np.where((np.arange(3000) // 170) % 2 == 0, 1.0, -1.0)
    u[:30] = 0.0
    y = true.simulate_zoh(u, dt) + 3.0
    w1 = 2 * np.pi / (340 * dt)
    phase1 = float(true.phase(w1))
    fit = fit_models(np.arange(u.size) * dt, y, u, ts=dt, w1=w1, phase1=phase1, fit_from=0,
                     candidates=(kind,))
    assert fit.kind == kind
    got, want = fit.tf, true
    assert got.delay == pytest.approx(want.delay, rel=1e-4, abs=1e-6)
    w = np.array([0.3, 1.0, 3.0]) * w1
    assert np.allclose(got.freq_response(w), want.freq_response(w), rtol=1e-4)
    assert fit.candidates[kind].offset == pytest.approx(3.0, abs=1e-6)


def test_best_candidate_wins_on_an_integrating_record():
    dt = 0.01
    true = integrator_lag(0.7, 0.6, 0.37)
    u = np.where((np.arange(2500) // 150) % 2 == 0, 1.0, -1.0)
    u[:30] = 0.0
    y = true.simulate_zoh(u, dt)
    w1 = 2 * np.pi / (300 * dt)
    fit = fit_models(np.arange(u.size) * dt, y, u, ts=dt, w1=w1, phase1=float(true.phase(w1)))
    assert fit.kind == "integrator_lag"
    assert fit.residual < 1e-6 * np.ptp(y)
    # an exact fit ends the search: the richer candidates after it are not tried
    assert set(fit.candidates) == {"fopdt", "integrator_lag"}
    assert fit.candidates["fopdt"].residual > 1e3 * fit.residual


@pytest.mark.parametrize("tcs,delay", [([0.7] * 5, 0.1234), ([1.0] * 8, 0.0),
                                        ([1.0, 0.5, 0.25, 0.125], 0.057)])
def test_cascade_response_matches_exact_zoh(tcs, delay):
    # Reference: DelayedTF.simulate_zoh (matrix exponential of the companion form); the
    # equal-lag path uses the closed-form (incomplete gamma) discretisation.
    den = np.array([1.0])
    for tc in tcs:
        den = np.polymul(den, [tc, 1.0])
    ref = DelayedTF((1.0,), tuple(den), delay).simulate_zoh(U, 0.01)
    y = cascade_response(tcs, delay, U, 0.01)
    assert np.max(np.abs(y - ref)) < 1e-10 * np.max(np.abs(ref))
