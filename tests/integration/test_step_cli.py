"""`autotune step` end to end: the simulated board on a real pty, the real command line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import control
import numpy as np
import pexpect
import pytest

from autotune.core.pid import PidGains
from autotune.gainsfile import read_gains_file
from autotune.recorder import read_session
from tests.integration.test_step_loop import PLANT_TOML, TICK

CMD = [sys.executable, "-m", "autotune", "step"]
REPO = Path(__file__).resolve().parents[2]


@pytest.fixture
def plant_file(tmp_path: Path) -> str:
    p = tmp_path / "plant.toml"
    p.write_text(PLANT_TOML)
    return str(p)


@pytest.fixture
def config_file(tmp_path: Path) -> str:
    """A device watchdog of 2 s (device time): at --speed 5 that is 0.4 s of wall clock, so a
    busy test machine does not trip it (the watchdog has its own tests)."""
    p = tmp_path / "config.toml"
    p.write_text("[safety]\nwatchdog = 2.0\n")
    return str(p)


def _step(*args: str, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run([*CMD, *args], cwd=REPO, capture_output=True, text=True,
                          timeout=timeout, stdin=subprocess.DEVNULL)


def test_accepted_step_writes_result_and_gains(plant_file: str, config_file: str,
                                               tmp_path: Path) -> None:
    out = tmp_path / "run"
    p = _step("--port", "sim", "--config", config_file, "--plant", plant_file, "--speed", "5", "--yes", "--out", str(out),
              "--kp", "2", "--ki", "10", "--kd", "0.01", "--size", "1.5", "--hold", "0.2",
              "--timeout", "4", "--output-limit", "60", "--max-overshoot", "60",
              "--max-settling-time", "3", "--loop", "device")
    assert p.returncode == 0, p.stderr
    res = json.loads((out / "result.json").read_text())
    step = res["step"]
    for key in ("overshoot", "rise_time", "settling_time", "iae", "predicted"):
        assert key in step
    assert step["verdict"]["passed"] and step["loop"] == "device"
    # The gains file parses back to the same gains.
    rec = read_gains_file(out / "gains.toml")
    assert rec.gains == PidGains(2.0, 10.0, 0.01)
    assert rec.period == pytest.approx(TICK) and rec.loop_mode == "device"
    assert rec.measured["overshoot"] == pytest.approx(step["overshoot"])
    assert rec.origin["session"].endswith("session.jsonl")
    assert "KI_TS = 0.1" in p.stdout  # ki * ts = 10 * 0.01 (code-ready block)
    # python-control: step_info on the recorded session arrays of the step phase.
    s = read_session(out / "session.jsonl")
    seg = step["segments"][0]
    m = (s.t >= seg["t_start"] - 1e-9) & (s.t <= seg["t_end"] + 1e-9)
    t, y = s.t[m] - seg["t_start"], s.pv[m] - seg["sp_before"]
    info = control.step_info(y, t, yfinal=1.5)
    assert step["overshoot"] == pytest.approx(info["Overshoot"], abs=1e-6)
    assert abs(step["rise_time"] - info["RiseTime"]) <= TICK + 1e-9
    assert abs(step["settling_time"] - info["SettlingTime"]) <= TICK + 1e-9
    assert s.end is not None and s.end["reason"] == "completed"


RESULT = {"proposals": [
    {"name": "simc-pi", "kp": 1.0, "ki": 2.0, "kd": 0.0, "predicted": {"overshoot": 1.0}},
    {"name": "zn-pi", "kp": 2.0, "ki": 10.0, "kd": 0.0, "default": True,
     "predicted": {"overshoot": 26.0, "settling_time": 0.7}},
], "model": {"kind": "fopdt", "params": {"gain": 2.0, "time_constant": 0.5, "delay": 0.05}}}


def test_from_result_and_automatic_detune(plant_file: str, config_file: str,
                                          tmp_path: Path) -> None:
    (tmp_path / "tune.json").write_text(json.dumps(RESULT))
    out = tmp_path / "run"
    p = _step("--port", "sim", "--config", config_file, "--plant", plant_file, "--speed", "5",
              "--yes", "--out", str(out), "--from-result", str(tmp_path / "tune.json"), "--size", "1", "--hold", "0.2",
              "--timeout", "4", "--output-limit", "60", "--max-overshoot", "5", "--retries", "2")
    res = json.loads((out / "result.json").read_text())
    attempts = res["step_attempts"]
    assert attempts[0]["proposal"] == "zn-pi"
    assert attempts[0]["predicted"]["overshoot"] == 26.0
    assert len(attempts) >= 2
    # a detune is a new design at a lower Ms target on the result's model, with its own
    # prediction, not a factor on the gains
    assert "-ms1." in attempts[1]["proposal"]
    assert attempts[1]["predicted"]["overshoot"] < attempts[0]["predicted"]["overshoot"]
    assert attempts[1]["predicted"]["ms"] <= 1.4 + 0.05
    # every attempt ran (the host was busy designing the detunes while samples queued: each
    # step judges only the samples that came after its own PID start) and the overshoot
    # falls with each detune
    assert all(a.get("end_reason") == "completed" for a in attempts), attempts
    over = [a["overshoot"] for a in attempts]
    assert all(v is not None for v in over), attempts
    assert all(b < a for a, b in zip(over, over[1:], strict=False)), over
    if attempts[-1]["verdict"]["passed"]:
        assert p.returncode == 0 and (out / "gains.toml").exists()
    else:
        assert p.returncode == 1 and "misses the spec" in p.stderr


def test_abort_key_stops_within_two_ticks(plant_file: str, tmp_path: Path) -> None:
    out = tmp_path / "run"
    child = pexpect.spawn(CMD[0], [*CMD[1:], "--port", "sim", "--plant", plant_file, "--speed",
                                   "1", "--yes", "--out", str(out), "--kp", "1", "--ki", "2",
                                   "--size", "1", "--hold", "0.3", "--timeout", "10",
                                   "--output-limit", "60", "--loop", "device",
                                   "--view", "lines"],
                          cwd=str(REPO), encoding="utf-8", timeout=30)
    child.expect(r"step \+1 PV units")
    # Into the step (hold 0.3 s, then the PV rises slowly with these gains), then abort.
    child.expect(pexpect.TIMEOUT, timeout=0.8)
    child.send(" ")
    child.expect(pexpect.EOF, timeout=20)
    child.close()
    assert child.exitstatus == 3, child.before
    s = read_session(out / "session.jsonl")
    assert s.end is not None and s.end["reason"] == "aborted"
    req = next(e for e in s.events if e["kind"] == "stop_request")
    assert req["reason"] == "aborted"
    t_req = req["t"]
    step_samples = s.extra["step"] == "step"
    assert np.any(step_samples & (s.t <= t_req)), "abort came before the step started"
    after = np.nonzero((s.t > t_req) & (s.out == 0.0))[0]
    assert after.size
    assert s.t[after[0]] - t_req <= 2 * TICK + 1e-9
    res = json.loads((out / "result.json").read_text())
    assert res["end_reason"] == "aborted" and res["step"]["end_reason"] == "aborted"
    assert not (out / "gains.toml").exists()


def test_usage_errors_are_one_line() -> None:
    p = _step("--port", "sim", "--size", "1", "--yes")
    assert p.returncode == 2
    assert p.stderr.strip().count("\n") == 0 and "no gains given" in p.stderr


def test_interactive_detune_then_accept(plant_file: str, config_file: str,
                                        tmp_path: Path) -> None:
    (tmp_path / "tune.json").write_text(json.dumps(RESULT))
    out = tmp_path / "run"
    child = pexpect.spawn(CMD[0], [*CMD[1:], "--port", "sim", "--config", config_file, "--plant", plant_file, "--speed",
                                   "5", "--out", str(out), "--from-result",
                                   str(tmp_path / "tune.json"), "--view", "lines",
                                   "--size", "1", "--hold", "0.2", "--timeout", "4",
                                   "--output-limit", "60", "--max-overshoot", "10",
                                   "--store"],
                          cwd=str(REPO), encoding="utf-8", timeout=40)
    child.expect("Type yes and Enter")
    child.sendline("yes")
    child.expect(r"NOT MET.*\(suggested: detune\)")
    child.expect(r"\[d\]etune")
    child.sendline("d")
    child.expect("run the gentler design")  # the detuned design and its prediction first ...
    child.expect("Type yes and Enter")  # ... then the same confirmation as the first start
    child.sendline("yes")
    child.expect(r"\[a\]ccept")
    child.sendline("a")
    child.expect("gains stored on the board")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0, child.before
    res = json.loads((out / "result.json").read_text())
    attempts = res["step_attempts"]
    assert [a["gains"]["kp"] for a in attempts][0] == pytest.approx(2.0)
    assert "-ms1." in attempts[1]["proposal"]
    assert attempts[1]["overshoot"] < attempts[0]["overshoot"]
    rec = read_gains_file(out / "gains.toml")
    g1 = attempts[1]["gains"]
    assert (rec.gains.kp, rec.gains.ki) == pytest.approx((g1["kp"], g1["ki"]))
    # one session file for both attempts, the motor stopped while the operator decided
    assert rec.origin["session"] == str(out / "session.jsonl")
    s = read_session(out / "session.jsonl")
    kinds = [e["kind"] for e in s.events]
    assert kinds.count("step_start") == 2 and "halted" in kinds and "gains_stored" in kinds
