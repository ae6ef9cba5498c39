"""Confirmation step on the mock device process over a real pty (through autotune.job.powered).

Reference: python-control's simulation of the same sampled closed loop (plant sampled with a
zero-order hold by control.sample_system, dead time as whole ticks, the discrete PID as discrete
transfer functions, closed with control.feedback); see tests/test_steptest_unit.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from autotune.config import load_config, with_overrides
from autotune.core.pid import PidGains
from autotune.core.steptest import (
    StepCandidate,
    StepPhase,
    StepPlan,
    StepSettings,
)
from autotune.job.powered import PoweredRun, RunOptions
from autotune.job.step import StepEnded, run_step
from autotune.recorder import read_session
from tests.test_steptest_unit import reference_step

SPEED = 5.0
NUM, DEN, DELAY, TICK = (2.0,), (0.5, 1.0), 0.05, 0.01  # K = 2, T = 0.5 s, L = 0.05 s
PLANT_TOML = f"""
[plant]
num = [{NUM[0]}]
den = [{DEN[0]}, {DEN[1]}]
delay = {DELAY}
[actuator]
limit = 100.0
[sensor]
noise = 0.0
resolution = 0.0
[device]
period = {TICK}
"""


@pytest.fixture
def plant_file(tmp_path: Path) -> str:
    p = tmp_path / "plant.toml"
    p.write_text(PLANT_TOML)
    return str(p)


def _run(plant: str, out: Path, candidates: list[StepCandidate], plan: StepPlan, loop: str,
         window: float = 10.0, speed: float = SPEED) -> tuple[list, PoweredRun]:
    # Device watchdog 2 s of device time: a busy test machine does not trip it at --speed 5
    # (the watchdog has its own tests).
    cfg = with_overrides(load_config(None), {"safety.output_limit": 60.0,
                                             "safety.pv_window": window,
                                             "safety.watchdog": 2.0})
    opts = RunOptions(port="sim", yes=True, out_dir=out, plant=plant, speed=speed, keys=False,
                      verb="step", stdout=open("/dev/null", "w"))  # noqa: SIM115
    outcomes = []
    run = PoweredRun(cfg, opts)
    with run:
        run.arm()
        for cand in candidates:
            try:
                outcomes.append(run_step(run, cand, StepSettings(plan, loop=loop,
                                                                 output_limit=60.0)))
            except StepEnded as ended:
                outcomes.append(ended.outcome)
                raise ended.ended from None
    run.end_session()
    return outcomes, run


def _compare_with_reference(outcome, size: float, extra_ticks: int) -> float:
    seg = outcome.segments[0]
    assert seg.phase is StepPhase.STEP
    t, pv, sp = (np.asarray(a) for a in (outcome.t, outcome.pv, outcome.sp))
    k0 = int(np.argmax(np.abs(sp - outcome.start_value) > 0.5 * abs(size)))
    k1 = int(np.searchsorted(t, seg.t_end))
    assert np.all(np.abs(pv[:k0] - outcome.start_value) < 1e-6)  # at rest before the step
    ref = reference_step(NUM, DEN, DELAY, outcome.pid, k1 - k0, size, extra_ticks)
    return float(np.max(np.abs(pv[k0:k1] - outcome.start_value - ref)))


@pytest.mark.parametrize("gains", [PidGains(2.0, 10.0, 0.0), PidGains(1.5, 6.0, 0.05)],
                         ids=["pi", "pid"])
def test_device_pid_step_matches_python_control(plant_file: str, tmp_path: Path,
                                                gains: PidGains) -> None:
    size = 1.5
    plan = StepPlan(size=size, hold_time=0.2, timeout=4.0)
    (o,), run = _run(plant_file, tmp_path, [StepCandidate("manual", gains)], plan, "device")
    assert run.outcome.reason == "completed" and run.outcome.stop.confirmed
    err = _compare_with_reference(o, size, extra_ticks=0)
    assert err <= 0.03 * size, f"max deviation {err:.4g} from python-control's sampled loop"
    assert o.settled and o.metrics is not None


def test_host_loop_step_matches_python_control(plant_file: str, tmp_path: Path) -> None:
    """Host loop: the output computed from sample k is applied at tick k+1 (one tick more).

    That holds while the host answers each sample within one tick (10 ms of wall clock here);
    the runner counts the samples where the device applied an older output (`late_outputs`).
    A run where the host was late on more than 5% of the samples (a busy test machine) is
    repeated, up to three runs; any run on time must match.
    """
    size = 1.5
    plan = StepPlan(size=size, hold_time=0.2, timeout=4.0)
    lates = []
    for attempt in range(3):
        (o,), _ = _run(plant_file, tmp_path / str(attempt),
                       [StepCandidate("manual", PidGains(2.0, 10.0, 0.0))], plan, "host",
                       speed=1.0)
        lates.append(o.late_outputs)
        if o.late_outputs <= 0.05 * len(o.t):
            break
    else:
        pytest.fail(f"the host was late too often in every run (late outputs: {lates})")
    err = _compare_with_reference(o, size, extra_ticks=1)
    assert err <= 0.03 * size, f"max deviation {err:.4g} from python-control's sampled loop"


def test_detuning_lowers_measured_overshoot(plant_file: str, tmp_path: Path) -> None:
    g = PidGains(2.0, 10.0, 0.0)  # underdamped on this plant (about 26 % overshoot)
    plan = StepPlan(size=1.0, hold_time=0.2, timeout=4.0)
    (o1, o2), _ = _run(plant_file, tmp_path,
                       [StepCandidate("manual", g), StepCandidate("x0.7", g.scaled(0.7))],
                       plan, "device")
    assert o1.metrics is not None and o2.metrics is not None
    assert o1.metrics.overshoot > 15.0
    assert o2.metrics.overshoot < o1.metrics.overshoot - 3.0


def test_step_leaving_the_pv_window_stops_within_one_tick(plant_file: str, tmp_path: Path) -> None:
    # Gains far beyond the ultimate gain: the loop oscillates with growing amplitude.
    g = PidGains(12.0, 60.0, 0.0)
    window = 1.0
    plan = StepPlan(size=0.6, hold_time=0.2, timeout=4.0)
    (o,), run = _run(plant_file, tmp_path, [StepCandidate("hot", g)], plan, "device",
                     window=window)
    assert run.outcome.reason.lower() in ("limit:pv_window", "fault:pv_window"), run.outcome
    assert o.end_reason == run.outcome.reason
    assert run.outcome.stop.confirmed
    s = read_session(tmp_path / "session.jsonl")
    start = s.header["pv_start"]
    outside = np.nonzero(np.abs(s.pv - start) > window)[0]
    assert outside.size
    i = int(outside[0])
    # The device (limits loaded before any motion) zeroes the output in the offending tick;
    # at the latest the next sample shows zero output.
    zero = np.nonzero((s.t >= s.t[i]) & (s.out == 0.0))[0]
    assert zero.size and s.t[zero[0]] - s.t[i] <= TICK + 1e-9
    assert np.all(s.out[zero[0]:] == 0.0)
    assert run.outcome.stop.t_zero is not None and run.outcome.stop.t_zero - s.t[i] <= TICK + 1e-9


def test_load_disturbance_recovers(plant_file: str, tmp_path: Path) -> None:
    plan = StepPlan(size=1.0, hold_time=0.2, timeout=3.0, load_offset=5.0, settle_hold=0.3,
                    return_to_start=False)
    (o,), run = _run(plant_file, tmp_path, [StepCandidate("m", PidGains(1.0, 4.0, 0.0))],
                     plan, "host", speed=1.0)
    assert run.outcome.reason == "completed"
    assert o.load is not None
    # A positive offset at the plant input pushes the PV above the setpoint; the integral
    # brings it back. Peak from python-control's load response of the same sampled loop.
    from tests.test_steptest_unit import reference_load

    seg = next(s for s in o.segments if s.phase is StepPhase.LOAD)
    n = int(round((seg.t_end - seg.t_start) / TICK))
    ref = reference_load(NUM, DEN, DELAY, o.pid, n, 5.0, extra_ticks=1)
    assert o.load.peak_deviation == pytest.approx(float(np.max(ref)), abs=0.03)
    assert o.load.recovery_time is not None and o.load.recovery_time < 4.0
