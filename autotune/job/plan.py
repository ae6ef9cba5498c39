"""A plan: the loops of one board (``[[loop]]`` in the config), tuned in order on one connection.

    connect once (handshake: nothing powered) -> every loop's limits loaded into the board and
    read back, axis by axis, before any motion -> each loop in the plan's order: the one job
    (autotune.job.job.TuningJob) on its axis with its own configuration (Config.for_loop), its
    files under OUT/<loop name>/ -> summary.json beside those folders

A loop that does not end well ends the plan: the loops after it are not run (the summary lists
them as not run). Stop has no axis on the wire, so every stop of every loop (an abort key, a
limit, a fault, a signal) stops every axis of the board; the board's watchdog covers every axis
that moves. Each loop asks for the same deliberate confirmation before it powers its motor.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from autotune.config import LoopConfig, check_against_device
from autotune.core.cascade import DriveGeometry
from autotune.core.pid import PidGains
from autotune.core.steptest import model_from_dict
from autotune.errors import (
    EXIT_ABORTED,
    EXIT_FAILED,
    EXIT_LINK,
    EXIT_OK,
    EXIT_USAGE,
    UserError,
)
from autotune.gainsfile import GainsFileError, read_gains_file
from autotune.job.heading import HeadingSettings, Wheel, run_heading
from autotune.job.job import JobOutcome, Quiet, TuningJob
from autotune.job.limits import load_limits, start_samples
from autotune.job.powered import CAUTIONS, Connection, open_connection
from autotune.job.requests import JobRequest
from autotune.job.terms import RunOptions
from autotune.recorder import check_out_dir, write_result
from protocol.errors import LinkError
from protocol.messages import Stream

SUMMARY_FILE = "summary.json"
LOOP_FILES = ("session.jsonl", "result.json", "gains.toml", "gains.h")
RESULT_FIGURES = ("ultimate_gain", "ultimate_period", "static_gain", "velocity_gain",
                  "normalized_dead_time", "dead_zone", "end_reason")
"""The result.json fields the summary repeats for each loop (the contract's names)."""


@dataclass
class LoopRun:
    """One loop of the plan: its table, its folder, the limits the board read back before
    any motion (None: not loaded), and how its job ended (None: not run)."""

    loop: LoopConfig
    out_dir: Path
    limits: dict[str, float] | None = None
    outcome: JobOutcome | None = None


@dataclass
class PlanOutcome:
    """How a plan ended: exit code, reason and one line (of the first loop that did not end
    well, else of the plan), each loop's run, the summary file written."""

    exit_code: int
    reason: str
    message: str
    loops: list[LoopRun] = field(default_factory=list)
    summary_path: Path | None = None


def loop_dirs(request: JobRequest) -> list[Path]:
    """Each loop's folder: OUT/<loop name>/."""
    return [request.out_dir / loop.name for loop in request.cfg.plan]


def _preload_limits(conn: Connection, request: JobRequest, runs: list[LoopRun],
                    say: Callable[[str], None]) -> None:
    """Every loop's limits into the board and read back (a window around each axis's PV at
    rest), before anything moves; each axis streams only while its start value is taken."""
    link = conn.link
    wait = max(2.0, 1.0 / conn.speed)
    for run in runs:
        loop_cfg = request.cfg.for_loop(run.loop)
        axis = run.loop.axis
        try:
            first, _ = start_samples(link, axis, request.board.port, wait, say)
            pv_start = sum(r.pv for r in first) / len(first)
            run.limits = load_limits(link, axis, loop_cfg.safety, pv_start)
            link.request(Stream(axis, 0, 1))
        except LinkError as exc:
            raise UserError(f"{request.board.port}: {exc}", exit_code=EXIT_LINK) from None
        link.drain_samples()
        say(f"loop {run.loop.name}: axis {axis} limits loaded and read back (output "
            f"±{run.limits['output_limit']:g}, PV {run.limits['pv_low']:g} .. "
            f"{run.limits['pv_high']:g}, watchdog {run.limits['watchdog_ms']} ms)")


RunLoop = Callable[[JobRequest, Connection, LoopConfig], JobOutcome]
"""Runs one loop's job: its request (configuration, folder), the plan's open connection and
its [[loop]] table in, how the job ended out (the front end's way of running a TuningJob with
``connection=``; `quiet_loop` for nobody to ask)."""


def quiet_loop(request: JobRequest, connection: Connection, loop: LoopConfig) -> JobOutcome:
    """A RunLoop with nobody to ask (tests, scripts: the request says --yes)."""
    return TuningJob(request, Quiet(), connection=connection).run()


def run_plan(request: JobRequest, run_loop: RunLoop = quiet_loop, *,
             say: Callable[[str], None] = lambda _line: None,
             confirm: Callable[[Any], bool] | None = None) -> PlanOutcome:
    """Run the plan of `request.cfg` (see the module docstring); `run_loop` runs each loop's
    job (see RunLoop); `say` prints the plan's own lines; `confirm` asks the operator before
    a heading loop powers the wheels (as `RunOptions.confirm`: given the device info, True to
    go ahead; None: --yes stands for it, else the heading loop is refused). Never leaves a
    motor powered; the connection is closed on every path out."""
    cfg = request.cfg
    if not cfg.plan:
        raise UserError("the configuration holds no [[loop]] plan", exit_code=EXIT_USAGE)
    runs = [LoopRun(loop, d) for loop, d in zip(cfg.plan, loop_dirs(request), strict=True)]
    # before anything is connected: every folder can take its files
    for run in runs:
        check_out_dir(run.out_dir, LOOP_FILES)
    check_out_dir(request.out_dir, (SUMMARY_FILE,))
    board = request.board
    opts = RunOptions(port=board.port, plant=board.plant, speed=board.speed,
                      faults=board.faults, seed=board.seed, yes=request.yes)
    wheels_of = [loop for loop in cfg.plan if loop.role != "heading"]
    watchdog = min(cfg.for_loop(loop).safety.watchdog for loop in wheels_of)
    outcome = PlanOutcome(EXIT_OK, "done", f"{len(runs)} loops tuned", runs)
    conn = open_connection(opts, cfg.connection.baudrate, watchdog)
    try:
        info = conn.info
        for loop in wheels_of:
            check_against_device(cfg.for_loop(loop), info.max_output, info.axis_count,
                                 info.tick)
        conn.link.start_heartbeat()
        say(f"connected to {info.device_name or 'device'} ({info.axis_count} axes, tick "
            f"{info.tick * 1000:g} ms) on {board.port}: a plan of {len(runs)} loops")
        _preload_limits(conn, request, [r for r in runs if r.loop.role != "heading"], say)
        for i, run in enumerate(runs):
            if run.loop.role == "heading":
                say(f"loop {run.loop.name} (heading, on the two wheel loops before it)")
                run.outcome = _run_heading_loop(conn, request, runs[:i], run, say, confirm)
                if run.outcome.exit_code != EXIT_OK:
                    outcome.exit_code = run.outcome.exit_code
                    outcome.reason = run.outcome.reason
                    outcome.message = f"loop {run.loop.name}: {run.outcome.message}"
                    break
                continue
            say(f"loop {run.loop.name} (axis {run.loop.axis}, {run.loop.role})")
            loop_req = replace(request, cfg=cfg.for_loop(run.loop), out_dir=run.out_dir,
                               gains_file=None)
            run.outcome = run_loop(loop_req, conn, run.loop)
            if run.outcome.exit_code != EXIT_OK:
                outcome.exit_code = run.outcome.exit_code
                outcome.reason = run.outcome.reason
                outcome.message = f"loop {run.loop.name}: {run.outcome.message}"
                break
    except BaseException:
        outcome.exit_code, outcome.reason = EXIT_FAILED, "error"
        raise
    finally:
        with contextlib.suppress(Exception):
            if not conn.link.lost:
                conn.link.stop(timeout=max(0.5, 1.0 / conn.speed))  # every axis, once more
        conn.close()
        with contextlib.suppress(Exception):
            outcome.summary_path = write_result(request.out_dir / SUMMARY_FILE,
                                                plan_summary(outcome))
    return outcome


def _wheel_of(run: LoopRun) -> Wheel:
    """A wheel loop that ended well as the heading loop's inner loop: its identified model
    (result.json) and its accepted gains (its gains file, else the default proposal)."""
    out = run.outcome
    result = _result_of(run)
    model = model_from_dict(result.get("model") or {})
    if out is None or model is None:
        raise UserError(f"loop {run.loop.name}: no identified model for the heading loop",
                        exit_code=EXIT_FAILED)
    if out.gains_path is not None and Path(out.gains_path).is_file():
        rec = read_gains_file(out.gains_path)
        return Wheel(run.loop.axis, model, rec.gains, rec.setpoint_weight,
                     rec.deriv_filter_n, rec.tracking_time)
    g = _gains_of(out, result)
    if g is None:
        raise UserError(f"loop {run.loop.name}: no gains for the heading loop",
                        exit_code=EXIT_FAILED)
    prop = next(p for p in result.get("proposals") or () if p.get("default"))
    return Wheel(run.loop.axis, model, PidGains(g["kp"], g["ki"], g["kd"]),
                 float(prop.get("setpoint_weight", 1.0)))


def _run_heading_loop(conn: Connection, request: JobRequest, before: list[LoopRun],
                      run: LoopRun, say: Callable[[str], None],
                      confirm: Callable[[Any], bool] | None) -> JobOutcome:
    """The heading loop on the two matched wheel loops before it (left, then right): the
    cautions and the same deliberate confirmation as every powered run (`confirm`, else
    --yes, else refused), then autotune.job.heading.run_heading; its outcome as a
    JobOutcome."""
    left, right = (_wheel_of(r) for r in before if r.loop.role == "matched")
    loop = run.loop
    for line in CAUTIONS:
        say(line)
    if confirm is not None:
        if not confirm(conn.info):
            raise UserError("not confirmed; nothing was powered", exit_code=EXIT_ABORTED)
    elif request.yes:
        say("--yes given: going ahead without asking.")
    else:
        raise UserError("refusing to power the wheels without confirmation: nobody to ask; "
                        "pass --yes once the cautions above are met", exit_code=EXIT_USAGE)
    assert loop.wheel_radius is not None and loop.track_width is not None  # validated
    settings = HeadingSettings(DriveGeometry(loop.wheel_radius, loop.track_width),
                               host_ticks=loop.host_ticks)
    res = run_heading(conn.link, conn.info.tick, conn.speed, left, right, settings,
                      run.out_dir, say, header={"config": request.cfg.to_dict()})
    return JobOutcome(res.exit_code, res.reason, res.message, res.result,
                      session_path=res.session_path, result_path=res.result_path,
                      stop_confirmed=res.stop_confirmed)


def _result_of(run: LoopRun) -> dict[str, Any]:
    out = run.outcome
    if out is None or out.result_path is None:
        return {}
    try:
        return json.loads(Path(out.result_path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def plan_summary(outcome: PlanOutcome) -> dict[str, Any]:
    """The plan's summary: how it ended, and per loop its axis, role, folder, the limits read
    back, how its job ended, the figures of its result.json and its gains (the accepted ones,
    else the default proposal)."""
    loops = []
    for run in outcome.loops:
        out = run.outcome
        entry: dict[str, Any] = {
            "name": run.loop.name, "axis": run.loop.axis, "role": run.loop.role,
            "folder": run.out_dir.name, "limits": run.limits, "run": out is not None}
        if out is not None:
            result = _result_of(run)
            entry.update(exit_code=out.exit_code, reason=out.reason, message=out.message,
                         stop_confirmed=out.stop_confirmed,
                         files={Path(p).name: str(p) for p in (
                             out.session_path, out.result_path, out.gains_path)
                             if p is not None},
                         figures={k: result.get(k) for k in RESULT_FIGURES},
                         model=result.get("model"),
                         gains=_gains_of(out, result))
        loops.append(entry)
    return {"format": "autotune-plan-summary", "version": 1, "exit_code": outcome.exit_code,
            "reason": outcome.reason, "message": outcome.message, "loops": loops}


def _gains_of(out: JobOutcome, result: dict[str, Any]) -> dict[str, Any] | None:
    """The loop's gains: the accepted ones (its gains file), else the default proposal's."""
    if out.gains_path is not None and Path(out.gains_path).is_file():
        with contextlib.suppress(GainsFileError, OSError):
            g = read_gains_file(out.gains_path).gains
            return {"source": "accepted", "kp": g.kp, "ki": g.ki, "kd": g.kd}
    for prop in result.get("proposals") or ():
        if isinstance(prop, dict) and prop.get("default"):
            return {"source": f"proposal {prop.get('name')}", "kp": prop.get("kp"),
                    "ki": prop.get("ki"), "kd": prop.get("kd")}
    return None
