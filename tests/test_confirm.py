"""The confirmation-step pieces shared by `tune` and `step` (autotune.job.attempts): proposal picking
by name or number, the line-mode prompts inside `tune` (no motion in these tests)."""

from __future__ import annotations

import argparse
import io
from pathlib import Path

from autotune.commands.tune import confirmation_step
from autotune.config import Config
from autotune.job.attempts import pick_interactively, proposal_choice, step_namespace

POOL = [{"name": "zn-pi", "kp": 2.0, "ki": 1.0, "kd": 0.0, "predicted": {"overshoot": 30.0}},
        {"name": "robust-pid", "kp": 1.5, "ki": 0.5, "kd": 0.1, "default": True,
         "deriv_filter_n": 8.0},
        {"name": "tl-pi", "kp": 1.0, "ki": 0.2, "kd": 0.0}]


def test_pick_by_name_number_or_default() -> None:
    assert pick_interactively(POOL, "")["name"] == "robust-pid"  # the default flag
    assert pick_interactively(POOL, "1")["name"] == "zn-pi"
    assert pick_interactively(POOL, " TL-PI ")["name"] == "tl-pi"
    assert pick_interactively(POOL, "4") is None
    assert pick_interactively(POOL, "nope") is None
    assert pick_interactively([], "") is None
    assert pick_interactively(POOL[:1], "")["name"] == "zn-pi"  # no default: the first


def test_proposal_choice_carries_gains_predictions_and_filter() -> None:
    c = proposal_choice(POOL[1], POOL, {"kind": "fopdt", "params": {}})
    assert (c.gains.kp, c.gains.ki, c.gains.kd) == (1.5, 0.5, 0.1)
    assert c.pid_extra == {"deriv_filter_n": 8.0} and c.pool is POOL
    assert proposal_choice(POOL[0], POOL).predicted == {"overshoot": 30.0}


def test_step_namespace_defaults_and_overrides() -> None:
    ns = step_namespace(yes=True, seed=3)
    assert ns.yes is True and ns.seed == 3 and ns.size is None and 0 < ns.detune < 1
    assert ns.retries == 0 and ns.load_offset == 0.0


def test_tune_prompt_declined_runs_nothing(tmp_path: Path) -> None:
    """Interactive: a number picks the proposal, 'n' declines the step: exit 0, nothing
    powered, result.json untouched, and the way to run it later is printed."""
    args = argparse.Namespace(yes=False, faults=None, seed=None)
    out = io.StringIO()
    code = confirmation_step(Config(), args, {"proposals": POOL}, tmp_path,
                             tmp_path / "result.json", stdout=out,
                             stdin=io.StringIO("zzz\n3\nn\n"))
    assert code == 0
    text = out.getvalue()
    assert "no proposal 'zzz'" in text and "--proposal tl-pi" in text
    assert "Enter: robust-pid" in text
    assert not (tmp_path / "result.json").exists() and not (tmp_path / "step").exists()
