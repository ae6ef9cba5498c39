"""Safety guard (pure): each limit, precedence, latching, messages, gauges."""

from __future__ import annotations

import math

import numpy as np
import pytest

from autotune.core.safety import LIMIT_NAMES, SafetyGuard, SafetyLimits, Violation

LIMITS = SafetyLimits(output_limit=50.0, pv_window=2.0, pv_rate_limit=10.0, max_duration=30.0,
                      max_sample_gap=0.1)


def guard(limits: SafetyLimits = LIMITS, pv_start: float = 5.0, t_start: float = 100.0):
    return SafetyGuard(limits, pv_start=pv_start, t_start=t_start)


def test_limits_validation() -> None:
    for bad in (dict(output_limit=0.0), dict(output_limit=math.inf), dict(pv_window=-1.0),
                dict(pv_window=math.nan), dict(pv_rate_limit=0.0), dict(max_duration=-5.0),
                dict(max_sample_gap=0.0)):
        kw = dict(output_limit=1.0, pv_window=1.0) | bad
        with pytest.raises(ValueError):
            SafetyLimits(**kw)
    off = SafetyLimits(output_limit=1.0, pv_window=1.0, pv_rate_limit=math.inf)
    assert off.pv_rate_limit == math.inf
    with pytest.raises(ValueError):
        SafetyGuard(off, pv_start=math.nan, t_start=0.0)


def test_quiet_run_has_no_violation() -> None:
    g = guard()
    t = 100.0 + np.arange(0, 20, 0.01)
    pv = 5.0 + 1.5 * np.sin(t)  # |rate| <= 1.5 per s, inside the window
    for tk, pk in zip(t, pv, strict=True):
        assert g.check(tk, pk, 49.9) is None
    assert not g.tripped


@pytest.mark.parametrize(("sample", "which", "value"), [
    ((100.02, 7.1, 0.0), "pv_window", 7.1),
    ((100.02, 2.9, 0.0), "pv_window", 2.9),
    ((100.02, 5.3, 0.0), "pv_rate", pytest.approx(30.0)),  # 0.3 in 0.01 s
    ((100.02, 5.0, 50.1), "output", 50.1),
    ((100.02, 5.0, -50.1), "output", -50.1),
    ((100.25, 5.0, 0.0), "sample_gap", pytest.approx(0.24)),
    ((100.01, 5.0, 0.0), "sample_gap", pytest.approx(0.0)),  # time did not advance
    ((99.0, 5.0, 0.0), "sample_gap", pytest.approx(-1.01)),  # time went backwards
])
def test_each_limit_trips(sample: tuple[float, float, float], which: str, value) -> None:
    g = guard()
    assert g.check(100.01, 5.0, 0.0) is None
    v = g.check(*sample)
    assert isinstance(v, Violation)
    assert v.which == which and v.value == value and v.t == sample[0]
    assert v.reason == f"limit:{which}" and which in LIMIT_NAMES
    assert v.message and "\n" not in v.message


def test_duration_trips_after_max_duration() -> None:
    g = guard(SafetyLimits(output_limit=1.0, pv_window=1.0, max_duration=2.0), t_start=10.0)
    assert g.check(12.0, 5.0, 0.0) is None  # exactly at the limit is allowed
    v = g.check(12.5, 5.0, 0.0)
    assert v is not None and v.which == "duration" and v.value == pytest.approx(2.5)
    assert v.limit == 2.0 and "2.5" in v.message


def test_rate_is_over_the_sample_interval_and_a_hard_limit() -> None:
    """A single spike fast enough trips the rate limit (no filtering, by design)."""
    g = guard(SafetyLimits(output_limit=1.0, pv_window=10.0, pv_rate_limit=10.0))
    assert g.check(0.0, 5.0, 0.0) is None
    assert g.check(0.5, 9.9, 0.0) is None  # 4.9 in 0.5 s = 9.8 per s
    v = g.check(0.51, 10.1, 0.0)  # 0.2 in 0.01 s = 20 per s
    assert v is not None and v.which == "pv_rate" and v.value == pytest.approx(20.0)
    g2 = guard(SafetyLimits(output_limit=1.0, pv_window=10.0, pv_rate_limit=10.0))
    g2.check(0.0, 5.0, 0.0)
    v2 = g2.check(0.01, 5.5, 0.0)  # one spike of 0.5 in one 10 ms sample
    assert v2 is not None and v2.which == "pv_rate" and v2.value == pytest.approx(50.0)


