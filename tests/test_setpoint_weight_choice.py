"""Which setpoint weight b a confirmation step uses (`autotune step` options, tune's step)."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from autotune.commands.step import add_arguments, choose_gains, setpoint_weight
from autotune.job.attempts import proposal_choice, step_namespace


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
        return setpoint_weight(args, choose_gains(args))

    assert b_of("--from-result", str(path)) == 0.37
    assert b_of("--from-result", str(path), "--kp", "2") == 0.37  # edited gains keep b
    assert b_of("--from-result", str(path), "--setpoint-weight", "0.8") == 0.8
    assert b_of("--from-result", str(path), "--proposal", "old") == 1.0
    assert b_of("--kp", "3") == 1.0
    # the step inside `tune` takes the proposal's b
    ns = step_namespace()
    assert setpoint_weight(ns, proposal_choice(res["proposals"][0], res["proposals"])) == 0.37
