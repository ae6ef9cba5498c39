"""Messages a user meets that say where to look: the fault list in `mock_device --help`, and a
setting checked against the board that names the command line when it came from there."""

from __future__ import annotations

import dataclasses
import subprocess
import sys
from pathlib import Path

import pytest

from autotune.config import check_against_device, config_from_dict, with_overrides
from autotune.errors import ConfigError
from mock_device.faults import FaultSpec

REPO = Path(__file__).resolve().parents[1]


def test_mock_device_help_lists_every_fault_key() -> None:
    p = subprocess.run([sys.executable, "-m", "mock_device", "--help"], cwd=REPO,
                       capture_output=True, text=True, timeout=60)
    assert p.returncode == 0
    for f in dataclasses.fields(FaultSpec):
        assert f"  {f.name}=" in p.stdout, f.name  # every key, with what it takes
    assert "see mock_device" not in p.stdout and "mock_device.faults" not in p.stdout
    assert "device seconds" in p.stdout


def test_a_setting_from_the_command_line_is_blamed_on_the_command_line() -> None:
    cfg = with_overrides(config_from_dict({}, "<defaults>"), {"safety.output_limit": 500.0})
    assert cfg.source_of("safety.output_limit") == "command line"
    assert cfg.source_of("safety.pv_window") == "<defaults>"
    with pytest.raises(ConfigError) as err:
        check_against_device(cfg, max_output=100.0, axis_count=1, tick=0.01)
    assert str(err.value).startswith("command line: safety.output_limit: 500 is above")
    # the same value from a file names the file
    from_file = config_from_dict({"safety": {"output_limit": 500.0}}, "robot.toml")
    with pytest.raises(ConfigError, match=r"^robot\.toml: safety\.output_limit"):
        check_against_device(from_file, max_output=100.0, axis_count=1, tick=0.01)
    # the header's config stays the plain sections
    assert "overrides" not in cfg.to_dict()


def test_the_no_response_message_speaks_of_noise_in_our_words() -> None:
    from autotune.core.supervise import ResponseMonitor

    mon = ResponseMonitor(bias=0.0, level=5.0, band=0.05, hold_time=0.5)
    fault = None
    for k in range(100):
        fault = mon.update(0.01 * k, 0.001 * (k % 3), 10.0) or fault
    assert fault is not None and fault.which == "no_response"
    text = fault.message
    assert "noise alone moves it 0.05" in text and "noise band" not in text
