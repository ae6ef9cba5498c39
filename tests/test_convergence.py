"""The one convergence test (autotune.core.convergence): what the measurement can resolve, and
when a relay oscillation counts as settled."""

from __future__ import annotations

import math
from dataclasses import dataclass

import pytest

from autotune.core.convergence import (
    cycle_amplitude,
    cycles_to_converge,
    measurement_tolerances,
    steady_converged,
    switch_jitter,
)


@dataclass
class C:
    period: float
    amplitude_pp: float
    amplitude_h1: float = 0.0
    samples: int = 0


def test_switch_jitter_is_the_noise_over_the_slope() -> None:
    # analytic: a sinusoid of peak a and period P crosses zero with slope 2 pi a / P, so a PV
    # error of std s moves the crossing by s P / (2 pi a); a tick rounds it uniformly
    assert switch_jitter(1.0, 2 * math.pi, 0.0, noise_std=0.1) == pytest.approx(0.1)
    assert switch_jitter(2.0, 2 * math.pi, 0.0, noise_std=0.1) == pytest.approx(0.05)
    assert switch_jitter(1.0, 1.0, tick=0.012) == pytest.approx(0.012 / math.sqrt(12))
    # quantisation: uniform error of std q / sqrt(12)
    assert switch_jitter(1.0, 2 * math.pi, resolution=0.12) == pytest.approx(0.12 /
                                                                             math.sqrt(12))


def test_tolerances_grow_with_noise_and_shrink_with_averaging() -> None:
    t1 = measurement_tolerances(1.0, 1.0, noise_std=0.02, cycles_per_reading=1)
    t2 = measurement_tolerances(1.0, 1.0, noise_std=0.02, cycles_per_reading=2)
    assert t1[0] == pytest.approx(2 * t2[0])
    assert t1[1] == t2[1] == pytest.approx(0.04)  # 2 x noise over the swing
    assert measurement_tolerances(1.0, 1.0, tick=0.05)[0] >= 0.05  # at least one tick
    assert measurement_tolerances(0.0, 1.0) == (math.inf, math.inf)


def test_the_transient_cycle_is_left_out_and_two_steady_ones_suffice() -> None:
    transient = C(1.5, 3.0)
    steady = [C(1.0, 2.0), C(1.0, 2.0)]
    assert steady_converged([transient, *steady], 0.02)
    assert not steady_converged([transient, steady[0]], 0.02)  # one steady cycle only
    assert not steady_converged(steady, 0.02, min_cycles=2)  # the first counts as transient
    assert steady_converged(steady, 0.02, skip_first=False)
    assert not steady_converged([transient, *steady], 0.02, min_cycles=3)


def test_a_trend_or_a_jump_is_not_settled() -> None:
    growing = [C(1.0, 1.0 + 0.1 * k) for k in range(6)]
    assert not steady_converged(growing, 0.02)
    jumpy = [C(0.5, 1.0), C(0.5, 1.0), C(0.6, 1.0), C(0.6, 1.0)]
    assert not steady_converged(jumpy, 0.02, tick=0.01, resolution=0.05)


def test_the_tolerance_widens_to_what_the_sensor_resolves() -> None:
    # a 5% amplitude wobble on a 1.0 swing is within one 0.05 quantisation step
    wobble = [C(0.52, 1.0), C(0.52, 1.0), C(0.53, 0.95), C(0.52, 0.95)]
    assert not steady_converged(wobble, 0.02)
    assert steady_converged(wobble, 0.02, tick=0.01, resolution=0.05)


def test_first_harmonic_amplitude_is_used_where_measured() -> None:
    # the peak-to-peak readings jump by 10% (noise on the peaks) while the first harmonic,
    # which averages 200 samples, holds still
    c = [C(1.0, 2.0, 1.0, 200), C(1.0, 2.2, 1.0, 200), C(1.0, 2.0, 1.001, 200)]
    assert cycle_amplitude(c[0]) == pytest.approx(2.0)
    assert steady_converged(c, 0.02)
    assert not steady_converged([C(1.0, 2.0), C(1.0, 2.2), C(1.0, 2.0)], 0.02)


def test_cycles_to_converge_counts_from_the_first() -> None:
    cyc = [C(2.0, 3.0), C(1.3, 2.5), C(1.0, 2.0), C(1.0, 2.0), C(1.0, 2.0)]
    # the transient 2.0 skipped, the last three (up to) must agree: 1.3 spoils it until 5
    assert cycles_to_converge(cyc, 0.02) == 5
    assert cycles_to_converge(cyc[:3], 0.02) is None
