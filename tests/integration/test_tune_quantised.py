"""A sensor that reads exactly constant at rest (a coarse encoder, no noise) through the mock
device process: the resolution comes from the direction pulse, the hysteresis is never zero,
the relay converges, and no numerical warning reaches the user."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest
from scipy import optimize

from autotune.recorder import read_session


def test_constant_quantised_sensor(tmp_path: Path) -> None:
    q = 0.05  # PV units: about a tenth of the default target amplitude's swing
    text, out = coarse_wheel_tune(tmp_path, q, "")
    for word in ("Warning", "overflow", "invalid value", "Traceback", "nan"):
        assert word not in text, word
    res = json.loads((out / "result.json").read_text())
    assert res["end_reason"] == "converged"
    rest, direction = res["prechecks"]["rest"], res["prechecks"]["direction"]
    assert rest["noise_std"] == 0.0 and rest["resolution"] == 0.0  # constant at rest
    assert direction["resolution_used"] == pytest.approx(q)
    assert res["relay"]["hysteresis"] >= q
    # the plant's ultimate point (analytic frequency response: phase -180 degrees at w where
    # atan(0.6 w) + atan(0.08 w) + 0.05 w = pi); a 0.05 step on a 0.45 swing: within 10 %
    w = optimize.brentq(lambda x: math.atan(0.6 * x) + math.atan(0.08 * x) + 0.05 * x - math.pi,
                        1.0, 100.0)
    ku = math.sqrt((1 + (0.6 * w) ** 2) * (1 + (0.08 * w) ** 2)) / 0.25
    # the tick's half-tick hold adds 0.005 s of delay, and a 0.05 quantiser makes each
    # switching instant jitter by a tick: the period is held to the uncertainty the result
    # states (relative, at least 5 %), which must itself stay modest
    unc = res["uncertainty"]
    assert res["ultimate_gain"] == pytest.approx(ku, rel=max(0.1, unc["ultimate_gain"]))
    assert unc["ultimate_period"] <= 0.25
    assert res["ultimate_period"] == pytest.approx(2 * math.pi / w,
                                                   rel=max(0.05, unc["ultimate_period"]))


def test_weak_direction_pulse_is_repeated_twice_as_large(tmp_path: Path) -> None:
    """A pulse that moves a coarse PV less than the direction threshold but more than half of
    it is repeated at twice the size (within the output limit) instead of ending the run with
    "no response"; the relay then runs as usual.

    Numbers: gain 0.25 PV units per output unit, lags 0.6 s and 0.08 s, so a pulse of 0.15 held
    for the 2 s pulse timeout moves the PV by about 0.25 * 0.15 * 0.96 = 0.036 (analytic step
    response of the lag chain, within a count), between half and all of the threshold of a
    tenth of the 0.5 target amplitude (0.05: the sensor is constant at rest); the second
    pulse of 0.3 moves it about 0.07."""
    text, out = coarse_wheel_tune(tmp_path, 0.01, "[relay]\ntarget_amplitude = 0.5\n"
                                  "[prechecks]\npulse_size = 0.15\n")
    assert "a pulse of +0.3 follows" in text, text[-3000:]
    s = read_session(out / "session.jsonl")
    weak = [e for e in s.events if e.get("check") == "direction_weak"]
    assert len(weak) == 1
    d = weak[0]["detail"]
    assert d["pulse"] == pytest.approx(0.15)
    assert 0.5 * d["threshold"] <= abs(d["change"]) < d["threshold"]
    res = json.loads((out / "result.json").read_text())
    direction = res["prechecks"]["direction"]
    assert direction["ok"] and direction["change"] > direction["threshold"]
    assert res["end_reason"] == "converged"


def coarse_wheel_tune(tmp_path: Path, resolution: float, config: str) -> tuple[str, Path]:
    """`autotune tune --no-step` on the cart wheel's plant behind a noise-free sensor quantised
    to `resolution` (PV units), with `config` (TOML text) after a generous watchdog (a busy
    machine must not trip it); returns (stdout + stderr, the output folder), exit 0 checked."""
    plant = tmp_path / "wheel.toml"
    plant.write_text(f"""
[plant]
num = [0.25]
den = [0.048, 0.68, 1.0]
delay = 0.05
[sensor]
noise = 0.0
resolution = {resolution}
[device]
period = 0.01
name = "coarse-wheel"
""")
    cfg = tmp_path / "tune.toml"
    cfg.write_text("[safety]\nwatchdog = 2.0\n" + config)
    out = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-m", "autotune", "tune",
                           "--config", str(cfg), "--port", "sim", "--plant", str(plant),
                           "--yes", "--speed", "10", "--no-step", "--out", str(out)],
                          capture_output=True, text=True, timeout=240)
    text = proc.stdout + proc.stderr
    assert proc.returncode == 0, text[-3000:]
    return text, out
