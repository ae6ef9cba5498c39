"""`autotune tune` and `step` on the simulated board (real pty, mock device process): the
full-screen bench view on a terminal, one plain-line format for every verb, one place for the
files, the session header of a board started by hand, result.json after a change on the
screen, and the messages that name where a bad setting came from."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pexpect
import pytest

from autotune.config import config_from_dict
from autotune.gainsfile import read_gains_file
from autotune.job.job import Quiet, TuningJob
from autotune.job.operator import GainsMenu, MenuAnswer
from autotune.job.requests import BoardRequest, JobRequest
from autotune.recorder import read_session
from autotune.ui.plain import TAG_WIDTH

REPO = Path(__file__).resolve().parents[2]
STAGE_TAGS = {"start", "connect", "rest", "direction", "breakaway", "relay", "analysis",
              "gains", "step", "waiting", "stopping", "done", "finish", "ALARM", "confirm"}


@pytest.fixture
def config_file(tmp_path: Path) -> str:
    """A device watchdog of 2 s (device time): at --speed 4-5 that is 0.4-0.5 s of wall clock,
    so a busy test machine does not trip it (the watchdog has its own tests)."""
    p = tmp_path / "config.toml"
    p.write_text("[safety]\nwatchdog = 2.0\n")
    return str(p)


def autotune(*args: str, timeout: float = 180.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "autotune", *args], cwd=REPO,
                          capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)


def assert_one_line_format(stdout: str) -> list[str]:
    """Every line: a stage tag in a column of its own, then the text; no progress
    percentages, no escape codes. Returns the tags in order."""
    tags = []
    for line in stdout.splitlines():
        assert "\x1b" not in line
        tag = line.split(" ", 1)[0]
        assert tag in STAGE_TAGS, line
        assert len(line) <= TAG_WIDTH or line[TAG_WIDTH] == " ", line
        assert not re.search(r"\b\d+%", line.replace(" %", "")), line  # "25 %" of a limit is ok
        tags.append(tag)
    return tags


def test_tune_on_a_terminal_uses_the_bench_view_and_writes_gains(tmp_path: Path,
                                                                 config_file: str) -> None:
    out = tmp_path / "run"
    child = pexpect.spawn(sys.executable, ["-m", "autotune", "tune", "--port", "sim", "--yes",
                                           "--speed", "5", "--config", config_file,
                                           "--out", str(out)],
                          cwd=str(tmp_path), timeout=120, encoding="utf-8",
                          env=dict(os.environ, COLUMNS="100", LINES="30"),
                          dimensions=(30, 100))
    child.expect("STOP MOTOR")  # the bench view's abort-key line, on every screen
    child.expect("the physical cut-off is the real stop")
    child.expect(pexpect.EOF)
    child.close()
    assert child.exitstatus == 0, child.before
    gains = read_gains_file(out / "gains.toml")  # OUT/gains.toml, as for demo and step
    assert gains.gains.kp > 0
    assert (out / "gains.h").exists()
    assert (out / "session.jsonl").exists() and (out / "result.json").exists()


def test_tune_and_step_print_one_line_format_and_write_to_one_place(
        tmp_path: Path, config_file: str) -> None:
    out = tmp_path / "tune"
    p = autotune("tune", "--port", "sim", "--yes", "--speed", "4", "--view", "lines",
                 "--config", config_file, "--out", str(out))
    assert p.returncode == 0, p.stderr
    tags = assert_one_line_format(p.stdout)
    for tag in ("start", "connect", "rest", "direction", "relay", "analysis", "gains", "step",
                "finish"):
        assert tag in tags, tag
    assert "[link]" not in p.stdout and "[connect]" not in p.stdout
    assert (out / "gains.toml").exists() and (out / "gains.h").exists()
    assert not (out / "step").exists()
    # the same gains again with `step`: the same format, the files in the same place
    out2 = tmp_path / "step"
    p2 = autotune("step", "--port", "sim", "--yes", "--speed", "4", "--view", "lines",
                  "--config", config_file, "--from-result", str(out / "result.json"),
                  "--out", str(out2))
    assert p2.returncode in (0, 1), p2.stderr  # the spec decides; the format does not
    tags2 = assert_one_line_format(p2.stdout)
    assert tags2[0] == "connect" and "start" in tags2 and "step" in tags2
    assert "relay" not in tags2
    if p2.returncode == 0:
        assert (out2 / "gains.toml").exists() and (out2 / "gains.h").exists()


def test_session_header_of_a_board_started_by_hand(tmp_path: Path, mock_device,
                                                   config_file: str) -> None:
    """The header records the port opened and the board's own name, and no plant: the plant
    setting is for the built-in simulated board only."""
    dev = mock_device("mast-pan", speed=5.0)
    out = tmp_path / "hand"
    p = autotune("tune", "--port", dev.port, "--speed", "5", "--yes", "--no-step",
                 "--view", "lines", "--output-limit", "90", "--pv-window", "25",
                 "--target-amplitude", "2.5", "--max-time", "40", "--config", config_file,
                 "--out", str(out))
    s = read_session(out / "session.jsonl")
    h = s.header
    assert h["port"] == dev.port
    assert h["device"]["name"] == "mast-pan"
    assert h["config"]["connection"]["plant"] is None and "sim" not in h
    assert "board mast-pan" in p.stdout  # the start lines name the board from its handshake
    assert_one_line_format(p.stdout)


def test_a_simulated_board_records_its_pty_and_plant(tmp_path: Path, config_file: str
                                                      ) -> None:
    out = tmp_path / "sim"
    autotune("tune", "--port", "sim", "--speed", "5", "--yes", "--no-step", "--view",
             "lines", "--max-cycles", "8", "--config", config_file, "--out", str(out))
    h = read_session(out / "session.jsonl").header
    assert h["port"].startswith("/dev/") and h["port"] != "sim"
    assert h["sim"]["plant"] == "cart-wheel"


class Redesigner(Quiet):
    """An operator who starts the run, raises the Ms target on the gains screen and leaves."""

    can_ask = True

    def __init__(self) -> None:
        super().__init__()
        self.shown: tuple = ()

    def confirm_power(self, action: str) -> bool:
        return True

    def choose_gains(self, menu: GainsMenu) -> MenuAnswer:
        assert menu.redesign is not None
        props, _ = menu.redesign(1.6)
        self.shown = props
        return MenuAnswer(None, props, 1.6)


def test_result_json_follows_a_redesign_on_the_screen_even_when_the_operator_leaves(
        tmp_path: Path) -> None:
    cfg = config_from_dict({"safety": {"watchdog": 2.0, "output_limit": 40.0,
                                       "pv_window": 3.0},
                            "relay": {"target_amplitude": 0.4}}, "<test>")
    op = Redesigner()
    req = JobRequest(cfg=cfg, board=BoardRequest("sim", "cart-wheel", 4.0, None, 7),
                     out_dir=tmp_path / "out", verb="tune")
    outcome = TuningJob(req, op).run()
    assert outcome.reason == "left", (outcome.reason, outcome.message)
    res = json.loads((tmp_path / "out" / "result.json").read_text())
    assert res["design_ms_target"] == 1.6
    names = [p["name"] for p in res["proposals"]]
    assert names == [p["name"] for p in op.shown]
    assert [p["kp"] for p in res["proposals"]] == [p["kp"] for p in op.shown]
    robust = next(p for p in res["proposals"] if p["name"].startswith("robust"))
    assert robust["predicted"]["ms"] == pytest.approx(1.6, abs=0.02)


def test_a_bad_command_line_setting_is_blamed_on_the_command_line(tmp_path: Path) -> None:
    p = autotune("tune", "--port", "sim", "--output-limit", "500", "--yes", "--view", "lines",
                 "--out", str(tmp_path / "x"), timeout=60)
    assert p.returncode == 2
    assert "command line: safety.output_limit: 500 is above the device's maximum output" \
        in p.stderr
    assert "<defaults>" not in p.stderr
