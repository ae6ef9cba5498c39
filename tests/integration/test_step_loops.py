"""The confirmation step on loops well beyond the two scenarios, on the mock device process.

Every loop of tests/steploops.py runs as the job would run it after the relay (the output at
the balanced bias, a rest measurement, then `run_step` with the plan from the prediction).
Gains: autotune.core.design.propose on the true plant with its analytic Ku/Tu
(autotune.core.lti). Times are device times from the records, never the wall clock.

References (named beside each check): python-control's sampled closed loop for the same gains
and hold (control.sample_system, control.step_response, control.step_info; see
tests/steploops.reference_figures), and the design's own prediction (the issue's spec: measured
overshoot within 5 points of it).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from autotune.core.steptest import StepPhase
from autotune.recorder import read_session
from protocol.messages import Mode, flags_mode
from tests.steploops import AGGRESSIVE, LOOPS, Loop, reference_figures, run_loop

BY_NAME = {lp.name: lp for lp in LOOPS}


@pytest.mark.parametrize("name", [lp.name for lp in LOOPS])
def test_step_passes_and_matches_python_control(name: str, tmp_path: Path) -> None:
    loop = BY_NAME[name]
    for _ in range(3):  # a host loop late on many samples (a busy machine) is run again
        r = run_loop(loop, tmp_path / f"run{_}", back=False)  # the return is tested below
        o = r.outcome
        assert o is not None, r.run.outcome
        if loop.loop != "host" or o.late_outputs <= 0.05 * len(o.t):
            break
    assert r.run.outcome.reason == "completed", r.run.outcome.message
    assert r.run.outcome.stop is not None and r.run.outcome.stop.confirmed
    assert o.end_reason == "completed", o.message
    v = o.verdict
    assert v is not None and v.passed and v.status == "pass", v.reason if v else o.message
    m = o.metrics
    assert m is not None
    # the spec: measured overshoot within 5 points of the design's prediction
    assert abs(m.overshoot - float(r.predicted["overshoot"])) <= 5.0
    # python-control's sampled closed loop, same gains, b, filter and hold, same band. The
    # sensor's noise left after the filter (n, PV units; 0 for a clean sensor) moves the peak
    # by up to n and the settling reading between the reference's on the band widened and
    # narrowed by n; step_info reads at samples (one tick), float32 on the wire
    ref = reference_figures(loop, o, o.plan.timeout)
    assert o.band_choice is not None
    n = o.band_choice.noise / loop.size
    # a host loop late by a tick on a few samples (at most 5 %, see above) moves the peak by
    # a fraction of a point (common practice, no source)
    late = 1.0 if o.late_outputs else 0.0
    assert m.overshoot == pytest.approx(ref["overshoot"], abs=0.05 + 100.0 * n + late)
    frac = o.band_choice.fraction
    early = reference_figures(loop, o, o.plan.timeout, frac + n)["settling_time"]
    slow = reference_figures(loop, o, o.plan.timeout, frac - n)["settling_time"] if n else \
        ref["settling_time"]
    ticks = (2 + 3 * o.late_outputs) * loop.period
    assert early - ticks <= m.settling_time <= slow + ticks
    # the record: max(step.duration, 3 x predicted settling, 4 x Tu), in device time
    settle = float(r.predicted["settling_time"])
    step = o.segments[0]
    assert step.phase is StepPhase.STEP
    assert o.plan.timeout == pytest.approx(max(5.0, 3.0 * settle, 4.0 * r.tu))
    assert step.t_end - step.t_start == pytest.approx(o.plan.timeout, abs=2 * loop.period)
    # the hold: at rest for at least one Tu before the step (device time from the records)
    s = read_session(r.out_dir / "session.jsonl")
    hold = next(e for e in s.events if e.get("kind") == "step:hold")
    assert step.t_start - float(hold["t"]) >= r.tu - loop.period
    assert o.hold is not None and o.hold.at_rest
    # the band: fixed and labelled; the noise filtered, not the band widened
    assert o.band_choice is not None
    if loop.resolution:
        assert o.band_choice.label == "5 % band" and o.band_choice.note
    else:
        assert o.band_choice.label == "2 % band" and o.band == pytest.approx(0.02 * loop.size)
    if loop.noise:
        assert o.band_choice.window > 1
    # result.json's step field: every check beside its limit
    field = o.step_field()
    checks = {c["name"]: c for c in field["verdict"]["checks"]}
    assert set(checks) == {"overshoot", "settling_time", "oscillation", "time_saturated"}
    assert all(c["limit"] is not None and c["status"] == "pass" for c in checks.values())
    assert field["record"]["why"].startswith("records")


def test_too_aggressive_gains_stop_early_and_say_oscillating(tmp_path: Path) -> None:
    r = run_loop(AGGRESSIVE, tmp_path)
    o = r.outcome
    assert o is not None and r.run.outcome.reason == "completed"
    assert r.run.outcome.stop is not None and r.run.outcome.stop.confirmed
    assert o.end_reason == "oscillating"
    v = o.verdict
    assert v is not None and v.status == "oscillating" and v.action.value == "detune"
    assert v.reason.startswith("oscillating (period ") and v.reason.endswith("s): detune")
    assert "repeat" not in v.reason
    step, recover = o.segments
    assert (step.phase, recover.phase) == (StepPhase.STEP, StepPhase.RECOVER)
    assert o.oscillation is not None
    period = float(o.oscillation["period"])
    # python-control's sampled loop for the same gains: the turning points of its response
    ref = reference_figures(AGGRESSIVE, o, 20.0)
    assert ref["overshoot"] > 50.0
    # stopped within two periods of the oscillation's first peak (device time)
    t, pv = np.asarray(o.t), np.asarray(o.pv)
    sl = (t >= step.t_start) & (t <= step.t_end)
    k_peak = int(np.argmax(pv[sl]))
    assert step.t_end - t[sl][k_peak] <= 2.0 * period
    assert step.t_end - step.t_start < o.plan.timeout
    # returned to rest: the output held, the PV at rest again near the start value
    assert recover.settled
    s = read_session(r.out_dir / "session.jsonl")
    during = (s.t >= recover.t_start) & (s.t <= recover.t_end)
    held = np.abs(s.out[during] - o.rest_output) < 1e-6
    assert held.any()
    k = int(np.argmax(held))  # from the first sample that shows the held output (the link's
    assert held[k:].all()  # turnaround before it), every one holds it
    assert s.t[during][k] - recover.t_start < 0.5
    assert abs(o.pv[-1] - o.start_value) < 0.05 * AGGRESSIVE.size


def test_a_loaded_axis_does_not_drop_when_the_pid_takes_over(tmp_path: Path) -> None:
    """Integrating loop with a constant load of 15 % of the relay amplitude, held at the
    balanced bias: the PID starts with its integral preset to that bias. Preset to 0 instead,
    the same axis falls while the integral winds up (the issue's 200-unit drop, scaled)."""
    loop = BY_NAME["integrating-load"]

    def drop(run_dir: Path, bias: float | None) -> tuple[float, float]:
        r = run_loop(loop, run_dir, bias=bias, back=False)
        s = read_session(r.out_dir / "session.jsonl")
        t0 = float(next(e for e in s.events if e.get("kind") == "step:hold")["t"])
        assert r.outcome is not None and r.outcome.segments
        t1 = r.outcome.segments[0].t_start
        pid = np.array([flags_mode(int(f)) == Mode.PID for f in s.extra["flags"]])
        hold = (s.t >= t0) & (s.t < t1)
        first = s.out[hold & pid][0]  # the first output of the device's PID
        return float(np.max(np.abs(s.pv[hold] - r.outcome.start_value))), first

    kept, first_out = drop(tmp_path / "preset", None)
    assert first_out == pytest.approx(-loop.load, abs=1e-3)  # output units: no bump
    assert kept < 0.002 * loop.size  # PV units: a tenth of the 2 % band
    fell, first_out0 = drop(tmp_path / "zero", 0.0)
    assert abs(first_out0) < 0.1 * abs(loop.load)
    assert fell > 10 * kept and fell > 0.02 * loop.size


# ---------------------------------------------------------------- refusals in words
def _armed_step(tmp_path: Path, settings_of, window: float = 5.0,  # type: ignore[no-untyped-def]
                before: float = 0.0):
    """Arm a run on the fopdt-tu2 loop, hold the output at `before` for 12 s (device time:
    six time constants; the PV moves to 1.5 x before), then call run_step with
    settings_of(cfg, tick)."""
    from autotune.core.pid import PidGains
    from autotune.core.steptest import StepCandidate
    from autotune.job.powered import PoweredRun, RunOptions
    from autotune.job.step import StepEnded, run_step
    from tests.steploops import config

    loop = BY_NAME["fopdt-tu2"]
    tmp_path.mkdir(parents=True, exist_ok=True)
    plant = tmp_path / "plant.toml"
    plant.write_text(loop.plant_toml())
    cfg = config(window)
    run = PoweredRun(cfg, RunOptions(port="sim", yes=True, out_dir=tmp_path / "out",
                                     plant=str(plant), speed=loop.speed, keys=False,
                                     verb="step", stdout=open("/dev/null", "w")))  # noqa: SIM115
    ended = None
    with run:
        run.arm()
        if before:
            t0 = None
            while True:
                run.set_output(before)
                rec = run.next_sample()
                t0 = rec.t if t0 is None else t0
                if rec.t - t0 >= 12.0:
                    break
        try:
            run_step(run, StepCandidate("m", PidGains(1.0, 1.0)), settings_of(cfg, loop.period))
        except StepEnded as exc:
            ended = exc
            raise exc.ended from None
    run.end_session()
    return run, ended, read_session(tmp_path / "out" / "session.jsonl")


def test_a_step_beyond_the_boards_window_is_refused_before_power(tmp_path: Path) -> None:
    """The axis has moved to about 3.3 (output 2.2 on a gain of 1.5); a step of +1.5 (60 % of
    the window, as planned from the config) peaks at 4.8 + 25 % of 1.5 with the overshoot the
    default spec allows: beyond the board's window of +/-5 about the start."""
    from autotune.core.steptest import settings_from_config

    run, ended, s = _armed_step(tmp_path, lambda cfg, ts: settings_from_config(
        cfg, "device", size=1.5, ts=ts)[0], before=2.2)
    assert ended is not None and run.outcome.reason == "step:out_of_range"
    msg = run.outcome.message
    assert "PV window loaded in the board" in msg and "peak with the 25 % overshoot" in msg
    assert "use a step of at most +1.3" in msg
    # the PID never ran: the refusal came before any PID command
    assert not any(flags_mode(int(f)) == Mode.PID for f in s.extra["flags"])
    assert run.outcome.stop is not None and run.outcome.stop.confirmed


def test_a_refusal_by_the_board_is_explained(tmp_path: Path) -> None:
    """The board refuses a setpoint weight outside 0..1 (protocol/SPEC.md, SetPid): the run
    ends with the refusal in words, not the bare code."""
    import dataclasses

    from autotune.core.steptest import settings_from_config

    def settings(cfg, ts):  # type: ignore[no-untyped-def]
        st = settings_from_config(cfg, "device", size=1.0, ts=ts)[0]
        return dataclasses.replace(st, setpoint_weight=1.5)

    run, ended, _ = _armed_step(tmp_path, settings)
    assert ended is not None and run.outcome.reason == "fault:refused"
    msg = run.outcome.message
    assert "the board refused the PID start (OUT_OF_RANGE)" in msg
    assert "a value sent was outside what it accepts" in msg and "outputs up to +/-60" in msg
    assert run.outcome.stop is not None and run.outcome.stop.confirmed


def test_a_pv_that_never_comes_to_rest_stops_with_the_reason(tmp_path: Path) -> None:
    """Integrating loop with its load and the integral started at 0 under a very slow
    integral action (kp 1, Ti 300 s): the load pulls the PV 1.5 PV units off the start value
    and it creeps back for minutes; the hold gives up and says why."""
    from autotune.core.pid import PidGains

    base = BY_NAME["integrating-load"]
    slow = Loop("creeping", base.num, base.den, base.delay, load=base.load,
                gains=PidGains(1.0, 1.0 / 300.0))
    r = run_loop(slow, tmp_path, bias=0.0)
    assert r.run.outcome.reason == "step:not_at_rest"
    assert "did not come to rest" in r.run.outcome.message
    assert "below the start value" in r.run.outcome.message
    assert "integral action is too slow for the load" in r.run.outcome.message
    assert r.outcome is not None and r.outcome.segments == []  # no step was made
    assert r.run.outcome.stop is not None and r.run.outcome.stop.confirmed


def test_the_host_loop_starts_bumpless_too(tmp_path: Path) -> None:
    """The same loaded axis with the PID on the host: its integral is preset to the bias, so
    the first output it sends is the bias and the PV stays where it was (short hold only)."""
    from autotune.core.pid import PidGains
    from autotune.core.steptest import StepCandidate, StepPlan, StepSettings
    from autotune.job.powered import PoweredRun, RunOptions
    from autotune.job.step import run_step
    from tests.steploops import OUTPUT_LIMIT, config

    loop = BY_NAME["integrating-load"]
    plant = tmp_path / "plant.toml"
    plant.write_text(loop.plant_toml())
    run = PoweredRun(config(), RunOptions(port="sim", yes=True, out_dir=tmp_path / "out",
                                          plant=str(plant), speed=2.0, keys=False,
                                          verb="step", stdout=open("/dev/null", "w")))  # noqa: SIM115
    with run:
        run.arm()
        t0 = None
        while True:  # the relay's end: the output at the balanced bias, the PV at rest
            run.set_output(-loop.load)
            rec = run.next_sample()
            t0 = rec.t if t0 is None else t0
            if rec.t - t0 >= 2.0:
                break
        plan = StepPlan(size=0.2, hold_time=0.5, timeout=1.0, return_to_start=False)
        o = run_step(run, StepCandidate("m", PidGains(1.8, 0.45, 0.45)),
                     StepSettings(plan, loop="host", output_limit=OUTPUT_LIMIT,
                                  bias=-loop.load))
    run.end_session()
    t, pv, out = (np.asarray(a) for a in (o.t, o.pv, o.out))
    assert o.segments, o.message
    hold = t < o.segments[0].t_start
    assert out[hold][1:] == pytest.approx(-loop.load, abs=1e-3)  # output units: no bump
    assert float(np.max(np.abs(pv[hold] - o.start_value))) < 0.002  # PV units
