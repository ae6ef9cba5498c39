"""Tests for mock_device.config: plant file loading, validation and built-in scenarios."""

from __future__ import annotations

import pytest

from mock_device.config import (
    SCENARIOS,
    MockConfig,
    MockConfigError,
    load_config,
    parse_config,
)
from tests.relaysim import true_ultimate


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


@pytest.mark.parametrize("name", SCENARIOS)
def test_builtin_scenarios_load_and_oscillate_nicely(name):
    cfg = load_config(name)
    assert cfg.source == f"scenario {name}"
    assert cfg.device.period == 0.01
    # the figures written in the scenario comments (python-control), one pair an axis
    documented = {"cart-wheel": [(60.4, 0.40)], "cart-wheel-loaded": [(91.7, 0.53)],
                  "mast-pan": [(19.2, 0.80)],
                  "drive-base": [(47.4, 0.313), (53.0, 0.324)]}[name]
    assert len(cfg.axis_configs) == len(documented)
    for axis, (ku_doc, tu_doc) in zip(cfg.axis_configs, documented, strict=True):
        ku, tu = true_ultimate(axis.plant.num, axis.plant.den, axis.plant.delay)
        # "nice" for a 10 ms tick: 20-100 ticks per period, a relay cycle within a second or so
        assert 0.2 < tu < 1.0
        assert 5.0 < ku < 200.0
        assert ku == pytest.approx(ku_doc, rel=0.01)
        assert tu == pytest.approx(tu_doc, rel=0.01)


def test_scenario_kinds():
    cart = load_config("cart-wheel")
    mast = load_config("mast-pan")
    assert cart.plant.den[-1] != 0.0  # self-regulating
    assert cart.sensor.resolution > 0.0
    assert mast.plant.den[-1] == 0.0  # integrating
    assert mast.actuator.deadband > 0.0
    assert mast.plant.delay > 0.0 and cart.plant.delay > 0.0


# ------------------------------------------------------------------ several axes ([[axis]])

_TWO_AXES = """
[device]
period = 0.01
[[axis]]
name = "left"
[axis.plant]
num = [2.0]
den = [0.5, 1.0]
[axis.sensor]
resolution = 0.1
[[axis]]
[axis.plant]
num = [3.0]
den = [0.4, 1.0]
delay = 0.02
"""


def test_axis_tables_each_hold_their_own_plant(tmp_path):
    cfg = load_config(_write(tmp_path, _TWO_AXES))
    left, right = cfg.axis_configs
    assert left.name == "left" and right.name == ""
    assert left.plant.num == (2.0,) and left.sensor.resolution == 0.1
    assert right.plant.den == (0.4, 1.0) and right.plant.delay == 0.02
    assert right.sensor == MockConfig().sensor and right.actuator == MockConfig().actuator
    # axis 0 is also the config's plant, actuator and sensor (the one-axis view)
    assert cfg.plant == left.plant and cfg.sensor == left.sensor


def test_single_axis_file_is_one_axis(tmp_path):
    cfg = load_config(_write(tmp_path, "[plant]\nnum = [3]\nden = [1, 2]\n"))
    assert cfg.axes == ()
    (only,) = cfg.axis_configs
    assert only.plant == cfg.plant and only.actuator == cfg.actuator


@pytest.mark.parametrize(
    ("text", "match"),
    [
        (_TWO_AXES + "[plant]\nnum = [1.0]\n", r"\[plant\]: not allowed beside \[\[axis\]\]"),
        ("[[axis]]\n[axis.plant]\nnumm = [1.0]\n", r"\[\[axis\]\] 0 \[plant\] numm: unknown key"),
        ("[[axis]]\n[[axis]]\n[axis.plant]\nden = [0.0, 1.0]\n",
         r"\[\[axis\]\] 1 \[plant\] den: leading coefficient"),
        ("[[axis]]\ngain = 2\n", r"\[\[axis\]\] 0 gain: unknown key"),
        ("[[axis]]\nname = 3\n", r"\[\[axis\]\] 0 name: expected a string"),
        ("axis = 3\n", r"\[\[axis\]\]: expected an array of tables"),
        ("[axis]\nname = 'x'\n", r"\[\[axis\]\]: expected an array of tables"),
        ("[[axis]]\n" * 9, r"\[\[axis\]\]: between 1 and 8 axes, got 9"),
        ("[[axis]]\n[axis.actuator]\ndeadband = 200.0\n",
         r"\[\[axis\]\] 0 \[actuator\] deadband: must be in"),
    ],
)
def test_bad_axis_tables_name_the_key(tmp_path, text, match):
    with pytest.raises(MockConfigError, match=match):
        load_config(_write(tmp_path, text))


def test_drive_base_wheels_differ_a_little():
    left, right = load_config("drive-base").axis_configs
    assert left.name == "left wheel" and right.name == "right wheel"
    assert left.plant != right.plant
    assert left.actuator.deadband != right.actuator.deadband
    assert left.sensor == right.sensor
