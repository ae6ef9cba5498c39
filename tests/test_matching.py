"""Per-loop gains that make two wheel loops alike (autotune.core.matching).

Outside references: python-control 0.10. Rise times: control.step_info (10 % to 90 %) of the
closed loop built with control.tf, the plant's dead time plus half a tick (the zero-order
hold's delay, the usual continuous stand-in for a sampled loop; from memory) as a 10th-order
Padé approximant (control.pade), the PID continuous (kp + ki/s on the setpoint weighted by b,
the derivative kd s/(1 + Tf s) on the measurement only), stepped on a 0.5 ms grid. Ms: the
sampled loop of tests/pctruth.py (ZOH plant, the DiscretePid), max |1/(1 + L)| from
control.frequency_response.

Wheel models: INVENTED DEMO DATA (the drive-base scenario's two wheels,
mock_device/scenarios/drive-base.toml, and spread variants of them).
"""

from __future__ import annotations

import math

import control  # python-control, the outside reference
import numpy as np
import pytest

from autotune.core.design import Condition, DesignSpec
from autotune.core.lti import DelayedTF
from autotune.core.matching import RISE_MATCH, MatchResult, match_rise_times, rise_spread
from autotune.core.pid import PidGains
from tests.pctruth import sampled_ms

TS = 0.01
SPEC = DesignSpec(ts=TS, step_size=1.0, output_limit=math.inf)  # linear: the truth is linear
LEFT = DelayedTF((0.30,), (0.027, 0.51, 1.0), 0.04)  # drive-base.toml, axis 0
RIGHT = DelayedTF((0.285,), (0.0312, 0.545, 1.0), 0.04)  # drive-base.toml, axis 1
# the left wheel with its time constants 30 % longer and 20 % less gain (a worn gearbox)
SLOW30 = DelayedTF((0.24,), (0.027 * 1.3**2, 0.51 * 1.3, 1.0), 0.04)
# the left wheel with half the gain (a weaker motor)
WEAK = DelayedTF((0.15,), (0.027, 0.51, 1.0), 0.04)
# a far slower, laggier drive: no gentle design of the left wheel rises this slowly
SLUGGISH = DelayedTF((0.30,), (0.6, 3.2, 1.0), 0.25)

PAIRS = {"drive-base": (LEFT, RIGHT), "30% slower": (LEFT, SLOW30), "half gain": (WEAK, RIGHT)}


def _pc_rise_time(plant: DelayedTF, g: PidGains, b: float, n: float = 10.0) -> float:
    """10-90 % rise time (s) of the setpoint step, python-control (see the module docstring)."""
    pn, pd = control.pade(plant.delay + TS / 2, 10)
    p = control.tf(plant.num, plant.den) * control.tf(pn, pd)
    s = control.tf([1.0, 0.0], [1.0])
    c_r = b * g.kp + g.ki / s
    c_y = g.kp + g.ki / s
    if g.kd:
        tf_ = g.kd / (g.kp * n)
        c_y = c_y + g.kd * s / (1 + tf_ * s)
    closed = control.minreal(control.feedback(p, c_y) * c_r, verbose=False)
    t = np.arange(0.0, 6.0, 0.0005)
    _, y = control.step_response(closed, T=t)
    return float(control.step_info(np.ravel(y), t, yfinal=1.0)["RiseTime"])


def _match(a: DelayedTF, b: DelayedTF) -> MatchResult:
    return match_rise_times([Condition("left", a), Condition("right", b)], SPEC)


@pytest.fixture(scope="module")
def matches() -> dict[str, MatchResult]:
    return {k: _match(*pair) for k, pair in PAIRS.items()}


@pytest.mark.parametrize("pair", list(PAIRS))
def test_matched_rise_times_agree_per_python_control(matches: dict[str, MatchResult],
                                                     pair: str) -> None:
    res = matches[pair]
    assert res.matched, res.reason
    assert res.spread <= 0.03  # aimed at 2 %: margin inside the 5 %
    plants = dict(zip(("left", "right"), PAIRS[pair], strict=True))
    truth = []
    for lp in res.loops:
        assert lp.proposal is not None and lp.matched
        g = lp.proposal.gains
        t_pc = _pc_rise_time(plants[lp.name], g, lp.proposal.setpoint_weight)
        truth.append(t_pc)
        # the prediction against python-control's continuous stand-in (half-tick hold)
        assert lp.rise_time == pytest.approx(t_pc, rel=0.05)
        # Ms of the sampled loop (python-control) within the loop's target and its tolerance
        ms_pc = sampled_ms(plants[lp.name].num, plants[lp.name].den, plants[lp.name].delay,
                           g, TS)
        assert ms_pc <= SPEC.ms_target + 0.05, (lp.name, ms_pc)
        assert lp.ms <= SPEC.ms_target + 1e-3
        assert lp.ms == pytest.approx(ms_pc, rel=0.02)
    # the matched closed loops, each computed by python-control: rise times within 5 %
    assert rise_spread(truth) <= RISE_MATCH, truth


def test_reference_is_the_slowest_and_keeps_its_own_default(
        matches: dict[str, MatchResult]) -> None:
    res = matches["30% slower"]
    ref = next(lp for lp in res.loops if lp.reference)
    assert ref.name == res.reference == "right"  # the slower wheel
    assert ref.proposal is not None and ref.proposal.name in ("robust-pid", "robust-pi")
    other = next(lp for lp in res.loops if not lp.reference)
    assert other.ms_design < SPEC.ms_target  # slowed: a gentler Ms target
    assert other.rise_time == pytest.approx(res.rise_time, rel=0.03)


def test_impossible_match_says_why() -> None:
    res = _match(LEFT, SLUGGISH)
    assert not res.matched
    assert "cannot be made alike" in res.reason and "left" in res.reason
    assert "even at Ms" in res.reason
    assert res.spread > RISE_MATCH
    # each loop keeps its own default, marked not matched
    assert all(lp.proposal is not None for lp in res.loops)
    assert not next(lp for lp in res.loops if lp.name == "left").matched


def test_rise_spread() -> None:
    assert abs(rise_spread([0.40, 0.42]) - 0.05) < 1e-12  # (0.42 - 0.40) / 0.40, arithmetic
    assert math.isnan(rise_spread([0.4, math.nan]))
