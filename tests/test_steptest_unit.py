"""Confirmation step, pure part: plan, state machine, figures over recorded arrays.

The reference for the sampled closed loop is python-control: the plant sampled with a zero-order
hold (control.sample_system, 'zoh'), the dead time as whole ticks z^-m, the project's discrete
PID written as discrete transfer functions, closed with control.feedback. Step figures are
checked against control.step_info on the same arrays.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import control
import numpy as np
import pytest

from autotune.core.pid import DiscretePid, PidGains, PidSettings, per_tick
from autotune.core.steptest import (
    StepExperiment,
    StepPhase,
    StepPlan,
    fit_step_to_window,
    load_figures,
    step_figures,
)
from mock_device.plant import LtiPlant

TS = 0.01
PLANT_NUM, PLANT_DEN, PLANT_DELAY = (2.0,), (0.5, 1.0), 0.05  # K=2, T=0.5 s, L=0.05 s


# ---------------------------------------------------------------- python-control reference
def pid_transfer_functions(settings: PidSettings) -> tuple[control.TransferFunction,
                                                           control.TransferFunction]:
    """(Cr, Cy) of DiscretePid without saturation: U = Cr R - Cy Y (discrete, dt = ts).

    From the difference equations in autotune.core.pid.DiscretePid: I[k+1] = I[k] + ki ts e[k]
    -> ki_ts / (z - 1); D[k] = ad D[k-1] - bd (y[k] - y[k-1]) -> -bd (z - 1)/(z - ad);
    P = kp (b r - y).
    """
    c = per_tick(settings.gains, settings.ts, settings.deriv_filter_n)
    ts = settings.ts
    integ = control.tf([c["ki_ts"]], [1.0, -1.0], ts)
    deriv = control.tf([c["bd"], -c["bd"]], [1.0, -c["ad"]], ts)
    cr = c["kp"] * settings.setpoint_weight + integ
    cy = c["kp"] + integ + deriv
    return cr, cy


def sampled_plant(num: Sequence[float], den: Sequence[float], delay: float, ts: float,
                  extra_ticks: int = 0) -> control.TransferFunction:
    """ZOH-sampled plant with the dead time as whole ticks (plus `extra_ticks` of latency)."""
    m = round(delay / ts)
    assert abs(m * ts - delay) < 1e-9, "reference needs the dead time to be whole ticks"
    gd = control.sample_system(control.tf(list(num), list(den)), ts, method="zoh")
    shift = control.tf([1.0], [1.0] + [0.0] * (m + extra_ticks), ts)
    return gd * shift


def reference_step(num: Sequence[float], den: Sequence[float], delay: float,
                   settings: PidSettings, n: int, size: float, extra_ticks: int = 0) -> np.ndarray:
    """PV at ticks 0..n-1 after a setpoint step of `size` at tick 0, loop at rest before."""
    cr, cy = pid_transfer_functions(settings)
    gd = sampled_plant(num, den, delay, settings.ts, extra_ticks)
    t_ry = control.feedback(gd, cy) * cr
    t = np.arange(n) * settings.ts
    resp = control.forced_response(t_ry, t, np.full(n, size))
    return np.asarray(resp.outputs)


def reference_load(num: Sequence[float], den: Sequence[float], delay: float,
                   settings: PidSettings, n: int, offset: float, extra_ticks: int = 0) -> np.ndarray:
    """PV deviation at ticks 0..n-1 after an offset step at the plant input at tick 0."""
    _, cy = pid_transfer_functions(settings)
    gd = sampled_plant(num, den, delay, settings.ts, extra_ticks)
    t = np.arange(n) * settings.ts
    return np.asarray(control.forced_response(control.feedback(gd, cy), t,
                                              np.full(n, offset)).outputs)


# ---------------------------------------------------------------- a pure loop like the device
def run_loop(plan: StepPlan, settings: PidSettings, t_max: float = 30.0) -> tuple[
        StepExperiment, dict[str, np.ndarray]]:
    """Device-PID timing: tick k reads pv, computes u with the setpoint in effect, holds u.

    Commands from the state machine take effect one tick later (the link's turnaround).
    """
    plant = LtiPlant(PLANT_NUM, PLANT_DEN, PLANT_DELAY, max_step=TS / 10)
    pid = DiscretePid(settings)
    exp = StepExperiment(plan, start_value=0.0)
    sp, off = 0.0, 0.0
    rec: dict[str, list[float]] = {"t": [], "pv": [], "out": [], "sp": [], "off": []}
    k = 0
    while k * TS < t_max:
        t = k * TS
        pv = plant.y
        u = pid.update(sp, pv)
        for key, v in zip(rec, (t, pv, u, sp, off), strict=True):
            rec[key].append(v)
        cmd = exp.update(t, pv, sp, off)
        plant.advance(u + off, TS)
        sp, off = cmd.setpoint, cmd.offset
        k += 1
        if cmd.done:
            break
    return exp, {key: np.array(v) for key, v in rec.items()}


UNDERDAMPED = PidSettings(PidGains(2.0, 10.0, 0.0), TS)  # PI on K=2, T=0.5, L=0.05: rings


def test_step_window_fit() -> None:
    assert fit_step_to_window(2.0, 10.0) == (2.0, None)
    size, msg = fit_step_to_window(-9.0, 10.0)
    assert size == pytest.approx(-6.0) and msg is not None and "reduced" in msg
    assert fit_step_to_window(5.0, None) == (5.0, None)


@pytest.mark.parametrize("bad", [dict(size=0.0), dict(size=1.0, timeout=0.0),
                                 dict(size=1.0, settle_band=1.5), dict(size=math.nan)])
def test_plan_rejects_nonsense(bad: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        StepPlan(**bad)


def test_phases_in_order_and_return_to_start() -> None:
    plan = StepPlan(size=1.0, hold_time=0.2, timeout=8.0)
    exp, rec = run_loop(plan, UNDERDAMPED)
    assert [s.phase for s in exp.segments] == [StepPhase.STEP, StepPhase.RETURN]
    step, ret = exp.segments
    assert step.settled and ret.settled and exp.settled_step
    assert exp.phase is StepPhase.DONE
    # The step segment starts at the first sample with the new setpoint in effect.
    k0 = int(np.argmax(rec["sp"] > 0.5))
    assert step.t_start == pytest.approx(rec["t"][k0])
    assert step.t_start >= 0.2
    assert (step.sp_before, step.sp_after) == (0.0, 1.0)
    assert (ret.sp_before, ret.sp_after) == (1.0, 0.0)
    assert rec["sp"][-1] == 0.0
    # Settled means inside the 2% band at the segment end.
    i_end = int(np.searchsorted(rec["t"], step.t_end))
    assert abs(rec["pv"][i_end] - 1.0) <= 0.02


def test_pure_loop_matches_python_control() -> None:
    """Guards the reference used by the integration test (python-control sampled loop)."""
    exp, rec = run_loop(StepPlan(size=1.5, hold_time=0.1, timeout=5.0), UNDERDAMPED)
    seg = exp.segments[0]
    k0 = int(np.argmax(rec["sp"] > 0.75))
    n = int(np.searchsorted(rec["t"], seg.t_end)) - k0
    ref = reference_step(PLANT_NUM, PLANT_DEN, PLANT_DELAY, UNDERDAMPED, n, 1.5)
    assert np.max(np.abs(rec["pv"][k0:k0 + n] - ref)) < 1e-6


def test_step_figures_match_control_step_info() -> None:
    exp, rec = run_loop(StepPlan(size=2.0, hold_time=0.1, timeout=8.0, min_record=3.0),
                        UNDERDAMPED)
    seg = exp.segment(StepPhase.STEP)
    assert seg is not None
    m = step_figures(rec["t"], rec["pv"], rec["out"], seg, output_limit=None)
    sl = (rec["t"] >= seg.t_start - 1e-9) & (rec["t"] <= seg.t_end + 1e-9)
    tt, yy = rec["t"][sl] - seg.t_start, rec["pv"][sl] - seg.sp_before
    # python-control: step_info on the same recorded arrays, final value = the step size.
    info = control.step_info(yy, tt, yfinal=2.0)
    assert m.overshoot == pytest.approx(info["Overshoot"], abs=1e-9)
    assert m.overshoot > 10.0  # underdamped example
    # step_info reads times at samples; ours interpolate between them: within one tick.
    assert abs(m.rise_time - info["RiseTime"]) <= TS + 1e-9
    assert abs(m.settling_time - info["SettlingTime"]) <= TS + 1e-9
    assert m.iae > 0 and math.isnan(m.time_saturated)


def test_detuning_lowers_overshoot() -> None:
    plan = StepPlan(size=1.0, hold_time=0.1, timeout=8.0)
    e1, r1 = run_loop(plan, UNDERDAMPED)
    e2, r2 = run_loop(plan, UNDERDAMPED.with_gains(UNDERDAMPED.gains.scaled(0.7)))
    m1 = step_figures(r1["t"], r1["pv"], r1["out"], e1.segments[0])
    m2 = step_figures(r2["t"], r2["pv"], r2["out"], e2.segments[0])
    assert m2.overshoot < m1.overshoot


def test_timeout_when_never_settling() -> None:
    slow = PidSettings(PidGains(0.05, 0.01, 0.0), TS)
    plan = StepPlan(size=1.0, hold_time=0.05, timeout=0.5, return_to_start=False)
    exp, rec = run_loop(plan, slow)
    assert exp.settled_step is False
    seg = exp.segments[0]
    assert not seg.settled
    assert seg.t_end - seg.t_start == pytest.approx(0.5, abs=TS)
    assert exp.phase is StepPhase.DONE


def test_min_record_extends_the_record() -> None:
    plan = StepPlan(size=1.0, hold_time=0.05, timeout=10.0, min_record=4.0)
    exp, _ = run_loop(plan, UNDERDAMPED)
    seg = exp.segments[0]
    assert seg.settled and seg.t_end - seg.t_start >= 4.0 - 1e-9


def test_load_disturbance_peak_and_recovery() -> None:
    settings = PidSettings(PidGains(1.0, 4.0, 0.02), TS)
    plan = StepPlan(size=1.0, hold_time=0.05, timeout=8.0, load_offset=2.0, settle_hold=1.0)
    exp, rec = run_loop(plan, settings)
    assert [s.phase for s in exp.segments] == [StepPhase.STEP, StepPhase.LOAD,
                                               StepPhase.UNLOAD, StepPhase.RETURN]
    load = exp.segment(StepPhase.LOAD)
    assert load is not None and load.offset == 2.0 and load.settled
    lf = load_figures(rec["t"], rec["pv"], load, plan.band)
    # python-control: load response of the sampled loop, superposed on the settled step
    # (the step's remaining error is inside the 2% band: tolerance 0.02 x size).
    k0 = int(np.searchsorted(rec["t"], load.t_start))
    n = int(np.searchsorted(rec["t"], load.t_end)) - k0
    ref = reference_load(PLANT_NUM, PLANT_DEN, PLANT_DELAY, settings, n, 2.0)
    k_peak = int(np.argmax(np.abs(ref)))
    assert lf.peak_deviation == pytest.approx(ref[k_peak], abs=0.02)
    assert lf.peak_deviation > 0  # a positive offset pushes the PV up
    assert lf.time_to_peak == pytest.approx(k_peak * TS, abs=3 * TS)
    outside = np.nonzero(np.abs(ref) > plan.band)[0]
    assert lf.recovery_time is not None
    assert lf.recovery_time == pytest.approx((outside[-1] + 1) * TS, abs=0.1)


def test_setpoint_never_applied_ends_the_sequence() -> None:
    plan = StepPlan(size=1.0, hold_time=0.1, timeout=0.5)
    exp = StepExperiment(plan, 0.0)
    done = None
    for k in range(200):
        cmd = exp.update(k * TS, 0.0, 0.0)  # the device keeps reporting the old setpoint
        if cmd.done:
            done = k * TS
            break
    assert done is not None and done == pytest.approx(0.1 + 0.5, abs=2 * TS)
    assert exp.failure is not None and "not applied" in exp.failure
    assert exp.segments == []


def test_noise_widens_the_settling_band() -> None:
    rng = np.random.default_rng(1)
    plan = StepPlan(size=0.5, hold_time=0.2)
    exp = StepExperiment(plan, 0.0)
    for k in range(25):
        exp.update(k * TS, float(np.round(rng.normal(0, 0.02) / 0.05) * 0.05), 0.0)
    assert exp.phase is StepPhase.STEP
    assert exp.resolution == pytest.approx(0.05)
    assert exp.detect_band > plan.band  # 2% of 0.5 = 0.01, below the quantisation step


def test_settings_from_config_keeps_the_step_inside_the_window() -> None:
    from autotune.config import load_config, with_overrides
    from autotune.core.steptest import settings_from_config

    cfg = with_overrides(load_config(None), {"safety.pv_window": 5.0, "step.duration": 7.0,
                                             "step.settle_time": 0.4})
    st, note = settings_from_config(cfg, "host", size=-4.0)
    assert st.plan.size == pytest.approx(-3.0) and note is not None  # 60% of the window
    assert (st.plan.timeout, st.plan.hold_time, st.loop) == (7.0, 0.4, "host")
    assert st.output_limit == cfg.safety.output_limit
    st2, note2 = settings_from_config(cfg, "device")
    assert st2.plan.size == cfg.relay.target_amplitude and note2 is None


def test_inside_the_band_at_the_timeout_counts_as_settled() -> None:
    plan = StepPlan(size=1.0, hold_time=0.1, timeout=0.5, min_hold=0.15, return_to_start=False)
    exp = StepExperiment(plan, 0.0)
    sp = 0.0
    for k in range(100):
        t = k * TS
        pv = 0.0 if exp.phase is StepPhase.HOLD else (0.5 if exp.elapsed(t) < 0.3 else 1.0)
        cmd = exp.update(t, pv, sp)
        sp = cmd.setpoint
        if cmd.done:
            break
    seg = exp.segments[0]
    # The automatic hold (as long as the transient, 0.3 s) does not fit before the timeout,
    # but the PV has been in the band for 0.2 s >= min_hold when it comes.
    assert seg.settled and seg.t_end - seg.t_start == pytest.approx(0.5, abs=1.5 * TS)