def test_first_sample_has_no_rate_or_gap_check() -> None:
    g = guard(t_start=0.0)
    assert g.check(1000.0, 6.9, 0.0) is not None  # 1000 s > max_duration 30 s
    g = guard(t_start=100.0)
    assert g.check(110.0, 6.9, 0.0) is None  # far from t_start and pv_start: only window matters


def test_not_a_number_trips() -> None:
    v = guard().check(100.0, math.nan, 0.0)
    assert v is not None and v.which == "pv_window" and "not a number" in v.message
    v = guard().check(100.0, 5.0, math.nan)
    assert v is not None and v.which == "output"
    v = guard().check(math.nan, 5.0, 0.0)
    assert v is not None and v.which == "sample_gap"
    g = guard()
    g.check(100.0, 5.0, 0.0)
    v = g.check(math.nan, 5.0, 0.0)
    assert v is not None and v.which == "sample_gap"


def test_precedence_when_several_limits_break_at_once() -> None:
    g = guard()
    g.check(100.0, 5.0, 0.0)
    v = g.check(100.5, 9.0, 99.0)  # gap, window, rate and output all broken
    assert v is not None and v.which == "sample_gap"
    g = guard()
    g.check(100.0, 5.0, 0.0)
    v = g.check(100.05, 9.0, 99.0)  # window, rate, output
    assert v is not None and v.which == "pv_window"
    g = guard()
    g.check(100.0, 5.0, 0.0)
    v = g.check(100.05, 6.0, 99.0)  # rate (20 per s) and output
    assert v is not None and v.which == "pv_rate"


def test_latches_first_violation() -> None:
    g = guard()
    g.check(100.0, 5.0, 0.0)
    first = g.check(100.01, 5.0, 60.0)
    assert first is not None and first.which == "output"
    assert g.check(100.02, 5.0, 0.0) is first  # back inside: still reported
    assert g.check(100.03, 9.0, 0.0) is first  # another limit later: the first one stays
    assert g.tripped and g.violation is first


def test_output_allows_float32_rounding_of_the_limit() -> None:
    g = guard(SafetyLimits(output_limit=0.3, pv_window=1.0))
    assert g.check(0.0, 5.0, float(np.float32(0.3))) is None  # 0.30000001192...
    assert g.check(0.01, 5.0, -float(np.float32(0.3))) is None
    assert g.check(0.02, 5.0, 0.3001) is not None


def test_messages_name_values_and_limits() -> None:
    g = guard()
    g.check(100.0, 5.0, 0.0)
    v = g.check(100.01, 7.5, 0.0)
    assert v is not None
    assert "7.5" in v.message and "2" in v.message and "window" in v.message
    d = v.as_dict()
    assert d["reason"] == "limit:pv_window" and d["limit"] == 2.0


def test_disabled_limits() -> None:
    g = SafetyGuard(SafetyLimits(output_limit=1.0, pv_window=100.0, pv_rate_limit=None,
                                 max_duration=None, max_sample_gap=math.inf), 0.0, 0.0)
    assert g.check(0.0, 0.0, 0.0) is None
    assert g.check(1e6, 99.0, 1.0) is None  # huge gap, fast change, long run: all off


def test_gauges() -> None:
    g = guard()
    g.check(100.0, 5.0, 0.0)
    g.check(100.05, 6.0, -25.0)
    gauges = {x.name: x for x in g.gauges()}
    assert set(gauges) == set(LIMIT_NAMES)
    assert gauges["pv_window"].value == pytest.approx(1.0)
    assert gauges["pv_window"].fraction == pytest.approx(0.5)
    assert gauges["output"].fraction == pytest.approx(0.5)
    assert gauges["sample_gap"].value == pytest.approx(0.05)
    assert gauges["duration"].value == pytest.approx(0.05)
    assert gauges["pv_rate"].value == pytest.approx(20.0)  # tripped the rate: 20 > 10
    assert g.violation is not None and g.violation.which == "pv_rate"
