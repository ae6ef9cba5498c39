"""`autotune demo` driven by pexpect in a real pseudo-terminal, against the simulated board.

The demo starts the mock device process on a pty itself (autotune.simdevice); these tests are
the operator: they read the screens, press the keys, and check the files the job wrote.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pexpect = pytest.importorskip("pexpect")

from autotune.gainsfile import read_gains_file  # noqa: E402
from autotune.recorder import read_session  # noqa: E402
from autotune.ui.views import CUT_OFF  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
EXIT_ABORTED = 3


def terminal_env() -> dict[str, str]:
    """The environment of a terminal emulator, whatever the test runner's (CI may have none)."""
    env = {k: v for k, v in os.environ.items()
           if k not in ("COLUMNS", "LINES", "NO_COLOR", "FORCE_COLOR", "TERM")}
    env["TERM"] = "xterm-256color"
    return env


def spawn(*args: str, rows: int = 30, cols: int = 100) -> pexpect.spawn:
    return pexpect.spawn(sys.executable, ["-m", "autotune", "demo", *args], cwd=str(ROOT),
                         dimensions=(rows, cols), encoding="utf-8", timeout=90,
                         env=terminal_env())


def finish(child: pexpect.spawn) -> int:
    child.expect(pexpect.EOF)
    child.close()
    return child.exitstatus


def test_interactive_demo_start_relay_choose_step_accept(tmp_path: Path) -> None:
    out = tmp_path / "run"
    # speed 2: the demo's 1 s watchdog is then 0.5 s of wall clock, room for a busy machine
    child = spawn("--out", str(out), "--speed", "2")
    try:
        # the start screen: the board from its handshake, the cautions, the confirmation key
        child.expect("before the motor moves")
        child.expect("The robot is on blocks")
        child.expect("are no substitute for that cut-off")
        child.send("y")
        # the live relay view reaches convergence
        child.expect("relay cycle \\d+")
        child.expect("✓ converged")
        # the proposals: the Ms knob redesigns on the fitted model
        child.expect("gain choices")
        child.send("M")
        child.expect("proposals designed for Ms ≤ 1.45")
        child.send("m")
        child.expect("proposals designed for Ms ≤ 1.40")
        child.send("M")
        child.expect("proposals designed for Ms ≤ 1.45")
        # rows past the ninth have letter keys: c is the twelfth
        child.send("c")
        child.expect(r"chosen ([\w-]+)")
        twelfth = child.match.group(1)
        child.send("2")
        child.expect("chosen robust-pi")
        child.send("\r")  # Enter never starts the motor
        child.expect("Enter never starts the motor")
        child.send("s")  # asks to run the step: the confirmation screen, nothing powered yet
        child.expect("power the motor\\?")
        child.send("y")
        child.expect("step check")
        child.expect("PASS|NOT MET")
        child.send("a")
        child.expect("gains accepted: robust-pi")
        code = finish(child)
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code == 0
    result = json.loads((out / "result.json").read_text())
    # result.json holds the proposals as redesigned on the screen, not the first ones
    assert result["design_ms_target"] == 1.45
    assert result["proposals"][11]["name"] == twelfth
    chosen = next(p for p in result["proposals"] if p["name"] == "robust-pi")
    assert chosen["predicted"]["ms"] == pytest.approx(1.45, abs=0.02)
    rec = read_gains_file(out / "gains.toml")
    # the gains file holds the chosen proposal's gains as designed
    assert (rec.gains.kp, rec.gains.ki, rec.gains.kd) == (chosen["kp"], chosen["ki"],
                                                          chosen["kd"])
    assert rec.origin["proposal"] == "robust-pi"
    assert "overshoot" in rec.measured
    assert (out / "gains.h").exists()
    assert result["step"]["proposal"] == "robust-pi"
    # one session for the whole job; the motor was stopped while the operator chose
    s = read_session(out / "session.jsonl")
    assert s.end is not None and s.reason == "completed"
    kinds = [e.get("kind") for e in s.events]
    assert "halted" in kinds and "rearmed" in kinds
    halted = next(e for e in s.events if e.get("kind") == "halted")
    rearmed = next(e for e in s.events if e.get("kind") == "rearmed")
    between = (s.t > float(halted["t"])) & (s.t <= float(rearmed["t"]))
    assert (s.out[between] == 0.0).all()


