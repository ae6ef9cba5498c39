"""DelayedTF against outside references: python-control and closed-form step responses."""

from __future__ import annotations

import control as ct
import numpy as np
import pytest

from autotune.core.lti import DelayedTF, fopdt, integrator_lag, sopdt

PLANTS = [
    fopdt(1.0, 1.0, 0.5),
    sopdt(2.0, 1.0, 0.3, 0.2),
    integrator_lag(1.0, 0.5, 0.2),
    DelayedTF((-1.0, 1.0), (1.0, 3.0, 3.0, 1.0), 0.0),  # (1 - s)/(s + 1)^3, non-minimum phase
    DelayedTF((1.0,), (1.0, 4.0, 6.0, 4.0, 1.0), 0.0),  # 1/(s + 1)^4
]


def _pade_system(g: DelayedTF, order: int = 12) -> ct.TransferFunction:
    rational = ct.tf(list(g.num), list(g.den))
    if g.delay == 0:
        return rational
    num, den = ct.pade(g.delay, order)
    return rational * ct.tf(num, den)


@pytest.mark.parametrize("g", PLANTS)
def test_frequency_response_matches_python_control(g: DelayedTF) -> None:
    # Reference: python-control frequency_response of the rational part, dead time applied exactly.
    w = np.logspace(-2, 1.5, 50)
    resp = ct.frequency_response(ct.tf(list(g.num), list(g.den)), w)
    ref = resp.magnitude * np.exp(1j * resp.phase) * np.exp(-1j * w * g.delay)
    np.testing.assert_allclose(g.freq_response(w), ref, rtol=1e-9)
    # The continuous phase agrees with the complex value modulo 2 pi.
    np.testing.assert_allclose(np.exp(1j * g.phase(w)), ref / np.abs(ref), atol=1e-9)


@pytest.mark.parametrize("g", PLANTS)
def test_ultimate_point_matches_stability_margins(g: DelayedTF) -> None:
    # Reference: python-control stability_margins on a 12th-order Pade approximation of the delay.
    gm, _pm, _sm, wpc, _wgc, _wms = ct.stability_margins(_pade_system(g), returnall=False)
    ku, tu = g.ultimate_point()
    assert ku == pytest.approx(gm, rel=1e-6)
    assert tu == pytest.approx(2 * np.pi / wpc, rel=1e-6)


def test_analytic_ultimate_points() -> None:
    # Analytic: 1/(s+1)^4 reaches -180 deg at w = 1 (45 deg per pole), |G| = 1/4 -> Ku = 4, Tu = 2 pi.
    ku, tu = PLANTS[4].ultimate_point()
    assert ku == pytest.approx(4.0, rel=1e-9) and tu == pytest.approx(2 * np.pi, rel=1e-9)
    # Analytic: a first-order lag without dead time never reaches -180 deg.
    assert fopdt(1.0, 1.0, 0.0).ultimate_point() is None


def test_simulate_zoh_fopdt_step_is_exact() -> None:
    # Analytic step response of K e^{-Ls}/(Ts+1): y = K (1 - exp(-(t - L)/T)) for t > L.
    g, dt = fopdt(2.0, 1.3, 0.5), 0.013  # dead time not a multiple of dt
    t = np.arange(300) * dt
    expected = np.where(t > 0.5, 2.0 * (1 - np.exp(-(t - 0.5) / 1.3)), 0.0)
    np.testing.assert_allclose(g.simulate_zoh(np.ones(300), dt), expected, atol=1e-12)


def test_simulate_zoh_integrating_step_is_exact() -> None:
    # Analytic step response of Kv e^{-Ls}/(s (Ts+1)): y = Kv (t' - T (1 - exp(-t'/T))), t' = t - L.
    g, dt = integrator_lag(1.5, 0.4, 0.27), 0.013
    t = np.arange(300) * dt
    tp = np.maximum(t - 0.27, 0.0)
    expected = 1.5 * (tp - 0.4 * (1 - np.exp(-tp / 0.4)))
    np.testing.assert_allclose(g.simulate_zoh(np.ones(300), dt), expected, atol=1e-12)


def test_simulate_zoh_matches_python_control_sampled_system() -> None:
    # Reference: python-control sample_system (zoh) + forced_response; delay = 3 whole ticks.
    g, dt = sopdt(1.5, 0.7, 0.2, 0.03), 0.01
    rng = np.random.default_rng(1)
    u = np.repeat(rng.uniform(-1, 1, 40), 5)
    sysd = ct.sample_system(ct.tf(list(g.num), list(g.den)), dt, method="zoh")
    ref = ct.forced_response(sysd, U=np.concatenate([np.zeros(3), u[:-3]])).outputs
    np.testing.assert_allclose(g.simulate_zoh(u, dt), ref, atol=1e-10)
