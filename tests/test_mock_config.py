"""Tests for mock_device.config: plant file loading, validation and built-in scenarios."""

from __future__ import annotations

import math

import control  # python-control: reference for the scenarios' ultimate points
import numpy as np
import pytest
from scipy.optimize import brentq

from mock_device.config import (
    SCENARIOS,
    MockConfig,
    MockConfigError,
    load_config,
    parse_config,
)


def _write(tmp_path, text: str):
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_contract_example_loads(tmp_path):
    path = _write(
        tmp_path,
        """
[plant]
num = [2.0]
den = [0.5, 1.0]
delay = 0.05
[actuator]
limit = 100.0
deadband = 0.0
[sensor]
noise = 0.0
resolution = 0.0
[device]
period = 0.01
""",
    )
    cfg = load_config(path)
    assert cfg.plant.num == (2.0,)
    assert cfg.plant.den == (0.5, 1.0)
    assert cfg.plant.delay == 0.05
    assert cfg.device.period == 0.01
    assert cfg.source == str(path)


def test_defaults_for_missing_sections(tmp_path):
    cfg = load_config(_write(tmp_path, "[plant]\nnum = [3]\nden = [1, 2]\n"))
    default = MockConfig()
    assert cfg.actuator == default.actuator
    assert cfg.sensor == default.sensor
    assert cfg.device == default.device
    assert cfg.plant.num == (3.0,) and cfg.plant.delay == 0.0 and cfg.plant.load == 0.0
    assert cfg.actuator.limit == 100.0 and cfg.device.watchdog == 0.25


@pytest.mark.parametrize(
    "text,key",
    [
        ("[plant]\nnumm = [1]\n", "[plant] numm"),
        ("[sensors]\nnoise = 1\n", "[sensors]"),
        ("[device]\nperiod = 'fast'\n", "[device] period"),
        ("[device]\nrelay = 1\n", "[device] relay"),
        ("[plant]\nnum = [1, 'a']\n", "[plant] num"),
        ("[plant]\nnum = []\n", "[plant] num"),
        ("[actuator]\nlimit = true\n", "[actuator] limit"),
        ("[device]\nseed = 1.5\n", "[device] seed"),
        ("[plant]\ndelay = -0.1\n", "[plant] delay"),
        ("[plant]\nnum = [1, 2, 3]\nden = [1, 1]\n", "[plant] num"),
        ("[plant]\nden = [0, 1]\n", "[plant] den"),
        ("[actuator]\ndeadband = 200\n", "[actuator] deadband"),
        ("[device]\nperiod = 0\n", "[device] period"),
        ("[device]\nname = 'a-very-long-device-name'\n", "[device] name"),
        ("[faults]\ncorrupt = 3\n", "[faults] corrupt"),
        ("[faults]\nnonsense = 1\n", "[faults] nonsense"),
        ("plant = 3\n", "[plant]"),
    ],
)
def test_errors_name_file_and_key(tmp_path, text, key):
    path = _write(tmp_path, text)
    with pytest.raises(MockConfigError) as info:
        load_config(path)
    assert info.value.key == key
    assert str(path) in str(info.value)
    assert key in str(info.value)


def test_not_toml_and_missing_file(tmp_path):
    with pytest.raises(MockConfigError, match="not valid TOML"):
        load_config(_write(tmp_path, "[plant\n"))
    with pytest.raises(MockConfigError, match="no such file"):
        load_config(tmp_path / "absent.toml")


def test_faults_table(tmp_path):
    cfg = load_config(_write(tmp_path, "[faults]\ncorrupt = 0.01\nreverse_sign = true\nseed = 4\n"))
    assert cfg.faults.corrupt == 0.01 and cfg.faults.reverse_sign and cfg.faults.seed == 4


def test_parse_config_source_in_message():
    with pytest.raises(MockConfigError, match=r"^mine: \[plant\] x: unknown key"):
        parse_config({"plant": {"x": 1}}, "mine")


def _ultimate(num, den, delay):
    """Ultimate gain and period from python-control's frequency response (phase -180 deg)."""
    sys = control.tf(list(num), list(den))
    ws = np.logspace(-1, 3, 4000)
    resp = control.frequency_response(sys, ws)
    ph = np.unwrap(np.asarray(resp.phase).ravel()) - ws * delay
    i = int(np.argmax(ph < -np.pi))
    w180 = brentq(lambda w: np.interp(w, ws, ph) + np.pi, ws[i - 1], ws[i], xtol=1e-12)
    sys_mag = abs(complex(control.evalfr(sys, 1j * w180)))
    return 1.0 / sys_mag, 2 * math.pi / w180


@pytest.mark.parametrize("name", SCENARIOS)
def test_builtin_scenarios_load_and_oscillate_nicely(name):
    cfg = load_config(name)
    assert cfg.source == f"scenario {name}"
    assert cfg.device.period == 0.01
    ku, tu = _ultimate(cfg.plant.num, cfg.plant.den, cfg.plant.delay)
    # "nice" for a 10 ms tick: 20-100 ticks per period, a relay cycle within a second or so
    assert 0.2 < tu < 1.0
    assert 5.0 < ku < 200.0
    # the figures written in the scenario comments (python-control)
    documented = {"cart-wheel": (60.4, 0.40), "cart-wheel-loaded": (91.7, 0.53),
                  "mast-pan": (19.2, 0.80)}[name]
    assert ku == pytest.approx(documented[0], rel=0.01)
    assert tu == pytest.approx(documented[1], rel=0.01)


def test_scenario_kinds():
    cart = load_config("cart-wheel")
    mast = load_config("mast-pan")
    assert cart.plant.den[-1] != 0.0  # self-regulating
    assert cart.sensor.resolution > 0.0
    assert mast.plant.den[-1] == 0.0  # integrating
    assert mast.actuator.deadband > 0.0
    assert mast.plant.delay > 0.0 and cart.plant.delay > 0.0
