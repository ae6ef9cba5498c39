"""Small pure pieces of the tune runner: loop choice and the line printer (the steady-state test
is autotune.core.convergence's: tests/test_convergence.py)."""

from __future__ import annotations

import io

import pytest

from autotune.core.progress import CycleEstimate, Phase, RunSnapshot
from autotune.errors import UserError
from autotune.job.tune import LinePrinter, choose_loop


def test_choose_loop() -> None:
    assert choose_loop("auto", True, True, 1) == "device"
    assert choose_loop("auto", True, True, -1) == "host"  # the device relay cannot invert
    assert choose_loop("auto", False, True, 1) == "host"
    assert choose_loop("host", True, True, 1) == "host"
    with pytest.raises(UserError, match="does not offer a device-side relay"):
        choose_loop("device", False, True, 1)
    with pytest.raises(UserError, match="sign = \\+1"):
        choose_loop("device", True, True, -1)
    with pytest.raises(UserError):
        choose_loop("auto", False, False, 1)


def test_line_printer_one_line_per_change() -> None:
    buf = io.StringIO()
    p = LinePrinter(buf)
    p(RunSnapshot(phase=Phase.RELAY, message="device loop"))
    p(RunSnapshot(phase=Phase.RELAY, message="device loop"))  # nothing new
    est = (CycleEstimate(1, 0.5, 1.0, 40.0, 0.5, 36.0, 0.5),)
    p(RunSnapshot(phase=Phase.RELAY, message="device loop", cycle=1, estimates=est))
    p(RunSnapshot(phase=Phase.DONE, message="stopped", alarm="CUT POWER"))
    lines = buf.getvalue().splitlines()
    assert lines == ["[relay]: device loop",
                     "  cycle 1: period 0.5 s, peak-to-peak 1, Ku ~ 40 (plain 36), Tu ~ 0.5 s",
                     "[done]: stopped", "!! CUT POWER"]
    assert "\x1b" not in buf.getvalue()
