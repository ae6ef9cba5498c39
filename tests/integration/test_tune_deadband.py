"""`autotune tune` on the mast-pan scenario (integrating loop, 3-unit dead zone, quantised noisy
PV) through the real mock device process: the breakaway ramps measure the dead zone, the relay
converges, result.json records the deadband and the correction."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path


def test_mast_pan_converges_with_deadband_measured(tmp_path: Path) -> None:
    out = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-m", "autotune", "tune", "--port", "sim", "--plant",
                           "mast-pan", "--yes", "--speed", "10", "--seed", "1", "--out",
                           str(out)], capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    res = json.loads((out / "result.json").read_text())
    assert res["end_reason"] == "converged"
    assert len(res["cycles"]) <= 16
    db = res["deadband"]["deadband"]
    assert 2.4 <= db <= 3.6  # the scenario's dead zone is 3 (mock_device/scenarios/mast-pan.toml)
    assert res["relay"]["effective_amplitude"] == res["relay"]["amplitude"] - db
    assert res["relay"]["amplitude"] > db  # the relay ran above the dead zone
    assert res["prechecks"]["breakaway"]["method"] == "two_ramps"
