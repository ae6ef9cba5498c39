"""The one job orchestration (autotune.job.job) on the mock device process: stage after stage
in one powered run and one session file, without a drop in the output where the operator is
not asked (a loaded axis must not fall between the relay and the step)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from autotune.config import config_from_dict
from autotune.job.job import Quiet, TuningJob
from autotune.job.requests import BoardRequest, JobRequest
from autotune.recorder import read_session

# An integrating axis (an arm's angle under gravity, invented numbers): angle rate 20 degrees/s
# per output unit through a 0.1 s lag, 20 ms dead time, a constant load of 1.2 output units
# (about 15 % of the relay amplitude the run ends with).
LOADED_ARM = """
[plant]
num = [20.0]
den = [0.1, 1.0, 0.0]
delay = 0.02
load = -1.2  # output units at the plant input (gravity)
[device]
period = 0.01
name = "loaded-arm"
"""


def test_relay_to_step_without_a_drop_in_the_output(tmp_path: Path) -> None:
    plant = tmp_path / "arm.toml"
    plant.write_text(LOADED_ARM)
    cfg = config_from_dict({
        # the operator's guess of the holding output (1.0 against a load of 1.2): the relay
        # balances the rest
        "safety": {"output_limit": 30.0, "pv_window": 30.0, "watchdog": 2.0},
        "relay": {"target_amplitude": 3.0, "bias": 1.0, "max_cycles": 60},
        "step": {"size": 4.0, "retries": 0},
    }, "arm.toml")
    req = JobRequest(cfg=cfg, board=BoardRequest("sim", str(plant), 5.0, None, 3),
                     out_dir=tmp_path / "out", verb="tune", yes=True)
    outcome = TuningJob(req, Quiet()).run()
    assert outcome.stop_confirmed is True
    assert outcome.steps, (outcome.reason, outcome.message)
    s = read_session(tmp_path / "out" / "session.jsonl")
    relay = np.flatnonzero(s.phase_mask("relay"))
    step = np.flatnonzero(s.phase_mask("step"))
    assert relay.size and step.size
    # from the relay's last sample to the step's first, no sample shows zero output (the load
    # would make the arm fall)
    between = slice(relay[-1] + 1, step[0])
    hold = s.out[between]
    assert hold.size > 0
    assert np.all(hold != 0.0)
    # the loop holds under a proportional loop at the relay centre: the arm stops moving once
    # it has coasted out of the relay's last swing (a few lags of 0.1 s), and the output it
    # settles at is what carries the load (1.2 output units)
    t, pv = s.t[between], s.pv[between]
    late = t >= t[0] + 0.5
    assert late.sum() >= 5
    rate = abs(np.polyfit(t[late], pv[late], 1)[0])
    assert rate < 0.1 * 24.0, rate  # it falls at 20 x 1.2 = 24 degrees/s unpowered
    assert abs(float(np.mean(hold[late])) - 1.2) < 0.15, float(np.mean(hold[late]))
    kinds = [e.get("kind") for e in s.events]
    assert "halted" not in kinds  # nobody was asked, so the motor never stopped between stages
    assert s.reason in ("completed", "step:not_met", "step:not_judged")


def test_a_host_loop_the_link_cannot_carry_is_refused_before_power(tmp_path: Path) -> None:
    """A 1 ms tick on a 115200-baud link cannot carry a sample and an output frame every tick
    (protocol.budget): refused with the figures, the device loop proposed, nothing powered."""
    import subprocess
    import sys

    plant = tmp_path / "fast.toml"
    plant.write_text("[plant]\nnum = [2.0]\nden = [0.5, 1.0]\ndelay = 0.02\n"
                     "[device]\nperiod = 0.001\n")
    out = tmp_path / "out"
    p = subprocess.run([sys.executable, "-m", "autotune", "tune", "--port", "sim", "--plant",
                        str(plant), "--loop", "host", "--yes", "--out", str(out)],
                       capture_output=True, text=True, timeout=60, stdin=subprocess.DEVNULL)
    assert p.returncode == 2, p.stderr
    line = p.stderr.strip().splitlines()[-1]
    assert "use --loop device" in line and "B/s" in line
    assert not (out / "session.jsonl").exists()  # never armed: nothing was powered
