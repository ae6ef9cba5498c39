"""`autotune tune --yes` runs the confirmation step with the default proposal after the
proposals, through the real mock device process (cart-wheel scenario); --no-step skips it."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

from autotune.recorder import read_session


def _tune(out: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    # a generous watchdog (device time): at --speed 10 the default 0.5 s is 50 ms of wall clock,
    # which a busy test machine may take from the host between two heartbeats
    cfg = out.parent / "tune.toml"
    cfg.write_text("[safety]\nwatchdog = 2.0\n")
    return subprocess.run([sys.executable, "-m", "autotune", "tune", "--port", "sim", "--plant",
                           "cart-wheel", "--yes", "--speed", "10", "--seed", "2", "--config",
                           str(cfg), "--out", str(out), *extra], capture_output=True, text=True,
                          timeout=240)


def test_tune_yes_runs_the_step_and_writes_gains(tmp_path: Path) -> None:
    out = tmp_path / "run"
    proc = _tune(out)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    res = json.loads((out / "result.json").read_text())
    default = next(p for p in res["proposals"] if p.get("default"))
    step = res["step"]
    assert step is not None and res["step_end_reasons"][-1] == "completed"
    # contract: measured overshoot (percent), rise_time, settling_time (s), iae
    for key in ("overshoot", "rise_time", "settling_time", "iae"):
        assert isinstance(step[key], float)
    gains = tomllib.loads(Path(res["gains_file"]).read_text())["gains"]
    # the gains of the step that met the spec: the default proposal's, or the gentler design
    # tried after it
    assert (gains["kp"], gains["ki"], gains["kd"]) == (step["gains"]["kp"], step["gains"]["ki"],
                                                       step["gains"]["kd"])
    assert res["step_attempts"][0]["proposal"] == default["name"]
    # one session for the whole job: the relay and the step, stage by stage
    s = read_session(out / "session.jsonl")
    assert s.phase_mask("relay").any() and s.phase_mask("step").any()
    assert not (out / "step").exists()
    assert f"with {default['name']}" in proc.stdout


def test_tune_no_step(tmp_path: Path) -> None:
    out = tmp_path / "run"
    proc = _tune(out, "--no-step")
    assert proc.returncode == 0, proc.stderr[-2000:]
    res = json.loads((out / "result.json").read_text())
    assert "step" not in res and not (out / "step").exists()
