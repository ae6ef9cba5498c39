"""The host's own failures (issue 18), against the mock device process over a real pty: a full
disk, a slow link, a request retried while the checks must go on, signals at every phase, a
killed tool. The stop path runs first and whole in every case; what was measured is kept and
said; the simulated board never outlives the tool.

Timing is read in device ticks from the session record (never the wall clock)."""

from __future__ import annotations

import json
import os
import resource
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pexpect

from autotune.errors import EXIT_ABORTED, EXIT_FAILED, EXIT_OK
from autotune.recorder import SessionFileError, read_session
from tests.integration.test_faults_link import TICK, run_faulty

REPO = Path(__file__).resolve().parents[2]
CMD = [sys.executable, "-m", "autotune", "tune"]


def env() -> dict[str, str]:
    return dict(os.environ, PYTHONUNBUFFERED="1", COLUMNS="100")


def quick_plant(tmp_path: Path) -> Path:
    """A quick loop (relay period about 0.35 s) in a file whose path names this test: the
    simulated board's command line carries it, so the test can find the board's process."""
    p = tmp_path / "quick-plant.toml"
    p.write_text(f"[plant]\nnum = [1.0]\nden = [0.3, 1.0]\ndelay = 0.1\n[device]\n"
                 f"period = {TICK}\n")
    return p


def quick_config(tmp_path: Path, **safety: float) -> Path:
    p = tmp_path / "tune.toml"
    lines = ["[safety]", "output_limit = 10.0", "pv_window = 5.0", "watchdog = 2.0"]
    lines += [f"{k} = {v}" for k, v in safety.items()]
    lines += ["[relay]", "start_amplitude = 3.0", "target_amplitude = 0.8", "max_cycles = 400",
              "min_cycles = 390", "max_time = 200.0", "[prechecks]", "rest_time = 0.3",
              "pulse_size = 2.0"]
    p.write_text("\n".join(lines) + "\n")
    return p


def boards_started_with(token: str) -> list[int]:
    """Process ids of running mock devices whose command line holds `token`."""
    pids = []
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        try:
            cmd = (d / "cmdline").read_bytes().split(b"\0")
            state = (d / "stat").read_text().split()[2]
        except OSError:
            continue
        text = [c.decode(errors="replace") for c in cmd]
        if state != "Z" and "mock_device" in text and any(token in c for c in text):
            pids.append(int(d.name))
    return pids


