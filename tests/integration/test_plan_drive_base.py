"""A plan of two wheel loops (the `drive-base` scenario, invented numbers) run by the job on one
connection to the mock device process: every axis's limits loaded and read back before any
motion, each loop's files in its own folder, a summary beside them, each wheel identified;
an abort during the first loop stops the run within two ticks and the plan with it."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from autotune.config import config_from_dict
from autotune.core.progress import Phase
from autotune.errors import EXIT_ABORTED, EXIT_OK
from autotune.job.job import Quiet, TuningJob
from autotune.job.plan import run_plan
from autotune.job.requests import BoardRequest, JobRequest
from autotune.recorder import read_session
from mock_device.config import load_config
from tests.relaysim import true_ultimate

TICK = 0.01  # s, the scenario's device tick


def plan_config(**safety: float):
    return config_from_dict({
        # a generous watchdog (device time): a busy test machine may starve the heartbeat
        "safety": {"watchdog": 2.0, "output_limit": 40.0, "pv_window": 6.0, **safety},
        "relay": {"target_amplitude": 0.4},
        "design": {"step_size": 2.5},
        "loop": [{"name": "left", "axis": 0, "role": "matched"},
                 {"name": "right", "axis": 1, "role": "matched",
                  "limits": {"output_limit": 35.0}}],
    }, "plan.toml")


def test_drive_base_plan_tunes_both_wheels_on_one_connection(tmp_path: Path) -> None:
    out = tmp_path / "run"
    req = JobRequest(cfg=plan_config(), board=BoardRequest("sim", "drive-base", 4.0, None, 1),
                     out_dir=out, verb="demo", yes=True)
    lines: list[str] = []
    res = run_plan(req, say=lines.append)
    assert res.exit_code == EXIT_OK, res.message
    # both axes' limits were loaded and read back before the first loop began
    first_loop = lines.index("loop left (axis 0, matched)")
    loaded = [i for i, line in enumerate(lines) if "limits loaded and read back" in line]
    assert len(loaded) == 2 and max(loaded) < first_loop
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit_code"] == 0 and [lp["name"] for lp in summary["loops"]] == [
        "left", "right"]
    assert summary["loops"][1]["limits"]["output_limit"] == 35.0  # the loop's own limit
    assert summary["loops"][0]["limits"]["output_limit"] == 40.0  # the shared [safety]
    truth = load_config("drive-base").axis_configs
    for entry, axis in zip(summary["loops"], truth, strict=True):
        folder = out / entry["name"]
        for name in ("session.jsonl", "result.json", "gains.toml"):
            assert (folder / name).is_file(), name
        s = read_session(folder / "session.jsonl")
        assert s.header["config"]["connection"]["axis"] == entry["axis"]
        assert s.reason == "accepted" or s.end["stop_confirmed"] is True
        assert entry["gains"]["source"] == "accepted"
        # the analysis accuracy the single-loop tests hold (10 % on Ku, 5 % on Tu) against
        # python-control's ultimate point of the wheel's true model (the scenario file)
        ku, tu = true_ultimate(axis.plant.num, axis.plant.den, axis.plant.delay)
        figures = entry["figures"]
        assert figures["end_reason"] == "converged"
        assert figures["ultimate_gain"] == pytest.approx(ku, rel=0.10)
        assert figures["ultimate_period"] == pytest.approx(tu, rel=0.05)


class AbortDuringRelay(Quiet):
    """Presses the abort key once the relay has completed two cycles."""

    def __init__(self) -> None:
        super().__init__()
        self.stop = None
        self.pressed = False

    def watch_abort(self, stop) -> None:
        self.stop = stop

    def update(self, snap) -> None:
        if not self.pressed and self.stop is not None and snap.phase == Phase.RELAY \
                and snap.cycle >= 2:
            self.pressed = True
            self.stop("space")


def test_abort_in_the_first_loop_stops_within_two_ticks_and_ends_the_plan(tmp_path):
    out = tmp_path / "run"
    # speed 1: the two-tick bound is on the device's time, the host must answer in time
    req = JobRequest(cfg=plan_config(), board=BoardRequest("sim", "drive-base", 1.0, None, 2),
                     out_dir=out, verb="demo", yes=True)
    ops = {"left": AbortDuringRelay(), "right": Quiet()}
    res = run_plan(req, lambda r, conn, loop: TuningJob(r, ops[loop.name],
                                                        connection=conn).run())
    assert ops["left"].pressed
    assert res.exit_code == EXIT_ABORTED and res.reason == "aborted"
    s = read_session(out / "left" / "session.jsonl")
    assert s.end["stop_confirmed"] is True
    t_abort = next(e for e in s.events if e["kind"] == "stop_request")["t"]
    after = np.nonzero((s.t > t_abort) & (s.out == 0.0))[0]
    assert after.size > 0
    assert s.t[after[0]] - t_abort <= 2 * TICK + 1e-9  # from the session record
    assert np.all(s.out[after[0]:] == 0.0)
    # the plan ends with it: the right wheel never ran, its folder holds no session
    summary = json.loads((out / "summary.json").read_text())
    assert [lp["run"] for lp in summary["loops"]] == [True, False]
    assert not (out / "right" / "session.jsonl").exists()
