"""`autotune tune` on a terminal runs the full-screen bench view (real pty, simulated board)."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pexpect

from autotune.gainsfile import read_gains_file


def test_tune_on_a_terminal_uses_the_bench_view_and_writes_gains(tmp_path: Path) -> None:
    out = tmp_path / "run"
    child = pexpect.spawn(sys.executable, ["-m", "autotune", "tune", "--port", "sim", "--yes",
                                           "--speed", "5", "--out", str(out)],
                          cwd=str(tmp_path), timeout=120, encoding="utf-8",
                          env=dict(os.environ, COLUMNS="100", LINES="30"),
                          dimensions=(30, 100))
    child.expect("STOP MOTOR")  # the bench view's abort-key line, on every screen
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0, child.before
    gains = read_gains_file(out / "gains.toml")
    assert gains.gains.kp > 0
    assert (out / "session.jsonl").exists() and (out / "result.json").exists()
