"""Small pure pieces of the tune runner: loop choice, the steady-state test."""

from __future__ import annotations

from dataclasses import dataclass

import pytest

from autotune.errors import UserError
from autotune.job.tune import choose_loop, steady_cycles


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


@dataclass
class C:
    period: float
    amplitude_pp: float


def test_steady_cycles() -> None:
    same = [C(1.0, 2.0)] * 5
    assert steady_cycles(same, 0.02, min_cycles=5)
    assert not steady_cycles(same[:4], 0.02, min_cycles=5)
    growing = [C(1.0, 1.0 + 0.1 * k) for k in range(6)]
    assert not steady_cycles(growing, 0.02, min_cycles=4)
    # a 5% amplitude wobble is within what a 0.05 resolution resolves on a 1.0 swing
    wobble = [C(0.52, 1.0), C(0.52, 1.0), C(0.53, 0.95), C(0.52, 0.95)]
    assert not steady_cycles(wobble, 0.02, min_cycles=4)
    assert steady_cycles(wobble, 0.02, min_cycles=4, tick=0.01, resolution=0.05)
    jumpy = [C(0.5, 1.0), C(0.5, 1.0), C(0.6, 1.0), C(0.6, 1.0)]
    assert not steady_cycles(jumpy, 0.02, min_cycles=4, tick=0.01, resolution=0.05)
