"""Verdict on a confirmation step: the stated spec, every check beside its limit, actions.

The spec under test is the issue's default (common practice, no source): overshoot at most the
prediction plus 5 points and at most 25 %, settled within twice the predicted settling time,
no sustained oscillation (decay ratio below 0.5), at most 0.25 s in saturation.
"""

from __future__ import annotations

import math

import pytest

from autotune.config import config_from_dict, load_config
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
    spec_from_config,
)


def _m(overshoot: float = 5.0, settling: float = 1.0, saturated: float = 0.0, **kw: float) -> StepMetrics:
    base = dict(rise_time=0.3, overshoot=overshoot, settling_time=settling,
                steady_state_error=0.0, iae=0.4, peak_output=10.0, time_saturated=saturated)
    base.update(kw)
    return StepMetrics(**base)


PRED = {"overshoot": 12.0, "settling_time": 2.0}


def test_default_spec_is_the_stated_one() -> None:
    s = StepSpec()
    assert (s.max_overshoot, s.overshoot_margin, s.settling_factor, s.max_time_saturated,
            s.max_decay_ratio, s.settle_band, s.noisy_band) == (25.0, 5.0, 2.0, 0.25, 0.5,
                                                                0.02, 0.05)
    # the config's [spec] table holds the same defaults
    assert spec_from_config(load_config(None)) == s


def test_every_check_is_written_beside_its_limit() -> None:
    v = judge(_m(overshoot=14.0, settling=3.0), predicted=PRED, record=10.0)
    assert v.passed and v.status == "pass" and v.action is Action.ACCEPT
    names = [c.name for c in v.checks]
    assert names == ["overshoot", "settling_time", "oscillation", "time_saturated"]
    os_, st, osc, sat = v.checks
    assert (os_.value, os_.limit) == (14.0, pytest.approx(17.0))  # predicted 12 + 5 < 25
    assert "predicted 12 % + 5 points" in os_.basis
    assert (st.value, st.limit) == (3.0, pytest.approx(4.0))  # 2 x predicted 2 s
    assert "2 x predicted 2 s" in st.basis and "2 % band" in st.basis
    assert osc.limit == 0.5 and sat.limit == 0.25
    d = v.to_dict()
    assert d["spec"]["max_overshoot"] == 25.0
    assert all({"value", "limit", "status", "basis"} <= set(c) for c in d["checks"])


def test_overshoot_limit_is_the_tighter_of_prediction_plus_margin_and_the_cap() -> None:
    v = judge(_m(overshoot=24.0), predicted={"overshoot": 22.0, "settling_time": 2.0})
    c = v.check("overshoot")
    assert c is not None and c.limit == pytest.approx(25.0) and c.status == "pass"
    v = judge(_m(overshoot=18.0), predicted=PRED)
    c = v.check("overshoot")
    assert c is not None and c.status == "fail" and c.limit == pytest.approx(17.0)
    assert not v.passed and v.action is Action.DETUNE and "overshoot 18" in v.reason


def test_no_spec_does_not_mean_pass() -> None:
    """The old default (no limits) passed 40 % overshoot; the default spec does not."""
    v = judge(_m(overshoot=40.0), None, predicted={"overshoot": 38.0, "settling_time": 2.0})
    assert not v.passed and v.action is Action.DETUNE
    assert v.check("overshoot").limit == pytest.approx(25.0)  # type: ignore[union-attr]


def test_settling_limit_twice_the_prediction() -> None:
    v = judge(_m(overshoot=1.0, settling=4.5), predicted={"overshoot": 0.5, "settling_time": 2.0})
    assert v.action is Action.TRY_OTHER  # slow and well damped: a livelier design
    v = judge(_m(overshoot=15.0, settling=4.5), predicted={"overshoot": 14.0, "settling_time": 2.0})
    assert v.action is Action.DETUNE  # slow and ringing


def test_not_settled_within_a_long_enough_record_fails() -> None:
    v = judge(_m(settling=math.nan), predicted=PRED, settled=False, record=6.0)
    c = v.check("settling_time")
    assert c is not None and c.status == "fail" and "not settled within the 6 s record" in c.message
    assert v.action is not Action.REPEAT


def test_not_judged_never_reads_as_pass() -> None:
    # nothing measured
    v = judge(_m(overshoot=math.nan), predicted=PRED)
    assert not v.passed and v.status == "not judged" and v.action is Action.REPEAT
    assert v.check("overshoot").status == "not judged"  # type: ignore[union-attr]
    # the record ended before the settling limit (capped by the powered time)
    v = judge(_m(settling=math.nan), predicted=PRED, settled=False, record=3.0)
    assert not v.passed and v.status == "not judged"
    assert "ended before the limit" in v.reason
    # noise above even the noisy band
    v = judge(_m(), predicted=PRED, band_judged=False, band_note="noise exceeds the 5 % band")
    assert not v.passed and v.check("settling_time").status == "not judged"  # type: ignore[union-attr]


