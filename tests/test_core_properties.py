"""Property tests (hypothesis) for the relay and safety-guard state machines.

For any sample sequence: every output lies within the output limit; a limit violation is always
reported by the guard, at the sample where it happens, and always ends the experiment with
end_reason "limit:<which>" and zero output from then on.
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import event, given, settings
from hypothesis import strategies as st

from autotune.core.relay import Relay, RelayExperiment, RelaySettings
from autotune.core.safety import SafetyGuard, SafetyLimits
from tests.relaysim import make_plan

finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)
any_pv = st.one_of(finite, finite, finite, st.sampled_from([math.nan, math.inf, -math.inf]))
positive = st.floats(min_value=1e-3, max_value=1e3)
small = st.floats(min_value=-5.0, max_value=5.0)
near_pv = st.one_of(small, small, small, small, small, small, any_pv)  # mostly around the centre


@st.composite
def relay_settings(draw, limit: float = 1e3, centre=small) -> RelaySettings:
    """Any relay settings whose bias lies inside +/- limit (the amplitude may exceed it)."""
    return RelaySettings(centre=draw(centre),
                         bias=limit * draw(st.floats(min_value=-0.99, max_value=0.99)),
                         amplitude=draw(positive),
                         hysteresis=draw(st.floats(min_value=0.0, max_value=2.0)),
                         asymmetry=draw(st.floats(min_value=-0.9, max_value=0.9)))


@st.composite
def limit_and_settings(draw) -> tuple[float, RelaySettings]:
    limit = draw(positive)
    return limit, draw(relay_settings(limit))


interval = st.one_of(st.floats(min_value=1e-3, max_value=1.0), st.floats(min_value=1e-3, max_value=1.0),
                     st.floats(min_value=1e-3, max_value=1.0), st.sampled_from([0.0, -0.5]))


@st.composite
def samples(draw, pv=any_pv, min_size=1, max_size=80):
    """(t, pv, out) samples; t mostly increasing by 1 ms .. 1 s, now and then a repeated time or a
    step back (device reset, corrupt sample)."""
    t0 = draw(st.floats(min_value=0.0, max_value=100.0))
    out_value = st.one_of(small, small, small, small, finite, st.just(math.nan))
    rows = draw(st.lists(st.tuples(interval, pv, out_value), min_size=min_size,
                         max_size=max_size))
    out, t = [], t0
    for i, (dt, p, u) in enumerate(rows):
        t = t + dt if i else t
        out.append((t, p, u))
    return out


@st.composite
def oscillation(draw, centre: float = 0.0):
    """A noisy sine around `centre` sampled every 1-50 ms: the relay sees real cycles (noise
    may cause extra switches), with a rare corrupt sample."""
    n = draw(st.integers(min_value=50, max_value=600))
    dt = draw(st.floats(min_value=1e-3, max_value=0.05))
    amp = draw(st.floats(min_value=0.01, max_value=5.0))
    period = draw(st.floats(min_value=10 * dt, max_value=100 * dt))
    noise = draw(st.floats(min_value=0.0, max_value=0.5)) * amp
    offset = draw(st.floats(min_value=-1.0, max_value=1.0)) * amp
    rng = np.random.default_rng(draw(st.integers(min_value=0, max_value=2**32 - 1)))
    t = np.arange(n) * dt
    pv = centre + offset + amp * np.sin(2 * np.pi * t / period) + rng.normal(0, noise + 1e-12, n)
    if draw(st.booleans()):
        pv[draw(st.integers(min_value=0, max_value=n - 1))] = draw(
            st.sampled_from([math.nan, math.inf, 1e6]))
    out = rng.uniform(-1.0, 1.0, n)
    return [(float(a), float(b), float(c)) for a, b, c in zip(t, pv, out, strict=True)]


def reference_violation(limits: SafetyLimits, pv_start: float, t_start: float, seq):
    """Independent statement of the limits: index and kind of the first broken one, or None."""
    prev = None
    for i, (t, pv, out) in enumerate(seq):
        broken = []
        if prev is not None:
            dt = t - prev[0]
            if not dt > 0 or (limits.max_sample_gap is not None and dt > limits.max_sample_gap):
                broken.append("sample_gap")
        if not abs(pv - pv_start) <= limits.pv_window:
            broken.append("pv_window")
        if (prev is not None and limits.pv_rate_limit is not None and t > prev[0]
                and not abs((pv - prev[1]) / (t - prev[0])) <= limits.pv_rate_limit):
            broken.append("pv_rate")
        if not abs(out) <= limits.output_limit * (1 + 1e-6):
            broken.append("output")
        if limits.max_duration is not None and t - t_start > limits.max_duration:
            broken.append("duration")
        if broken:
            return i, broken
        prev = (t, pv)
    return None


limits_strategy = st.builds(
    SafetyLimits,
    output_limit=st.floats(min_value=0.1, max_value=500.0),
    pv_window=st.floats(min_value=0.1, max_value=500.0),
    pv_rate_limit=st.one_of(st.none(), st.floats(min_value=0.1, max_value=1e4)),
    max_duration=st.one_of(st.none(), st.floats(min_value=0.1, max_value=20.0)),
    max_sample_gap=st.one_of(st.none(), st.floats(min_value=0.01, max_value=2.0)),
)


@settings(max_examples=200, deadline=None)
@given(s=relay_settings(), limit=positive, seq=samples(pv=near_pv))
def test_relay_output_always_within_limit(s: RelaySettings, limit: float, seq) -> None:
    r = Relay(s, limit)
    for t, pv, _ in seq:
        u = r.update(t, pv)
        assert math.isfinite(u) and abs(u) <= limit
        assert u in s.levels(limit)
        assert r.state in (1, -1)


@settings(max_examples=150, deadline=None)
@given(ls=limit_and_settings(), seq=st.one_of(samples(pv=near_pv), oscillation()),
       target=st.floats(min_value=0.01, max_value=10.0), window=st.one_of(st.none(), positive), stall=st.one_of(st.none(), positive))
def test_experiment_output_always_within_limit(ls, seq, target, window, stall) -> None:
    limit, s = ls
    plan = make_plan(target_amplitude=target, pv_window=window, stall_time=stall, max_cycles=5,
                     settle_cycles=1)
    exp = RelayExperiment(plan, s, limit)
    done_at = None
    for i, (t, pv, _) in enumerate(seq):
        step = exp.update(t, pv)
        assert math.isfinite(step.output) and abs(step.output) <= limit
        new = step.new_settings
        if new is not None:  # fits the limit without clamping
            assert new.amplitude <= new.max_amplitude(limit) * (1 + 1e-9) + 1e-12
        if step.done and done_at is None:
            done_at = i
            assert step.end_reason is not None
        if done_at is not None:
            assert step.done and step.output == 0.0
    event(f"cycles={min(len(exp.cycles), 3)} adjustments={min(exp.adjustments, 2)} "
          f"end={exp.end_reason}")


@settings(max_examples=150, deadline=None)
@given(ls=limit_and_settings(), seq=st.one_of(samples(pv=near_pv), oscillation()),
       target=st.floats(min_value=0.01, max_value=10.0))
def test_device_loop_settings_stay_within_limit(ls, seq, target) -> None:
    """Whatever the board reports, every setting the host asks for fits the output limit
    (amplitude raises and bias moves never push a level past it)."""
    limit, s = ls
    plan = make_plan(target_amplitude=target, max_cycles=5, settle_cycles=1, stall_time=0.5)
    exp = RelayExperiment(plan, s, limit)
    for t, pv, out in seq:
        step = exp.observe(t, pv, out)
        new = step.new_settings
        if new is not None:
            assert new.amplitude <= new.max_amplitude(limit) * (1 + 1e-9) + 1e-12
        if step.done:
            assert step.output == 0.0
            assert exp.observe(t + 1.0, pv, out).output == 0.0


@settings(max_examples=200, deadline=None)
@given(limits=limits_strategy, pv_start=small,
       seq=st.one_of(samples(pv=near_pv), oscillation()))
def test_guard_reports_first_violation(limits, pv_start, seq) -> None:
    t_start = seq[0][0]
    g = SafetyGuard(limits, pv_start=pv_start, t_start=t_start)
    expected = reference_violation(limits, pv_start, t_start, seq)
    event(f"violation={expected[1][0] if expected else None}")
    event(f"also broken={expected[1][1:] if expected else None}")
    first = None
    for i, (t, pv, out) in enumerate(seq):
        v = g.check(t, pv, out)
        if first is None and v is not None:
            first = (i, v)
        if first is not None:
            assert v is first[1]  # latched
    if expected is None:
        assert first is None
    else:
        assert first is not None
        i, v = first
        assert i == expected[0]
        assert v.which == expected[1][0]  # precedence: the first in LIMIT_NAMES order
        assert v.reason == f"limit:{v.which}" and v.message


@settings(max_examples=200, deadline=None)
@given(limits=limits_strategy, s=relay_settings(limit=0.1),
       seq=st.one_of(samples(pv=near_pv), oscillation()), host=st.booleans())
def test_violation_always_stops_the_experiment(limits, s, seq, host) -> None:
    t_start = seq[0][0]
    pv_start = s.centre
    guard = SafetyGuard(limits, pv_start=pv_start, t_start=t_start)
    plan = make_plan(target_amplitude=1.0, max_cycles=10_000, settle_cycles=1)
    exp = RelayExperiment(plan, s, limits.output_limit, guard=guard)
    # the reference sees the outputs the guard sees: host loop, the relay's own (never beyond
    # the limit); device loop, the reported ones
    seen = []
    stopped_at = None
    for i, (t, pv, out) in enumerate(seq):
        if host:
            step = exp.update(t, pv)
            seen.append((t, pv, 0.0))  # the relay's own output: within the limit (see above)
        else:
            step = exp.observe(t, pv, out)
            seen.append((t, pv, out))
        if stopped_at is None and step.done:
            stopped_at = i
        if stopped_at is not None:
            assert step.done and step.output == 0.0
    expected = reference_violation(limits, pv_start, t_start, seen)
    event(f"host={host} end={exp.end_reason} violation={expected is not None}")
    if expected is not None and (stopped_at is None or stopped_at >= expected[0]):
        # nothing else ended it earlier: the violation must have, at that very sample
        assert stopped_at == expected[0]
        assert exp.end_reason == f"limit:{expected[1][0]}"
        assert exp.violation is not None and guard.violation is exp.violation
        assert [e.kind for e in exp.events][-2:] == ["limit", "end"]
    if exp.end_reason is not None and exp.end_reason.startswith("limit:"):
        assert expected is not None and stopped_at == expected[0]
