"""The proposal's setpoint weight b on the mock device (real pty): measured overshoot of the
setpoint step against the design's prediction (autotune.core.design, on the same plant).

Reference: the design's prediction is itself checked against python-control's control.step_info
on the same sampled loop with b (tests/test_design.py); here the board's PID with b must follow.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from autotune.config import load_config, with_overrides
from autotune.core import design
from autotune.core.lti import sopdt
from autotune.core.steptest import StepCandidate, StepPlan, StepSettings
from autotune.job.powered import PoweredRun, RunOptions
from autotune.job.step import run_step

TICK = 0.01
PLANT_TOML = f"""
[plant]
num = [0.25]
den = [0.048, 0.68, 1.0]
delay = 0.05
[actuator]
limit = 100.0
[sensor]
noise = 0.0
resolution = 0.0
offset = {{offset}}
[device]
period = {TICK}
"""


# offset: the PV at rest (PV units); with b < 1 the loop must start without a bump
# (kp (b - 1) sp at rest is cancelled once, see autotune.job.step.run_step)
@pytest.mark.parametrize(("loop", "offset"), [("device", 0.0), ("host", 0.0), ("device", 2.0),
                                              ("host", -2.0)])
def test_measured_overshoot_with_the_proposals_b_matches_the_prediction(
        tmp_path: Path, loop: str, offset: float) -> None:
    plant = sopdt(0.25, 0.6, 0.08, 0.05 + (TICK if loop == "host" else 0.0))  # host: 1 tick late
    spec = design.DesignSpec(ts=TICK, step_size=1.0, output_limit=60.0)
    prop = next(p for p in design.propose(None, None, plant, spec) if p.name == "robust-pi")
    assert prop.setpoint_weight < 1.0  # b = 1 would overshoot beyond 10 %
    pf = tmp_path / "plant.toml"
    pf.write_text(PLANT_TOML.replace("{offset}", repr(offset)))
    cfg = with_overrides(load_config(None), {"safety.output_limit": 60.0,
                                             "safety.pv_window": 3.0, "safety.watchdog": 2.0})
    opts = RunOptions(port="sim", yes=True, out_dir=tmp_path / "out", plant=str(pf), speed=5.0,
                      keys=False, verb="step", stdout=open("/dev/null", "w"))  # noqa: SIM115
    plan = StepPlan(size=1.0, hold_time=0.3, timeout=6.0,
                    min_record=float(prop.predicted["settling_time"]))
    run = PoweredRun(cfg, opts)
    with run:
        run.arm()
        o = run_step(run, StepCandidate(prop.name, prop.gains, dict(prop.predicted)),
                     StepSettings(plan, loop=loop, output_limit=60.0,
                                  setpoint_weight=prop.setpoint_weight))
    run.end_session()
    assert o.pid.setpoint_weight == prop.setpoint_weight
    assert o.start_value == pytest.approx(offset, abs=1e-6)
    assert o.metrics is not None
    # within 3 percentage points of the prediction (tick timing of the step instant)
    assert o.metrics.overshoot == pytest.approx(float(prop.predicted["overshoot"]), abs=3.0)
    assert o.metrics.overshoot <= design.DEFAULT_OVERSHOOT_TARGET + 3.0