def wait_gone(token: str, timeout: float = 10.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not boards_started_with(token):
            return True
        time.sleep(0.05)
    return not boards_started_with(token)


def relay_running(path: Path, samples: int = 50) -> bool:
    try:
        s = read_session(path)
    except SessionFileError:
        return False
    return int(s.phase_mask("relay").sum()) > samples


def start_tune(tmp_path: Path, out: Path, *extra: str,
               preexec: object = None) -> subprocess.Popen[str]:
    return subprocess.Popen(
        CMD + ["--port", "sim", "--plant", str(quick_plant(tmp_path)), "--speed", "5", "--yes",
               "--config", str(quick_config(tmp_path)), "--out", str(out), "--view", "lines",
               *extra],
        stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        cwd=str(tmp_path), env=env(), preexec_fn=preexec)  # type: ignore[arg-type]


def test_full_disk_stops_the_motor_first_then_says_so(tmp_path: Path) -> None:
    """The session file hits a file-size limit during the relay (a full disk): the stop
    sequence still runs whole (zero output confirmed), then one line says the file could not
    be written and that the motor is stopped; no traceback; the board process ends too."""
    limit = 96 * 1024  # bytes: the header and about 700 samples

    def small_disk() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # writes fail with EFBIG instead
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    out = tmp_path / "run"
    proc = start_tune(tmp_path, out, preexec=small_disk)
    stdout, stderr = proc.communicate(timeout=120)
    assert "Traceback" not in stderr, stderr
    assert proc.returncode == EXIT_FAILED, (stdout, stderr)
    last = stderr.strip().splitlines()[-1]
    assert "the session file could not be written: file too large" in last
    assert "the motor is stopped" in last
    assert "CUT THE MOTOR POWER" not in stderr
    # the file holds everything up to the limit, readable (its last line may be cut)
    s = read_session(out / "session.jsonl")
    assert s.phase_mask("relay").any()
    assert (out / "session.jsonl").stat().st_size <= limit
    assert wait_gone(str(tmp_path))


def test_slow_link_is_stopped_without_a_false_alarm(tmp_path: Path) -> None:
    """0.3 s of wall-clock latency on every frame from the board (device loop): each Stop
    request is resent with its own sequence number kept, the late Stopped reply still counts,
    and the samples confirm zero output: no alarm, the run's own ending."""
    speed = 2.0
    outcome, tr, s = run_faulty(tmp_path, f"latency={0.3 * speed:g}",
                                {"connection": {"loop": "device"},
                                 "relay": {"max_cycles": 3, "min_cycles": 3}}, speed=speed)
    assert outcome.reason in ("converged", "max_cycles"), (outcome.reason, outcome.message)
    assert outcome.exit_code in (EXIT_OK, EXIT_FAILED)
    assert outcome.stop_confirmed is True
    assert tr.run.alarm is None
    assert tr.run.link.stats().rtt_median > 0.3  # the link really was that slow
    done = next(e for e in s.events if e["kind"] == "stopped")
    assert done["answered"] is True and done["by_watchdog"] is False
    assert np.all(s.out[s.t >= done["t_zero"]] == 0.0)


def test_checks_go_on_while_a_request_is_retried(tmp_path: Path) -> None:
    """The board acts on StartRelay but never answers it, so the runner sits in its retries;
    the host checks still run on every sample: the duration limit stops the run on the very
    first sample past it, and that decision is on the newest sample the host had (at most one
    tick old), taken while StartRelay was being retried."""
    max_duration = 6.0  # device s: reached during the StartRelay retries (7 x 0.25 s wall)
    outcome, tr, s = run_faulty(tmp_path, "no_ack=StartRelay",
                                {"connection": {"loop": "device"},
                                 "safety": {"max_duration": max_duration}})
    assert outcome.reason == "limit:duration", (outcome.reason, outcome.message)
    # the message says what to do: the limit's name, and at a simulated speed above 1 that the
    # host's own work takes that many times as much device time
    assert "safety.max_duration" in outcome.message
    assert ("lower --speed" in outcome.message) == (tr.run.speed > 1.0)
    assert outcome.stop_confirmed is True
    stop = next(e for e in s.events if e["kind"] == "stop_request")
    assert stop["during_request"] == "StartRelay"
    assert stop["t_newest"] - stop["t"] <= TICK + 1e-9
    t_start = s.header["t_start"]
    before = s.t[s.t < stop["t"]]
    assert stop["t"] - t_start > max_duration >= before[-1] - t_start
    # every tick recorded while the request was retried: nothing paused the sample loop
    relay = s.t[s.phase_mask("relay") & (s.t <= stop["t"])]
    assert relay.size > 0 and np.allclose(np.diff(relay), TICK, atol=1e-6)
    # and the board relayed (it acted on the unanswered request) until the host's stop
    assert np.any(s.out[s.phase_mask("relay")] != 0.0)


def test_killed_tool_takes_its_simulated_board_with_it(tmp_path: Path) -> None:
    out = tmp_path / "run"
    proc = start_tune(tmp_path, out)
    try:
        deadline = time.monotonic() + 60
        while not relay_running(out / "session.jsonl"):
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "the relay did not start"
            time.sleep(0.05)
        assert boards_started_with(str(tmp_path))
        os.kill(proc.pid, signal.SIGKILL)
        proc.communicate(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert wait_gone(str(tmp_path))


def test_signals_during_the_relay_stop_exit_3_and_keep_the_result(tmp_path: Path) -> None:
    """SIGTERM, then (another run) SIGINT during the relay: the stop path runs, the exit code
    is the README's 3, result.json holds the relay figures measured so far, and the last line
    says why and that they were kept."""
    for sig in (signal.SIGTERM, signal.SIGINT):
        out = tmp_path / f"run-{sig.name}"
        proc = start_tune(tmp_path, out, "--no-step")
        try:
            deadline = time.monotonic() + 60
            while not relay_running(out / "session.jsonl", samples=300):
                assert proc.poll() is None, proc.communicate()
                assert time.monotonic() < deadline, "the relay did not start"
                time.sleep(0.05)
            proc.send_signal(sig)
            stdout, stderr = proc.communicate(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.communicate()
        assert proc.returncode == EXIT_ABORTED, (sig, stdout, stderr)
        assert "Traceback" not in stderr
        last = stderr.strip().splitlines()[-1]
        assert f"{sig.name} received" in last and "kept" in last, last
        s = read_session(out / "session.jsonl")
        assert s.reason == "aborted" and s.end["stop_confirmed"] is True and not s.warnings
        result = json.loads((out / "result.json").read_text())
        assert result["end_reason"] == "aborted" and result["cycles"]
        assert str(out / "result.json") in stdout
        assert wait_gone(str(tmp_path))


def test_sigterm_at_the_prompt_exits_3(tmp_path: Path) -> None:
    """A signal while the tool waits for the operator's confirmation: nothing was powered,
    exit 3, one line, the board process ends with the tool."""
    child = pexpect.spawn(CMD[0], CMD[1:] + [
        "--port", "sim", "--plant", str(quick_plant(tmp_path)), "--view", "lines",
        "--config", str(quick_config(tmp_path)), "--out", str(tmp_path / "run")],
        cwd=str(tmp_path), env=env(), timeout=30, encoding="utf-8")
    try:
        child.expect("Type yes and Enter")
        child.kill(signal.SIGTERM)
        child.expect(pexpect.EOF)
    finally:
        child.close(force=True)
    assert child.exitstatus == EXIT_ABORTED, child.before
    assert "SIGTERM received: stopped" in child.before
    assert "Traceback" not in child.before
    assert not (tmp_path / "run" / "session.jsonl").exists()
    assert wait_gone(str(tmp_path))


def test_signal_during_the_analysis_keeps_the_analysis(tmp_path: Path) -> None:
    """SIGTERM arrives (a real signal, sent to this process) the moment the analysis starts,
    while the output holds the relay's balanced bias: the motor is stopped at once, the job
    ends with exit 3, and the analysis that was under way is still written to result.json."""
    from dataclasses import replace

    from autotune.config import config_from_dict
    from autotune.core.progress import Phase
    from autotune.job.job import Quiet, TuningJob, tune_request
    from autotune.job.powered import RunOptions
    from autotune.job.signals import routed

    def on_update(snap: object) -> None:
        if getattr(snap, "phase", None) is Phase.ANALYSIS and not sent:
            sent.append(True)
            os.kill(os.getpid(), signal.SIGTERM)

    sent: list[bool] = []
    cfg = config_from_dict({"safety": {"watchdog": 10.0}}, "test.toml")
    out = tmp_path / "out"
    # a confirmation step follows: the analysis runs while the balanced bias holds
    req = replace(tune_request(cfg, RunOptions(port="sim", yes=True, out_dir=out, speed=20.0,
                                               keys=False)), confirm_step=True)
    job = TuningJob(req, Quiet(update=on_update))
    with routed():
        outcome = job.run()
    assert sent and outcome.exit_code == EXIT_ABORTED, (outcome.reason, outcome.message)
    s = read_session(out / "session.jsonl")
    assert s.end is not None and s.end["reason"] == "aborted"
    assert s.end["stop_confirmed"] is True and not s.warnings
    result = json.loads((out / "result.json").read_text())
    assert result["cycles"] and result.get("ultimate_gain")  # the analysis was kept
    assert job.run_ is not None and job.run_.sim is not None
    assert job.run_.sim.process.poll() is not None
