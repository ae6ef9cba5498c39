"""`autotune demo --plant drive-base --yes`: the plan of the two wheel loops of the built-in
drive base (invented numbers), run unattended against the simulated board: each loop's files
under OUT/<loop name>/, the summary beside them with the matched-loop report."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from autotune.commands.matched import RISE_MATCH, rise_spread

ROOT = Path(__file__).resolve().parents[2]


def test_rise_spread() -> None:
    # (largest - smallest) / smallest: 0.42 against 0.40 is 5 % (arithmetic)
    assert abs(rise_spread([0.40, 0.42]) - 0.05) < 1e-12
    assert rise_spread([0.4, float("nan")]) != rise_spread([0.4, float("nan")])  # nan
    assert RISE_MATCH == 0.05


def test_unattended_drive_base_demo_writes_every_loop_and_the_summary(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    proc = subprocess.run([sys.executable, "-m", "autotune", "demo", "--plant", "drive-base",
                           "--yes", "--view", "lines", "--speed", "4", "--seed", "1",
                           "--out", str(out)], cwd=str(ROOT), capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-2000:]
    assert "robot is on blocks" in proc.stdout  # the cautions, before each loop
    for loop in ("left", "right"):
        for name in ("session.jsonl", "result.json", "gains.toml"):
            assert (out / loop / name).is_file(), (loop, name)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit_code"] == 0
    assert [(lp["name"], lp["axis"]) for lp in summary["loops"]] == [("left", 0), ("right", 1)]
    matched = summary["matched"]
    assert matched["loops"] == ["left", "right"]
    assert matched["choice"] in ("common", "per-loop") and matched["reason"]
    assert [s["name"] for s in matched["comparison"]["sessions"]] == ["left", "right"]
    assert set(matched["models"]) == {"left", "right"}
    common = matched["common"]
    assert set(common["rise_time"]) == {"left", "right"}
    # the choice follows the rule: common only when the rise times agree within 5 %
    if matched["choice"] == "common":
        assert common["rise_spread"] <= RISE_MATCH
    else:
        assert set(matched["per_loop"]) == {"left", "right"}
        for lp in matched["per_loop"].values():
            assert {"kp", "ki", "kd", "rise_time", "ms", "matched"} <= set(lp)
    # which gains are matched, and their predicted rise-time spread
    match = matched["match"]
    assert match["gains"] == matched["choice"]
    if match["matched"]:
        assert match["rise_spread"] <= RISE_MATCH
    else:
        assert match["reason"] in matched["reason"]
    text = (out / "summary.txt").read_text()
    assert "matched loops: left, right" in text and "choice:" in text
    assert f"summary: {out / 'summary.json'}" in proc.stdout


PLAN = """
[safety]
watchdog = 2.0      # device time: room for a busy test machine at --speed
output_limit = 40.0
pv_window = 6.0
[relay]
target_amplitude = 0.4
[[loop]]
name = "left"
axis = 0
[[loop]]
name = "right"
axis = 1
"""


def test_tune_runs_the_plan_of_its_config(tmp_path: Path) -> None:
    cfg = tmp_path / "base.toml"
    cfg.write_text(PLAN)
    out = tmp_path / "tune"
    cmd = [sys.executable, "-m", "autotune", "tune", "--config", str(cfg), "--port", "sim",
           "--plant", "drive-base", "--yes", "--no-step", "--view", "lines", "--speed", "4",
           "--out", str(out)]
    proc = subprocess.run(cmd, cwd=str(ROOT), capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-2000:]
    for loop in ("left", "right"):
        result = json.loads((out / loop / "result.json").read_text())
        assert result["end_reason"] == "converged"
    summary = json.loads((out / "summary.json").read_text())
    assert [lp["reason"] for lp in summary["loops"]] == ["converged", "converged"]
    assert "matched" not in summary  # single loops: no comparison
    # --axis names one loop: with a plan it is refused, before anything is connected
    bad = subprocess.run([*cmd[:-2], "--out", str(tmp_path / "bad"), "--axis", "1"],
                         cwd=str(ROOT), capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2
    assert "--axis 1" in bad.stderr and "[[loop]] plan" in bad.stderr
