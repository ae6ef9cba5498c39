"""Unit tests of the pure run detectors (autotune/supervise.py) and the relay's spike-robust
switching option (RelayExperiment(confirm_samples=2)). The thresholds are this project's own
choices (common practice, no source); the checks are analytic (counts constructed by hand)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.core.relay import RelayExperiment, RelaySettings
from autotune.core.safety import SafetyGuard, SafetyLimits
from autotune.core.supervise import (
    LinkCounters,
    LinkQualityMonitor,
    ResetMonitor,
    ResponseMonitor,
    Supervisor,
    noise_band,
)
from tests.relaysim import make_plan

TICK = 0.01  # s


def feed_link(mon: LinkQualityMonitor, loss: float, seconds: float, t0: float = 0.0,
              rate: int = 100, counters: LinkCounters | None = None
              ) -> tuple[float, LinkCounters, list]:
    """Feed `seconds` of a sample stream at `rate` Hz in which a fraction `loss` of the frames
    is corrupted (each corrupted frame: one rejected frame and one sequence gap)."""
    c = counters or LinkCounters(0, 0, 0, 0)
    faults = []
    n = int(round(seconds * rate))
    acc = 0.0
    t = t0
    for k in range(n):
        t = t0 + (k + 1) / rate
        acc += loss
        if acc >= 1.0:
            acc -= 1.0
            c = LinkCounters(c.good, c.rejected + 1, c.received, c.lost + 1)
        else:
            c = LinkCounters(c.good + 1, c.rejected, c.received + 1, c.lost)
        if mon.due(t):
            f = mon.update(t, c)
            if f is not None:
                faults.append(f)
    return t, c, faults


def test_link_quality_below_threshold_runs_on() -> None:
    mon = LinkQualityMonitor(0.3, 1.0)
    _, _, faults = feed_link(mon, 0.2, 20.0)
    assert faults == []
    assert mon.loss == pytest.approx(0.2, abs=0.02)
    assert mon.rejected == pytest.approx(0.2, abs=0.02)


def test_link_quality_above_threshold_stops_within_a_window() -> None:
    mon = LinkQualityMonitor(0.3, 1.0)
    t, c, faults = feed_link(mon, 0.05, 5.0)
    assert faults == []
    t_bad = t
    t, c, faults = feed_link(mon, 0.8, 5.0, t0=t, counters=c)
    assert faults, "80% loss must stop the run"
    f = faults[0]
    assert f.reason == "fault:link_quality"
    assert f.value > 0.3 and f.limit == 0.3
    # the window mixes old good frames with the new bad ones: found within one window
    assert f.t - t_bad <= 1.0 + 0.1 + 1e-9
    assert "link quality" in f.message


def test_link_quality_off_and_counter_reset() -> None:
    mon = LinkQualityMonitor(1.0, 1.0)
    assert feed_link(mon, 0.9, 5.0)[2] == []
    mon = LinkQualityMonitor(0.3, 1.0)
    t, _, _ = feed_link(mon, 0.0, 2.0)
    # a new link starts its counters at zero again: not a negative loss, no fault
    assert feed_link(mon, 0.0, 2.0, t0=t)[2] == []


def test_link_quality_needs_enough_frames() -> None:
    mon = LinkQualityMonitor(0.1, 1.0, min_frames=20)
    c = LinkCounters(0, 0, 0, 0)
    # 10 frames a second, all bad: the window stretches back until it holds 20 stream frames
    found = None
    for k in range(40):
        c = LinkCounters(c.good, c.rejected + 1, c.received, c.lost + 1)
        f = mon.update(0.1 * (k + 1), c)
        if f is not None:
            found = k + 1
            break
    assert found == 21  # 20 frames after the base reading (the first one)


def test_link_quality_validation() -> None:
    with pytest.raises(ValueError):
        LinkQualityMonitor(0.0, 1.0)
    with pytest.raises(ValueError):
        LinkQualityMonitor(0.5, 0.0)


def test_counters_from_stats() -> None:
    class S:
        frames_good, crc_errors, framing_errors, decode_errors = 10, 2, 3, 1
        samples_received, seq_gaps = 8, 4

    assert LinkCounters.from_stats(S()) == LinkCounters(10, 6, 8, 4)
    d = {k: getattr(S, k) for k in ("frames_good", "crc_errors", "framing_errors",
                                     "decode_errors", "samples_received", "seq_gaps")}
    assert LinkCounters.from_mapping(d) == LinkCounters(10, 6, 8, 4)


def test_noise_band() -> None:
    assert noise_band(0.1, 0.05) == pytest.approx(0.6)
    assert noise_band(0.0, 0.5) == pytest.approx(1.0)
    assert noise_band(0.0, 0.0, scale=100.0) == pytest.approx(1e-4)


def test_no_response_on_frozen_pv() -> None:
    mon = ResponseMonitor(bias=0.0, level=5.0, band=0.3, hold_time=2.0)
    rng = np.random.default_rng(1)
    fault = None
    for k in range(400):
        t = k * TICK
        fault = mon.update(t, 1.0 + 0.04 * rng.standard_normal(), 5.0)
        if fault is not None:
            break
    assert fault is not None and fault.reason == "fault:no_response"
    assert fault.t == pytest.approx(2.0, abs=TICK + 1e-9)


def test_no_response_not_on_a_moving_pv_or_small_output() -> None:
    mon = ResponseMonitor(bias=1.0, level=5.0, band=0.3, hold_time=2.0)
    for k in range(2000):
        t = k * TICK
        # a first-order response to the step: always moving by more than the band per 2 s
        assert mon.update(t, 3.0 * math.sin(2 * math.pi * t / 1.5), 6.0) is None
    mon = ResponseMonitor(bias=1.0, level=5.0, band=0.3, hold_time=2.0)
    for k in range(2000):  # output below the level that moved the PV: not judged
        assert mon.update(k * TICK, 0.0, 1.0 + 4.0) is None


def test_no_response_relay_output_switching_sides_counts() -> None:
    mon = ResponseMonitor(bias=0.0, level=5.0, band=0.3, hold_time=1.0)
    f = None
    for k in range(200):
        f = f or mon.update(k * TICK, 0.5, 5.0 if (k // 10) % 2 else -5.0)
    assert f is not None  # output applied both ways, PV frozen


def test_reset_monitor() -> None:
    mon = ResetMonitor(0x1234)
    assert mon.check_boot_id(1.0, 0x1234) is None
    assert mon.check_time(1.0) is None
    assert mon.check_time(1.01) is None
    f = mon.check_boot_id(1.02, 0x9999)
    assert f is not None and f.reason == "fault:device_reset"
    mon = ResetMonitor(1)
    mon.check_time(5.0)
    f = mon.check_time(0.01)
    assert f is not None and f.reason == "fault:device_reset" and "backwards" in f.message


def test_supervisor_latches_first_fault() -> None:
    sup = Supervisor(LinkQualityMonitor(0.3, 1.0), ResetMonitor(7))
    sup.expect_response(0.0, 1.0, 0.1, 0.5)
    assert sup.check_sample(0.0, 0.0, 0.0, 7) is None
    f = sup.check_sample(0.01, 0.0, 0.0, 8)
    assert f is not None and f.which == "device_reset"
    assert sup.check_sample(0.02, 0.0, 5.0, 7) is f
    assert not sup.link_due(0.03)


# ------------------------------------------------------------------ relay: spike-robust switching
def spiky_relay_run(confirm: int, spikes: list[int], n: int = 3000,
                    spike: float = 1.5) -> tuple[RelayExperiment, list[float]]:
    """Host-loop relay on a discrete first-order-plus-dead-time plant (K=1, T=1 s, L=0.2 s,
    exact ZOH at TICK), with one-sample PV spikes at the given sample indices."""
    plan = make_plan(target_amplitude=0.5, adapt_amplitude=False, balance_bias=False,
                     max_cycles=1000)
    exp = RelayExperiment(plan, RelaySettings(0.0, 0.0, 1.0, 0.05), 10.0,
                          converged=lambda cycles: False, confirm_samples=confirm)
    a = math.exp(-TICK / 1.0)
    delay = int(round(0.2 / TICK))
    u_hist = [0.0] * delay
    y = 0.0
    outs = []
    spike_set = set(spikes)
    for k in range(n):
        pv = y + (spike if k in spike_set else 0.0) * (1 if k % 2 else -1)
        step = exp.update(k * TICK, pv)
        outs.append(step.output)
        u_hist.append(step.output)
        y = a * y + (1 - a) * u_hist.pop(0)
    return exp, outs


def test_confirmed_switching_ignores_single_spikes() -> None:
    spikes = list(range(137, 3000, 97))
    clean, _ = spiky_relay_run(1, [])
    plain, _ = spiky_relay_run(1, spikes)
    robust, _ = spiky_relay_run(2, spikes)
    # without confirmation the spikes cause extra (false) switches
    assert len(plain.switches) > len(clean.switches)
    # with it, the switches are those of the clean loop plus one tick of delay: the count of
    # cycles stays within one of the clean run's (the period grows by about 2 ticks)
    clean_p = np.median([c.period for c in clean.cycles[2:]])
    robust_p = np.median([c.period for c in robust.cycles[2:]])
    assert min(c.period for c in robust.cycles[1:]) > 0.8 * clean_p
    assert robust_p == pytest.approx(clean_p + 2 * TICK, abs=2 * TICK + 1e-9)
    # peaks: a spike does not inflate the cycle's amplitude
    clean_a = np.median([c.amplitude for c in clean.cycles[2:]])
    assert max(c.amplitude for c in robust.cycles[2:]) < clean_a * 1.1


def test_confirm_samples_validation() -> None:
    plan = make_plan(target_amplitude=0.5)
    with pytest.raises(ValueError):
        RelayExperiment(plan, RelaySettings(0.0, 0.0, 1.0, 0.05), 10.0, confirm_samples=0)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-20, 20, allow_nan=False), min_size=1, max_size=200),
       st.integers(1, 3))
def test_confirmed_relay_output_within_limits_and_guard_stops(pvs: list[float],
                                                              confirm: int) -> None:
    """For any PV sequence: output within the limit; a guard violation ends it with output 0
    (the property of tests/test_core_properties.py, here with switch confirmation on)."""
    limits = SafetyLimits(output_limit=5.0, pv_window=10.0)
    guard = SafetyGuard(limits, 0.0, 0.0)
    plan = make_plan(target_amplitude=1.0, pv_window=10.0)
    exp = RelayExperiment(plan, RelaySettings(0.0, 0.0, 4.0, 0.1), 5.0, guard=guard,
                          confirm_samples=confirm)
    for k, pv in enumerate(pvs):
        step = exp.update(k * TICK, pv)
        assert abs(step.output) <= 5.0
        if guard.tripped:
            assert step.done and step.output == 0.0
            assert step.end_reason == f"limit:{guard.violation.which}"
            break
