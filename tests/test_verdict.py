"""Verdict on a confirmation step: comparison with the prediction, spec checks, actions."""

from __future__ import annotations

import math

import pytest

from autotune.core.metrics import StepMetrics
from autotune.core.pid import PidGains
from autotune.core.verdict import (
    DEFAULT_DETUNE,
    Action,
    StepSpec,
    compare,
    detune,
    format_comparison,
    judge,
)


def _m(overshoot: float = 5.0, settling: float = 1.0, saturated: float = 0.0, **kw: float) -> StepMetrics:
    base = dict(rise_time=0.3, overshoot=overshoot, settling_time=settling,
                steady_state_error=0.0, iae=0.4, peak_output=10.0, time_saturated=saturated)
    base.update(kw)
    return StepMetrics(**base)


def test_compare_rows_hold_difference_and_relative() -> None:
    rows = {r.name: r for r in compare(_m(overshoot=12.0, settling=2.0),
                                      {"overshoot": 10.0, "settling_time": 2.5, "ms": 1.4})}
    assert rows["overshoot"].difference == pytest.approx(2.0)
    assert rows["overshoot"].relative == pytest.approx(0.2)
    assert rows["settling_time"].difference == pytest.approx(-0.5)
    # Unknown prediction -> no difference; the row is still shown.
    assert rows["steady_state_error"].predicted is None
    assert rows["steady_state_error"].difference is None
    assert "ms" not in rows  # not a step figure
    text = format_comparison(list(rows.values()))
    assert "overshoot (%)" in text and "-0.5" in text


def test_nan_figures_become_none() -> None:
    rows = {r.name: r for r in compare(_m(settling=math.nan), None)}
    assert rows["settling_time"].measured is None


def test_accept_when_spec_met() -> None:
    v = judge(_m(), StepSpec(max_overshoot=10.0, max_settling_time=2.0, max_time_saturated=0.1))
    assert v.passed and v.action is Action.ACCEPT
    assert all(c.passed for c in v.checks) and len(v.checks) == 3


def test_overshoot_over_limit_asks_to_detune() -> None:
    v = judge(_m(overshoot=25.0), StepSpec(max_overshoot=10.0))
    assert not v.passed and v.action is Action.DETUNE
    assert "overshoot 25" in v.reason


def test_saturation_asks_to_detune() -> None:
    v = judge(_m(saturated=0.4), StepSpec(max_time_saturated=0.1))
    assert v.action is Action.DETUNE and "time_saturated" in v.reason


def test_slow_but_damped_asks_for_another_proposal() -> None:
    v = judge(_m(overshoot=0.0, settling=5.0), StepSpec(max_overshoot=10.0, max_settling_time=2.0))
    assert v.action is Action.TRY_OTHER


def test_slow_and_ringing_asks_to_detune() -> None:
    v = judge(_m(overshoot=8.0, settling=5.0), StepSpec(max_overshoot=10.0, max_settling_time=2.0))
    assert v.action is Action.DETUNE


def test_unsettled_step_is_repeated_not_accepted() -> None:
    v = judge(_m(settling=math.nan), StepSpec(max_overshoot=10.0), settled=False)
    assert not v.passed and v.action is Action.REPEAT
    assert "did not settle" in v.reason


def test_no_spec_accepts_a_settled_step() -> None:
    v = judge(_m(), StepSpec(max_time_saturated=None))
    assert v.passed and v.checks == ()


def test_detune_scales_every_gain_and_keeps_ti_td() -> None:
    g = detune(PidGains(2.0, 4.0, 0.5))
    assert DEFAULT_DETUNE == 0.7
    assert (g.kp, g.ki, g.kd) == pytest.approx((1.4, 2.8, 0.35))
    assert g.kp / g.ki == pytest.approx(2.0 / 4.0)
    with pytest.raises(ValueError):
        detune(PidGains(1.0), 1.2)
