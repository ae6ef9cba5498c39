"""Which setpoint weight b a confirmation step uses (`autotune step` options, tune's step)."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import pytest

from autotune.commands.step import add_arguments, choose_gains
from autotune.core.pid import PidGains
from autotune.errors import UserError
from autotune.job.requests import GainsChoice


def test_b_is_the_proposals_unless_given(tmp_path: Path) -> None:
    res = {"proposals": [{"name": "a", "kp": 1.0, "ki": 2.0, "kd": 0.0, "setpoint_weight": 0.37,
                          "default": True},
                         {"name": "old", "kp": 1.0, "ki": 2.0, "kd": 0.0}]}  # no b recorded
    path = tmp_path / "result.json"
    path.write_text(json.dumps(res))
    parser = argparse.ArgumentParser()
    add_arguments(parser)

    def b_of(*argv: str) -> float:
        args = parser.parse_args(list(argv))
        return choose_gains(args, 10.0)[0].setpoint_weight

    assert b_of("--from-result", str(path)) == 0.37
    assert b_of("--from-result", str(path), "--kp", "2") == 0.37  # edited gains keep b
    assert b_of("--from-result", str(path), "--setpoint-weight", "0.8") == 0.8
    assert b_of("--from-result", str(path), "--proposal", "old") == 1.0
    assert b_of("--kp", "3") == 1.0
    # the step inside `tune` takes the proposal's b
    assert GainsChoice.of_proposal(res["proposals"][0]).setpoint_weight == 0.37


def test_gains_from_a_tune_result(tmp_path: Path) -> None:
    res = {"proposals": [{"name": "a", "kp": 1.0, "ki": 2.0, "kd": 0.0,
                          "predicted": {"overshoot": 3.0}},
                         {"name": "b", "kp": 4.0, "ki": 5.0, "kd": 0.5, "default": True}]}
    path = tmp_path / "result.json"
    path.write_text(json.dumps(res))
    parser = argparse.ArgumentParser()
    add_arguments(parser)

    def choose(*argv: str) -> tuple[GainsChoice, tuple[dict, ...]]:
        c, pool, _ = choose_gains(parser.parse_args(list(argv)), 10.0)
        return c, pool

    c, _ = choose("--from-result", str(path))
    assert c.name == "b" and c.gains == PidGains(4.0, 5.0, 0.5)  # the default proposal
    c, pool = choose("--from-result", str(path), "--proposal", "a")
    assert c.name == "a" and c.predicted == {"overshoot": 3.0} and len(pool) == 2
    c, _ = choose("--from-result", str(path), "--proposal", "a", "--kd", "0.1")
    assert c.gains == PidGains(1.0, 2.0, 0.1) and c.name == "a (edited)" and c.predicted == {}
    c, _ = choose("--kp", "3")
    assert c.gains == PidGains(3.0, 0.0, 0.0) and c.name == "manual"
    with pytest.raises(UserError, match="no proposal named 'zz'"):
        choose("--from-result", str(path), "--proposal", "zz")
    with pytest.raises(UserError, match="no gains given"):
        choose()
