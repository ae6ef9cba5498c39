"""Small pure pieces of the tune runner: the loop choice (the steady-state test is
autotune.core.convergence's: tests/test_convergence.py)."""

from __future__ import annotations

import pytest

from autotune.errors import UserError
from autotune.job.tune import choose_loop


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