def test_after_an_abort_no_key_but_the_confirmation_powers_the_motor(tmp_path: Path) -> None:
    """Issue: r, d, Enter and digits after an abort must never energise the motor."""
    out = tmp_path / "after-abort"
    child = spawn("--out", str(out), "--speed", "2", rows=24, cols=80)
    try:
        child.expect("before the motor moves")
        child.send("y")
        child.expect("gain choices", timeout=120)
        child.expect(CUT_OFF)  # kept at 80 x 24 on the proposals screen
        child.send("s")
        child.expect("power the motor\\?")
        child.send("y")
        child.expect("step \\+")  # the step is under way
        child.send(" ")
        child.expect("step check")
        child.expect(CUT_OFF)  # and on the step screen
        child.expect("the motor is unpowered")
        for key in ("r", "d", "\r", "1", "2", "o"):
            child.send(key)
            # r, d and o lead to a question at most (the confirmation or the gains menu);
            # any answer but Y goes back, so nothing is powered
            child.expect(pexpect.TIMEOUT, timeout=0.6)
        child.send("q")
        child.send("q")
        code = finish(child)
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code != 0
    s = read_session(out / "session.jsonl")
    stop = next(e for e in s.events if e.get("kind") == "stop_request")
    # from the first zero output after the abort on (the stop's own timing is tested by the
    # abort tests), every sample to the end of the session shows zero output
    zero = np.flatnonzero((s.t > float(stop["t"])) & (s.out == 0.0))
    assert zero.size, "the abort never zeroed the output"
    assert (s.out[zero[0]:] == 0.0).all(), "a key powered the motor"
    assert s.t[-1] - s.t[zero[0]] > 1.0  # the keys came long after the stop
    assert not [e for e in s.events if e.get("kind") == "rearmed"
                and float(e["t"]) > float(stop["t"])], "armed again without the Y key"


def test_space_during_the_relay_stops_the_motor_within_two_ticks(tmp_path: Path) -> None:
    out = tmp_path / "abort"
    child = spawn("--out", str(out), "--speed", "1")
    try:
        child.expect("before the motor moves")
        child.send("y")
        child.expect("relay cycle 2")  # two relay cycles done: the motor is oscillating
        child.send(" ")
        child.expect("MOTOR STOPPED")  # the live screen says so ...
        child.expect("abort key \\(space\\) pressed")  # ... and the finish screen tells why
        child.expect("confirmed zero output")
        code = finish(child)
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code == EXIT_ABORTED
    s = read_session(out / "session.jsonl")
    assert s.reason == "aborted"
    tick = float(s.header["device"]["tick"])
    req = next(e for e in s.events if e.get("kind") == "stop_request")
    t_req = float(req["t"])
    relay = s.phase_mask("relay")
    assert relay.any() and s.out[relay].max() > 0 and s.out[relay].min() < 0  # it was moving
    after = s.t > t_req + 1e-9
    zero = after & (s.out == 0.0)
    assert zero.any(), "no zero-output sample after the stop request"
    t_zero = float(s.t[zero][0])
    assert t_zero - t_req <= 2 * tick + 1e-6, (t_zero - t_req, tick)
    # and it stayed at zero from then on
    assert (s.out[s.t >= t_zero] == 0.0).all()


def test_unattended_demo_writes_the_gains_and_exits_0(tmp_path: Path) -> None:
    out = tmp_path / "yes"
    child = spawn("--plant", "mast-pan", "--yes", "--out", str(out), "--speed", "5")
    try:
        child.expect("gains accepted")
        code = finish(child)
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code == 0
    rec = read_gains_file(out / "gains.toml")
    assert rec.gains.kp > 0 and rec.period > 0
    assert (out / "gains.h").exists()
    assert json.loads((out / "result.json").read_text())["end_reason"] == "converged"