def test_without_a_prediction_the_limits_say_what_they_are() -> None:
    v = judge(_m(overshoot=20.0, settling=3.0), record=8.0)
    os_, st = v.check("overshoot"), v.check("settling_time")
    assert os_ is not None and os_.limit == 25.0 and os_.basis == "at most 25 %"
    assert st is not None and st.limit == 8.0 and "no predicted settling time" in st.basis
    assert v.passed


def test_oscillation_is_named_with_its_period_and_never_repeated() -> None:
    osc = {"period": 2.69, "decay_ratio": 0.61, "cause": "successive swings"}
    v = judge(_m(overshoot=90.0, settling=math.nan), predicted=PRED, settled=False,
              record=5.9, oscillation=osc)
    assert v.status == "oscillating" and not v.passed
    assert v.reason == "oscillating (period 2.69 s): detune"
    assert v.action is Action.DETUNE and v.oscillation == {"period": 2.69, "decay_ratio": 0.61}
    c = v.check("oscillation")
    assert c is not None and c.status == "fail" and c.value == 0.61 and c.limit == 0.5
    # the same step without the oscillation record would not be "repeat" either
    v2 = judge(_m(overshoot=90.0, settling=math.nan), predicted=PRED, settled=False, record=30.0)
    assert v2.action is Action.DETUNE


def test_a_damped_decay_ratio_passes() -> None:
    v = judge(_m(), predicted=PRED, decay_ratio=0.2)
    c = v.check("oscillation")
    assert c is not None and c.status == "pass" and "0.20 < 0.5" in c.message


def test_saturation_asks_to_detune() -> None:
    v = judge(_m(saturated=0.4), predicted=PRED)
    assert v.action is Action.DETUNE and "time saturated" in v.reason


def test_switched_off_checks_are_listed_and_do_not_block() -> None:
    spec = StepSpec(max_overshoot=None, overshoot_margin=None, max_time_saturated=None)
    v = judge(_m(overshoot=60.0), spec, predicted=PRED)
    assert v.passed and v.check("overshoot").status == "off"  # type: ignore[union-attr]
    assert v.check("time_saturated").status == "off"  # type: ignore[union-attr]


def test_users_design_limits_bind_the_step() -> None:
    cfg = config_from_dict({"design": {"max_overshoot": 10.0, "max_settling_time": 3.0},
                            "spec": {"overshoot_margin": 2.0}})
    s = spec_from_config(cfg)
    assert (s.max_overshoot, s.max_settling_time, s.overshoot_margin) == (10.0, 3.0, 2.0)
    v = judge(_m(overshoot=9.0, settling=3.5), s, predicted={"overshoot": 8.0,
                                                               "settling_time": 2.0})
    assert v.check("overshoot").limit == pytest.approx(10.0)  # type: ignore[union-attr]
    assert v.check("settling_time").limit == pytest.approx(3.0)  # type: ignore[union-attr]
    assert not v.passed


def test_compare_rows_hold_difference_relative_and_label() -> None:
    rows = {r.name: r for r in compare(_m(overshoot=12.0, settling=2.0),
                                      {"overshoot": 10.0, "settling_time": 2.5, "ms": 1.4},
                                      {"settling_time": "5 % band"})}
    assert rows["overshoot"].difference == pytest.approx(2.0)
    assert rows["overshoot"].relative == pytest.approx(0.2)
    assert rows["settling_time"].difference == pytest.approx(-0.5)
    assert rows["settling_time"].label == "5 % band"
    # Unknown prediction -> no difference; the row is still shown.
    assert rows["steady_state_error"].predicted is None
    assert rows["steady_state_error"].difference is None
    assert "ms" not in rows  # not a step figure
    text = format_comparison(list(rows.values()))
    assert "overshoot (%)" in text and "-0.5" in text and "[5 % band]" in text


def test_nan_figures_become_none() -> None:
    rows = {r.name: r for r in compare(_m(settling=math.nan), None)}
    assert rows["settling_time"].measured is None


def test_spec_rejects_nonsense() -> None:
    with pytest.raises(ValueError):
        StepSpec(settle_band=0.0)
    with pytest.raises(ValueError):
        StepSpec(settle_band=0.05, noisy_band=0.02)


def test_detune_scales_every_gain_and_keeps_ti_td() -> None:
    g = detune(PidGains(2.0, 4.0, 0.5))
    assert DEFAULT_DETUNE == 0.7
    assert (g.kp, g.ki, g.kd) == pytest.approx((1.4, 2.8, 0.35))
    assert g.kp / g.ki == pytest.approx(2.0 / 4.0)
    with pytest.raises(ValueError):
        detune(PidGains(1.0), 1.2)
