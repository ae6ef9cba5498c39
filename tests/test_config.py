"""Config loading and validation: unknown keys, wrong types, impossible limits -> ConfigError."""

from __future__ import annotations

from pathlib import Path

import pytest

from autotune.config import (
    Config,
    ConfigError,
    check_against_device,
    check_against_noise,
    config_from_dict,
    load_config,
    with_overrides,
)


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "tune.toml"
    p.write_text(text)
    return p


def test_defaults_are_valid_and_documented() -> None:
    cfg = load_config(None)
    assert cfg == Config()
    assert cfg.safety.output_limit == 30.0
    assert cfg.relay.target_amplitude == 0.5
    # automatic values resolve to numbers
    assert cfg.start_amplitude == pytest.approx(0.25 * cfg.safety.output_limit)
    assert cfg.pulse_size == cfg.start_amplitude
    assert cfg.relay.hysteresis is None  # from the rest check


def test_full_file_round_trip(tmp_path: Path) -> None:
    p = write(tmp_path, """
[connection]
port = "sim"
axis = 0
loop = "host"
sign = -1
plant = "mast-pan"
speed = 4
[safety]
output_limit = 40
pv_window = 8.0
pv_rate_limit = 50.0
max_duration = 60
watchdog = 0.3
max_sample_gap = 0.1
[relay]
start_amplitude = 5.0
target_amplitude = 1.0
hysteresis = 0.1
max_cycles = 12
max_time = 30
bias = 2.0
bias_tolerance = 0.04
adapt_amplitude = false
[prechecks]
rest_time = 0.5
pulse_size = 4.0
pulse_timeout = 1.0
breakaway = true
[design]
ms_target = 1.6
max_overshoot = 10
step_size = 1.0
[step]
size = 1.0
duration = 3
""")
    cfg = load_config(p)
    assert cfg.source == str(p)
    assert cfg.connection.loop == "host" and cfg.connection.sign == -1
    assert cfg.connection.speed == 4.0 and isinstance(cfg.connection.speed, float)
    assert cfg.safety.output_limit == 40.0 and isinstance(cfg.safety.output_limit, float)
    assert cfg.relay.adapt_amplitude is False
    assert cfg.prechecks.breakaway is True
    assert cfg.design.max_overshoot == 10.0
    assert cfg.to_dict()["relay"]["bias"] == 2.0


@pytest.mark.parametrize(
    ("text", "key", "words"),
    [
        ("[relay]\ntarget_amplitud = 1.0\n", "relay.target_amplitud", "unknown key"),
        ("[realy]\ntarget_amplitude = 1.0\n", "realy", "unknown section"),
        ("[safety]\noutput_limit = \"lots\"\n", "safety.output_limit", "expected a number"),
        ("[safety]\noutput_limit = true\n", "safety.output_limit", "expected a number"),
        ("[relay]\nmax_cycles = 2.5\n", "relay.max_cycles", "expected an integer"),
        ("[connection]\nloop = \"both\"\n", "connection.loop", "'auto'"),
        ("[prechecks]\nbreakaway = 1\n", "prechecks.breakaway", "true or false"),
        ("relay = 3\n", "relay", "table"),
        ("[connection]\nsign = 2\n", "connection.sign", "+1 or -1"),
        ("[safety]\noutput_limit = -1.0\n", "safety.output_limit", "> 0"),
        ("[safety]\npv_window = 0.0\n", "safety.pv_window", "> 0"),
        ("[safety]\nwatchdog = 100.0\n", "safety.watchdog", "65.535"),
    ],
)
def test_bad_keys_and_types_name_file_and_key(tmp_path: Path, text: str, key: str,
                                              words: str) -> None:
    p = write(tmp_path, text)
    with pytest.raises(ConfigError) as err:
        load_config(p)
    msg = str(err.value)
    assert str(p) in msg and key in msg and words in msg
    assert err.value.key == key
    assert err.value.exit_code == 2


@pytest.mark.parametrize(
    ("data", "key"),
    [
        ({"safety": {"output_limit": 10.0}, "relay": {"bias": 10.0}}, "relay.bias"),
        ({"safety": {"output_limit": 10.0}, "relay": {"start_amplitude": 8.0, "bias": 3.0}},
         "relay.start_amplitude"),
        ({"safety": {"output_limit": 10.0}, "prechecks": {"pulse_size": 11.0}},
         "prechecks.pulse_size"),
        ({"safety": {"pv_window": 1.0}, "relay": {"target_amplitude": 0.6}},
         "relay.target_amplitude"),
        ({"relay": {"hysteresis": 0.5, "target_amplitude": 0.5}}, "relay.hysteresis"),
        ({"relay": {"min_cycles": 10, "max_cycles": 5}}, "relay.min_cycles"),
        ({"design": {"ms_target": 1.0}}, "design.ms_target"),
        ({"step": {"size": 9.0}}, "step.size"),
    ],
)
def test_impossible_limits(data: dict, key: str) -> None:
    with pytest.raises(ConfigError) as err:
        config_from_dict(data, "x.toml")
    assert err.value.key == key
    assert str(err.value).startswith("x.toml: " + key)


def test_not_toml_and_missing_file(tmp_path: Path) -> None:
    p = write(tmp_path, "[safety\noutput_limit = 3\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(p)
    with pytest.raises(ConfigError, match="no such file"):
        load_config(tmp_path / "absent.toml")


def test_overrides_replace_and_validate() -> None:
    cfg = with_overrides(load_config(None), {"safety.output_limit": 50.0,
                                              "relay.max_cycles": 7, "relay.hysteresis": None})
    assert cfg.safety.output_limit == 50.0 and cfg.relay.max_cycles == 7
    assert cfg.relay.hysteresis is None
    with pytest.raises(ConfigError) as err:
        with_overrides(cfg, {"relay.target_amplitude": 100.0})
    assert err.value.key == "relay.target_amplitude"
    assert "command-line" in str(err.value)


def test_against_device_and_noise() -> None:
    cfg = config_from_dict({"safety": {"output_limit": 80.0}}, "c.toml")
    with pytest.raises(ConfigError) as err:
        check_against_device(cfg, max_output=50.0, axis_count=1, tick=0.01)
    assert err.value.key == "safety.output_limit" and "maximum output 50" in str(err.value)
    check_against_device(cfg, max_output=100.0, axis_count=1, tick=0.01)
    cfg2 = config_from_dict({"connection": {"axis": 2}}, "c.toml")
    with pytest.raises(ConfigError, match="axis 2 does not exist"):
        check_against_device(cfg2, max_output=100.0, axis_count=1, tick=0.01)
    # window narrower than 10 noise standard deviations
    with pytest.raises(ConfigError) as err:
        check_against_noise(load_config(None), noise_std=0.6, resolution=0.0)
    assert err.value.key == "safety.pv_window"
    check_against_noise(load_config(None), noise_std=0.01, resolution=0.05)