def test_plain_lines_when_stdout_is_not_a_terminal(tmp_path: Path) -> None:
    """Keys from the terminal, output through a pipe: plain lines, no escape codes, same job;
    every powered stage asks for `yes` typed."""
    out = tmp_path / "plain"
    cmd = (f"set -o pipefail; {sys.executable} -m autotune demo --out {out} --speed 4 "
           f"| cat")
    child = pexpect.spawn("bash", ["-c", cmd], cwd=str(ROOT), encoding="utf-8", timeout=90,
                          env=terminal_env())
    seen: list[str] = []
    try:
        for pattern, keys in (("Type yes and Enter to power the motor", "yes\r"),
                              ("proposal for the confirmation step", "\r"),
                              ("Type yes and Enter to power the motor", "y\r"),  # not enough
                              ("proposal for the confirmation step", "1\r"),
                              ("Type yes and Enter to power the motor", "yes\r"),
                              ("\\[a\\]ccept", "a\r")):
            child.expect(pattern)
            seen.append(child.before)
            child.send(keys)
        child.expect("done: gains accepted")
        seen.append(child.before)
        code = finish(child)
        seen.append(child.before or "")
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code == 0
    text = "".join(seen)
    assert "\x1b" not in text  # no escape codes at all
    assert "The robot is on blocks" in text and "converged" in text
    assert re.search(r"^relay +\d+ ", text, re.M)  # a row of the per-cycle table
    assert "robust-pid" in text and "figure" in text and "measured" in text
    assert "not confirmed: nothing was powered" in text
    assert read_gains_file(out / "gains.toml").gains.kp > 0


def test_abort_keys_work_in_an_unattended_run_too(tmp_path: Path) -> None:
    """--yes skips the questions, never the stop keys."""
    out = tmp_path / "yes-abort"
    child = spawn("--yes", "--out", str(out), "--speed", "2")
    try:
        child.expect("relay cycle 2")
        child.send("q")
        child.expect("abort key \\(q\\) pressed")
        code = finish(child)
    finally:
        if child.isalive():
            child.terminate(force=True)
    assert code == EXIT_ABORTED
    assert read_session(out / "session.jsonl").reason == "aborted"
    assert not (out / "gains.toml").exists()


# Labels a practitioner recalls from other programs' printouts (issue 16): none may appear in
# what a run prints or writes (key names included: "ku_classic" counts). Matched
# case-insensitively anywhere.
RECALLED = ("classic", "noise band", "noise_band")
# Leftovers of the old plain lines and wording that implied a key was pressed.
LEFTOVERS = (r"\[link\]", r"\[connect\]", r"\[done\]", r"\] *\d+%", r"started after Y",
             r"after Y\b", r"breakaway ›")


def test_a_demo_run_prints_and_writes_none_of_the_recalled_labels(tmp_path: Path) -> None:
    out = tmp_path / "scan"
    p = subprocess.run([sys.executable, "-m", "autotune", "demo", "--yes", "--view", "lines",
                        "--speed", "4", "--out", str(out)], cwd=str(ROOT), capture_output=True,
                       text=True, timeout=180, stdin=subprocess.DEVNULL)
    assert p.returncode == 0, p.stderr
    s = read_session(out / "session.jsonl")
    written = {
        "stdout": p.stdout,
        "stderr": p.stderr,
        "result.json": (out / "result.json").read_text(),
        "gains.toml": (out / "gains.toml").read_text(),
        "gains.h": (out / "gains.h").read_text(),
        "session header and events": json.dumps([s.header, *s.events]),
    }
    for where, text in written.items():
        for label in RECALLED:
            assert label not in text.lower(), (where, label)
        for pattern in LEFTOVERS:
            assert not re.search(pattern, text), (where, pattern)
    # the contract's names for the plain describing-function figures
    result = json.loads(written["result.json"])
    assert "ultimate_gain_df" in result and "ultimate_period_df" in result
    # one line format: every stdout line starts with its stage in a column of its own
    for line in p.stdout.splitlines():
        assert re.match(r"^[A-Za-z]+ +\S", line) and len(line.split(" ", 1)[0]) <= 10, line
    # the session header names the port opened (the simulated board's pty) and its plant
    assert s.header["port"].startswith("/dev/") and s.header["sim"]["plant"] == "cart-wheel"
