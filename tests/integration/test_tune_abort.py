"""`autotune tune` as its own process: the abort key in a real terminal, and a host killed
mid-relay (the device's watchdog must stop the motor on its own)."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pexpect
import pytest

from autotune.errors import EXIT_ABORTED, EXIT_USAGE
from autotune.recorder import SessionFileError, read_session
from protocol.messages import FaultCode, Stream

REPO = Path(__file__).resolve().parents[2]
TICK = 0.01  # s
CMD = [sys.executable, "-m", "autotune", "tune"]


def write_plant(tmp_path: Path) -> Path:
    """A quick FOPDT loop: period of the relay cycle about 0.35 s."""
    p = tmp_path / "quick.toml"
    p.write_text(f"""
[plant]
num = [1.0]
den = [0.3, 1.0]
delay = 0.1
[device]
period = {TICK}
""")
    return p


def write_config(tmp_path: Path, watchdog: float = 0.5) -> Path:
    p = tmp_path / "tune.toml"
    p.write_text(f"""
[safety]
output_limit = 10.0
pv_window = 5.0
watchdog = {watchdog}
[relay]
start_amplitude = 3.0
target_amplitude = 0.8
hysteresis = 0.0
max_cycles = 200
min_cycles = 190
max_time = 100.0
[prechecks]
rest_time = 0.3
pulse_size = 2.0
""")
    return p


def env() -> dict[str, str]:
    return dict(os.environ, PYTHONUNBUFFERED="1", COLUMNS="100")


def test_space_aborts_and_device_reports_zero_within_two_ticks(tmp_path: Path) -> None:
    out = tmp_path / "run"
    args = ["--port", "sim", "--plant", str(write_plant(tmp_path)), "--speed", "1",
            "--config", str(write_config(tmp_path)), "--out", str(out), "--view", "lines"]
    child = pexpect.spawn(CMD[0], CMD[1:] + args, cwd=str(tmp_path), env=env(), timeout=30,
                          encoding="utf-8")
    try:
        child.expect("robot is on blocks")
        child.expect("Type yes and Enter")
        child.sendline("yes")
        child.expect(r"\nrelay ")  # the relay's lines
        child.expect(r"\nrelay +2 ")  # the row of cycle 2 in the per-cycle table
        child.send(" ")
        child.expect(pexpect.EOF)
    finally:
        child.close(force=True)
    assert child.exitstatus == EXIT_ABORTED, child.before
    s = read_session(out / "session.jsonl")
    assert s.warnings == []  # complete: every line whole, end record present
    assert s.reason == "aborted"
    assert "abort key (space)" in s.end["message"]
    assert s.end["stop_confirmed"] is True
    stop = next(e for e in s.events if e["kind"] == "stop_request")
    t_abort = stop["t"]
    assert s.phase_mask("relay")[s.t <= t_abort].any()  # the key came during the relay
    after = np.nonzero((s.t > t_abort) & (s.out == 0.0))[0]
    assert after.size > 0
    t_zero = s.t[after[0]]
    assert t_zero - t_abort <= 2 * TICK + 1e-9
    # samples are complete (one every tick) up to the stop, and zero from the stop on
    k = int(np.searchsorted(s.t, t_zero))
    np.testing.assert_allclose(np.diff(s.t[: k + 1]), TICK, atol=1e-6)
    assert np.all(s.out[k:] == 0.0)


def test_refuses_without_terminal_or_yes(tmp_path: Path) -> None:
    proc = subprocess.run(CMD + ["--port", "sim", "--plant", str(write_plant(tmp_path)),
                                 "--out", str(tmp_path / "run")],
                          stdin=subprocess.DEVNULL, capture_output=True, text=True,
                          cwd=str(tmp_path), env=env(), timeout=60)
    assert proc.returncode == EXIT_USAGE
    err = proc.stderr.strip().splitlines()
    assert len(err) == 1 and "refusing to power the motor" in err[0] and "--yes" in err[0]
    assert "robot is on blocks" in proc.stdout  # the cautions were shown first
    assert not (tmp_path / "run" / "session.jsonl").exists()  # nothing was powered


def relay_started(path: Path) -> bool:
    try:
        s = read_session(path)
    except SessionFileError:
        return False
    return int(s.phase_mask("relay").sum()) > 100


def test_killed_host_device_watchdog_zeroes_output(tmp_path: Path, mock_device: Any,
                                                    open_link: Any) -> None:
    speed, watchdog = 2.0, 0.5
    dev = mock_device(str(write_plant(tmp_path)), speed=speed)
    out = tmp_path / "run"
    proc = subprocess.Popen(CMD + ["--port", dev.port, "--speed", str(speed), "--yes",
                                   "--config", str(write_config(tmp_path, watchdog)),
                                   "--out", str(out)],
                            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, cwd=str(tmp_path), env=env())
    try:
        deadline = time.monotonic() + 30
        while not relay_started(out / "session.jsonl"):
            assert proc.poll() is None, "the tool ended before the relay ran"
            assert time.monotonic() < deadline, "the relay did not start"
            time.sleep(0.05)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    # the session file parses up to its last flush
    s = read_session(out / "session.jsonl")
    assert s.end is None
    assert any("no end record" in w for w in s.warnings)
    assert s.phase_mask("relay").sum() > 100
    t_last = float(s.t[-1])
    assert np.any(s.out[s.phase_mask("relay")] != 0.0)
    # a fresh link to the still-running device: the watchdog has latched and the output is 0
    time.sleep(4 * watchdog / speed)
    link = open_link(dev.port, speed=speed)
    link.handshake()
    link.request(Stream(0, 1, 1))
    samples = [link.next_sample(timeout=2.0) for _ in range(10)]
    assert all(r is not None for r in samples)
    assert all(r.output == 0.0 and r.fault_latched for r in samples)
    faults = link.poll_faults()
    assert faults, "the device reports its latched fault again on reconnect"
    f = faults[0]
    assert f.code == FaultCode.WATCHDOG
    # latched when the host had been silent for the watchdog period (within one tick)
    assert watchdog - 1e-6 <= f.value <= watchdog + TICK + 1e-6
    assert f.t > t_last  # after the last sample the host recorded
    link.close()
    # the next run on the same board finds the stale fault, clears it and runs
    cfg2 = tmp_path / "short.toml"
    cfg2.write_text("[safety]\nwatchdog = 2.0\nmax_duration = 2.0\n[relay]\n"
                    "start_amplitude = 3.0\ntarget_amplitude = 0.8\n"
                    "[prechecks]\nrest_time = 0.3\npulse_size = 2.0\n")
    out2 = tmp_path / "run2"
    proc2 = subprocess.run(CMD + ["--port", dev.port, "--speed", str(speed), "--yes",
                                  "--config", str(cfg2), "--out", str(out2)],
                           stdin=subprocess.DEVNULL, capture_output=True, text=True,
                           cwd=str(tmp_path), env=env(), timeout=60)
    assert "fault latched from before (watchdog); cleared it" in proc2.stdout
    s2 = read_session(out2 / "session.jsonl")
    assert s2.header["stale_faults_cleared"] == ["watchdog"]
    assert s2.phase_mask("relay").any() and s2.end["stop_confirmed"] is True
    assert s2.reason == "limit:duration"  # this short run ends on its duration limit


def test_cli_sim_run_writes_contract_files(tmp_path: Path) -> None:
    """End to end on the built-in cart-wheel scenario: exit 0, session.jsonl, result.json with
    the contract's fields, the CSV export, and an ultimate point near the plant's own."""
    import control as ct

    out = tmp_path / "run"
    cfg = tmp_path / "tune.toml"
    # a generous watchdog (device time): a busy test machine may starve the host for tens of
    # milliseconds, many ticks of a device running ten times faster than real time
    cfg.write_text("[safety]\nwatchdog = 2.0\n")
    proc = subprocess.run(CMD + ["--port", "sim", "--yes", "--speed", "10", "--out", str(out),
                                 "--csv", "--config", str(cfg), "--max-cycles", "40"],
                          stdin=subprocess.DEVNULL, capture_output=True, text=True,
                          cwd=str(tmp_path), env=env(), timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "\nrelay " in proc.stdout and "identified Ku" in proc.stdout
    s = read_session(out / "session.jsonl")
    # one session for the whole job: relay, analysis, the confirmation step (accepted)
    assert s.reason == "completed" and s.warnings == []
    assert s.phase_mask("relay").any() and s.phase_mask("step").any()
    assert s.header["loop_mode"] == "device"
    result = json.loads((out / "result.json").read_text())
    for key in ("ultimate_gain", "ultimate_period", "ultimate_gain_df", "ultimate_period_df",
                "static_gain", "velocity_gain", "normalized_dead_time", "dead_zone",
                "powered_time", "powered_time_tu", "uncertainty", "model", "cycles_used",
                "proposals", "relay", "end_reason"):
        assert key in result, key
    assert result["end_reason"] == "converged"
    assert set(result["relay"]) >= {"amplitude", "hysteresis", "bias"}
    assert result["proposals"] and {"name", "kp", "ki", "kd", "predicted"} <= set(
        result["proposals"][0])
    # cart-wheel: 0.25 exp(-0.05 s) / ((0.6 s + 1)(0.08 s + 1)); the ultimate point of the
    # continuous plant from python-control (delay as a 10th-order Pade approximant); the
    # analysis's own accuracy is tested elsewhere, this checks the hand-off (10%)
    g = ct.tf([0.25], [0.048, 0.68, 1.0]) * ct.tf(*ct.pade(0.05, 10))
    gm, _, wcg, _ = ct.margin(g)
    assert result["ultimate_gain"] == pytest.approx(gm, rel=0.10)
    assert result["ultimate_period"] == pytest.approx(2 * np.pi / wcg, rel=0.10)
    rows = (out / "session.csv").read_text().splitlines()
    assert rows[0].startswith("t,pv,out,sp") and len(rows) == s.t.size + 1
