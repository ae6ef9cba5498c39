"""`autotune step`: prove PID gains on the loop with one setpoint step (powers the motor).

Loads the gains into the board (device PID) or runs autotune.core.pid on the host, holds the start
value, steps the setpoint, records until the PV settles (or a timeout), optionally applies a load
offset, returns to the start value; then compares the measured figures with the predicted ones,
judges them on the spec, and offers: accept (writes a gains file), detune, another proposal,
repeat.
"""

from __future__ import annotations

import argparse
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from autotune.commands.options import (
    add_connection_options,
    add_safety_options,
    add_sim_options,
    common_overrides,
)
from autotune.config import Config, SafetyConfig, StepConfig, load_config, with_overrides
from autotune.core.pid import PidGains
from autotune.core.verdict import DEFAULT_DETUNE, Action, StepSpec, detune, format_comparison
from autotune.errors import EXIT_OK, EXIT_USAGE, UserError
from autotune.recorder import check_gains, check_target, read_proposals
from autotune.ui.operator import red_alarm, typed_confirmation

HELP = "try PID gains on the loop with one setpoint step and judge the response (powers the motor)"

_S, _ST = SafetyConfig(), StepConfig()
DEFAULT_MAX_SATURATION = 0.25  # s the output may sit at its limit (common practice, no source)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.formatter_class = argparse.RawDescriptionHelpFormatter
    p.epilog = (
        "Gains come from --kp/--ki/--kd (parallel form) or from a tune result (--from-result,\n"
        "--proposal; explicit --kp/--ki/--kd override its values). Options override the config\n"
        "file, which overrides the built-in defaults shown. Abort at any time with Space, Esc,\n"
        "q or Ctrl-C; keep a physical power cut-off within reach.\n"
        "Exit codes: 0 the step meets the spec, 1 it does not / limit / fault, 2 usage or\n"
        "configuration, 3 aborted, 4 link lost, 5 zero output not confirmed."
    )
    add_connection_options(p)
    p.add_argument("--kp", type=float, help="proportional gain, output units per PV unit")
    p.add_argument("--ki", type=float, help="integral gain, output units per (PV unit s) "
                   "(default 0)")
    p.add_argument("--kd", type=float, help="derivative gain, output units s per PV unit "
                   "(default 0)")
    p.add_argument("--from-result", metavar="FILE", help="result.json of a tune run: take the "
                   "gains and predictions of a proposal from it")
    p.add_argument("--proposal", metavar="NAME", help="proposal name in --from-result "
                   "(default: the default proposal, else the first)")
    p.add_argument("--size", type=float, metavar="S",
                   help="setpoint step, PV units, signed (default: step.size, else "
                        "design.step_size, else relay.target_amplitude of the config); kept "
                        "to at most 60%% of the PV window")
    p.add_argument("--loop", choices=("host", "device"),
                   help="where the PID runs (default: device when the board offers it)")
    add_safety_options(p)
    p.add_argument("--hold", type=float, metavar="S",
                   help=f"hold the start value this long before the step, s "
                        f"(default: {_ST.settle_time:g})")
    p.add_argument("--timeout", type=float, metavar="S",
                   help=f"longest wait for the PV to settle after each change, s "
                        f"(default: {_ST.duration:g})")
    p.add_argument("--load-offset", type=float, metavar="U", default=0.0,
                   help="load-disturbance test: output offset added at the device once the step "
                        "has settled, output units (default: 0, no load test)")
    p.add_argument("--filter-n", type=float, metavar="N", default=10.0,
                   help="derivative filter: Tf = Td/N (default: 10)")
    p.add_argument("--setpoint-weight", type=float, metavar="B", default=None,
                   help="setpoint weight b of the proportional term (kp (b sp - pv)), 0..1 "
                        "(default: the proposal's b with --from-result, else 1)")
    p.add_argument("--tracking-time", type=float, metavar="S",
                   help="back-calculation anti-windup tracking time, s (default: clamping)")
    p.add_argument("--max-overshoot", type=float, metavar="P",
                   help="spec: largest overshoot, percent (default: design.max_overshoot; "
                        "none)")
    p.add_argument("--max-settling-time", type=float, metavar="S",
                   help="spec: largest 2%% settling time, s (default: design.max_settling_time; "
                        "none)")
    p.add_argument("--max-saturation", type=float, metavar="S",
                   default=DEFAULT_MAX_SATURATION,
                   help=f"spec: longest time at the output limit, s "
                        f"(default: {DEFAULT_MAX_SATURATION:g})")
    p.add_argument("--detune", type=float, metavar="F", default=DEFAULT_DETUNE,
                   help=f"factor the detune action scales all gains by (default: "
                        f"{DEFAULT_DETUNE:g})")
    p.add_argument("--retries", type=int, metavar="N", default=0,
                   help="with --yes: when the verdict asks to detune, detune and repeat up to "
                        "N times (default: 0)")
    p.add_argument("--gains-file", metavar="FILE",
                   help="where accepted gains are written (default: OUT/gains.toml)")
    p.add_argument("--store", action="store_true",
                   help="on accept, also store the gains on the board (needs its store-gains "
                        "capability)")
    p.add_argument("--yes", action="store_true",
                   help="no questions: accept when the step meets the spec (for scripts)")
    p.add_argument("--force", action="store_true",
                   help="run gains that look wrong (negative, or far beyond any published rule "
                        "for the tuned loop) instead of refusing them")
    p.add_argument("--out", metavar="DIR",
                   help="directory for session.jsonl, result.json and gains.toml (default: "
                        "./autotune-sessions/step-YYYYmmdd-HHMMSS)")
    add_sim_options(p)

# ---------------------------------------------------------------------- gains and predictions
@dataclass
class Choice:
    """The gains to try now, with their name and predictions; `pool` is every proposal known."""

    name: str
    gains: PidGains
    predicted: dict[str, Any] = field(default_factory=dict)
    pool: list[dict[str, Any]] = field(default_factory=list)
    model: dict[str, Any] | None = None
    pid_extra: dict[str, float] = field(default_factory=dict)


def choose_gains(args: argparse.Namespace) -> Choice:
    """Gains from --kp/--ki/--kd and/or --from-result/--proposal."""
    if args.from_result is None and args.kp is None:
        raise UserError("no gains given: use --kp (and --ki, --kd) or --from-result FILE",
                        exit_code=EXIT_USAGE)
    if args.proposal is not None and args.from_result is None:
        raise UserError("--proposal needs --from-result FILE", exit_code=EXIT_USAGE)
    pool: list[dict[str, Any]] = []
    model = None
    name, predicted = "manual", {}
    kp = ki = kd = None
    extra: dict[str, float] = {}
    force = bool(getattr(args, "force", False))
    ku = tu = None
    if args.from_result is not None:
        props = read_proposals(args.from_result, force=force)  # validated before any motion
        prop = props.pick(args.proposal)
        pool = props.proposals
        ku, tu = props.ultimate_gain, props.ultimate_period
        name = prop["name"]
        kp, ki, kd = prop["kp"], prop["ki"], prop["kd"]
        predicted = dict(prop["predicted"])
        model = props.model
        extra = {k: prop[k] for k in ("deriv_filter_n", "setpoint_weight", "tracking_time")
                 if k in prop}
    if args.from_result is None:
        kp, ki, kd = args.kp, args.ki or 0.0, args.kd or 0.0
    elif (args.kp, args.ki, args.kd) != (None, None, None):
        given = (args.kp, args.ki, args.kd)
        kp, ki, kd = (v if v is not None else old for v, old in zip(given, (kp, ki, kd),
                                                                     strict=True))
        if (kp, ki, kd) != (prop.get("kp"), prop.get("ki", 0.0), prop.get("kd", 0.0)):
            name, predicted = f"{name} (edited)", {}
    assert kp is not None and ki is not None and kd is not None
    kp, ki, kd = check_gains(kp, ki, kd, where=args.from_result or "--kp/--ki/--kd",
                             ultimate_gain=ku, ultimate_period=tu, force=force)
    return Choice(name, PidGains(kp, ki, kd), predicted, pool, model, extra)


def step_size(cfg: Config, args: argparse.Namespace) -> float:
    """--size, else step.size, else design.step_size, else relay.target_amplitude (PV units)."""
    for v in (args.size, cfg.step.size, cfg.design.step_size):
        if v is not None:
            if v == 0 or not math.isfinite(v):
                raise UserError("--size must be a non-zero number (PV units)",
                                exit_code=EXIT_USAGE)
            return float(v)
    return float(cfg.relay.target_amplitude)


def setpoint_weight(args: argparse.Namespace, choice: Choice) -> float:
    """b of the step: --setpoint-weight, else the proposal's (--from-result), else 1."""
    if getattr(args, "setpoint_weight", None) is not None:
        return float(args.setpoint_weight)
    return float(choice.pid_extra.get("setpoint_weight", 1.0))


def _overrides(args: argparse.Namespace) -> dict[str, object]:
    return {
        **common_overrides(args),
        "step.settle_time": args.hold,
        "step.duration": args.timeout,
    }


# ---------------------------------------------------------------------- one powered batch
@dataclass
class Batch:
    """What one powered run produced: step outcomes in order, the run's outcome."""

    outcomes: list[Any] = field(default_factory=list)
    run_outcome: Any = None
    device: dict[str, Any] = field(default_factory=dict)
    session: Path | None = None
    stored: bool | None = None


def _predict(choice: Choice, gains: PidGains, settings: Any, ts: float, loop: str,
             size: float, timeout: float) -> dict[str, Any]:
    """Predicted figures for detuned/edited gains from the tune result's model, if any."""
    from autotune.core.steptest import model_from_dict, predict_step

    if choice.model is None:
        return {}
    plant = model_from_dict(choice.model)
    if plant is None:
        return {}
    try:
        pid = settings.pid_settings(gains, ts)
        return predict_step(plant, pid, size, timeout, extra_ticks=1 if loop == "host" else 0)
    except (ValueError, ArithmeticError):
        return {}


def run_batch(cfg: Config, args: argparse.Namespace, choice: Choice, out_dir: Path,
              spec: StepSpec, stdout: TextIO, retries: int) -> Batch:
    """Connect, confirm, arm, run the step (and automatic detuned repeats), stop."""
    from autotune.core.steptest import StepCandidate, settings_from_config
    from autotune.job.powered import PoweredRun, RunOptions
    from autotune.job.step import StepEnded, run_step

    options = RunOptions(port=str(cfg.connection.port), yes=args.yes, out_dir=out_dir,
                         plant=cfg.connection.plant, speed=cfg.connection.speed,
                         faults=args.faults, seed=args.seed, verb="step", stdout=stdout,
                         confirm=typed_confirmation(None, stdout), alarm=red_alarm)
    batch = Batch()
    size = step_size(cfg, args)
    run = PoweredRun(cfg, options, header_extra={"step_request": {
        "proposal": choice.name, "kp": choice.gains.kp, "ki": choice.gains.ki,
        "kd": choice.gains.kd, "size": size, "load_offset": args.load_offset}})
    with run:
        info = run.info
        batch.device = {"name": info.device_name, "firmware": info.firmware}
        loop = cfg.connection.loop
        if loop == "auto":
            loop = "device" if info.has_device_pid else "host"
        if loop == "device" and not info.has_device_pid:
            raise UserError("the board does not offer a device PID: use --loop host",
                            exit_code=EXIT_USAGE)
        if loop == "host" and not info.has_host_loop:
            raise UserError("the board does not offer host-loop control: use --loop device",
                            exit_code=EXIT_USAGE)
        settings, note = settings_from_config(
            cfg, loop, size=size, load_offset=args.load_offset, spec=spec,
            deriv_filter_n=choice.pid_extra.get("deriv_filter_n", args.filter_n),
            setpoint_weight=setpoint_weight(args, choice),
            tracking_time=choice.pid_extra.get("tracking_time", args.tracking_time),
        )
        if note:
            run.say(note)
        plan = settings.plan
        size = plan.size
        # Every attempt's gains and predictions before any motion (no computing while powered).
        ts = float(info.tick)
        tries: list[tuple[str, PidGains, dict[str, Any]]] = []
        gains = choice.gains
        for k in range(retries + 1):
            name = choice.name if k == 0 else f"{choice.name} x{args.detune ** k:.3g}"
            pred = dict(choice.predicted) if k == 0 else {}
            tries.append((name, gains, pred or _predict(choice, gains, settings, ts, loop, size,
                                                        plan.timeout)))
            gains = detune(gains, args.detune)
        run.arm({"step_plan": {"size": size, "hold_time": plan.hold_time,
                               "timeout": plan.timeout, "load_offset": plan.load_offset,
                               "loop": loop}})
        for attempt, (name, gains, predicted) in enumerate(tries):
            run.say(f"step {size:+g} PV units with {name}: kp {gains.kp:.4g}, ki {gains.ki:.4g}"
                    f"/s, kd {gains.kd:.4g} s, b {settings.setpoint_weight:.3g} ({loop} loop); "
                    "abort: Space, Esc, q, Ctrl-C")
            cand = StepCandidate(name, gains, predicted)
            try:
                outcome = run_step(run, cand, settings)
            except StepEnded as ended:
                batch.outcomes.append(ended.outcome)
                raise ended.ended from None
            batch.outcomes.append(outcome)
            v = outcome.verdict
            if v is None or v.action is not Action.DETUNE or attempt == retries:
                break
            run.say(f"verdict: {v.reason}; detuning by {args.detune:g} and repeating")
        last = batch.outcomes[-1] if batch.outcomes else None
        if (args.store and args.yes and last is not None and last.verdict is not None
                and last.verdict.passed):
            batch.stored = _store(run, last.candidate.gains)
    batch.run_outcome = run.outcome
    run.end_session()
    batch.session = out_dir / "session.jsonl"
    return batch


def _store(run: Any, gains: PidGains) -> bool:
    """Store the gains on the board (StoreGains); False when it cannot."""
    from protocol.messages import StoreGains

    if not run.info.has_store_gains:
        run.say("the board cannot store gains (no store-gains capability); not stored")
        return False
    run.request(StoreGains(run.axis, gains.kp, gains.ki, gains.kd))
    run.event("gains_stored", {"kp": gains.kp, "ki": gains.ki, "kd": gains.kd})
    run.say("gains stored on the board")
    return True


# ---------------------------------------------------------------------- reporting
def describe(outcome: Any) -> str:
    """Lines for the operator: figures side by side, load test, verdict."""
    lines: list[str] = []
    if outcome.metrics is not None:
        lines.append(format_comparison(outcome.rows))
        if not outcome.settled:
            lines.append("the PV did not settle within the timeout")
    if outcome.load is not None:
        lf = outcome.load
        rec = "-" if lf.recovery_time is None else f"{lf.recovery_time:.3g} s"
        lines.append(f"load offset {lf.offset:g}: peak deviation {lf.peak_deviation:+.4g} PV "
                     f"units at {lf.time_to_peak:.3g} s, recovery {rec}")
    if outcome.verdict is not None:
        v = outcome.verdict
        lines.append(("PASS: " if v.passed else "FAIL: ") + v.reason
                     + ("" if v.passed else f" (suggested: {v.action.value})"))
    return "\n".join(lines)


def write_outputs(out_dir: Path, outcomes: list[Any], end_reason: str,
                  gains_file: Path | None, sessions: list[Path]) -> Path:
    """result.json with the `step` field (the last step) and every attempt."""
    from autotune.recorder import write_result

    result: dict[str, Any] = {
        "verb": "step",
        "end_reason": end_reason,
        "step": outcomes[-1].step_field() if outcomes else None,
        "attempts": [o.step_field() for o in outcomes],
        "gains_file": None if gains_file is None else str(gains_file),
        "sessions": [str(s) for s in sessions],
    }
    return write_result(out_dir / "result.json", result)


def accept(outcome: Any, path: Path, session: Path | None, stdout: TextIO,
           device: dict[str, Any]) -> Path:
    """Write the gains file for `outcome` and print the code-ready block."""
    from autotune import __version__
    from autotune.gainsfile import code_block, record_from_outcome, write_gains_file

    rec = record_from_outcome(outcome, None if session is None else str(session), device,
                              __version__)
    p = write_gains_file(path, rec)
    print(f"gains written to {p}", file=stdout)
    print(code_block(rec), file=stdout)
    return p


def store_later(cfg: Config, args: argparse.Namespace, gains: PidGains, stdout: TextIO) -> bool:
    """Connect again (no motion, so no cautions) and store the gains on the board."""
    from autotune.job.powered import PoweredRun, RunOptions

    options = RunOptions(port=str(cfg.connection.port), yes=True, out_dir=None,
                         plant=cfg.connection.plant, speed=cfg.connection.speed,
                         faults=args.faults, seed=args.seed, verb="step", stdout=stdout,
                         keys=False)
    run = PoweredRun(cfg, options)
    try:
        run.connect()
        return _store(run, gains)
    finally:
        run.__exit__(None, None, None)


def run(args: argparse.Namespace, stdout: TextIO | None = None, stdin: Any = None) -> int:
    from autotune.commands.tune import default_out_dir

    stdout = stdout if stdout is not None else sys.stdout
    stdin = stdin if stdin is not None else sys.stdin
    cfg = with_overrides(load_config(args.config), _overrides(args))
    if not cfg.connection.port:
        raise UserError("no port given: use --port URL (or --port sim), or set "
                        "connection.port in the config", exit_code=EXIT_USAGE)
    if not 0.0 < args.detune < 1.0:
        raise UserError(f"--detune must lie between 0 and 1, got {args.detune:g}",
                        exit_code=EXIT_USAGE)
    if args.retries < 0:
        raise UserError("--retries must be >= 0", exit_code=EXIT_USAGE)
    if args.setpoint_weight is not None and not 0.0 <= args.setpoint_weight <= 1.0:
        raise UserError(f"--setpoint-weight must lie between 0 and 1, got "
                        f"{args.setpoint_weight:g}", exit_code=EXIT_USAGE)
    choice = choose_gains(args)
    if args.gains_file:
        check_target(args.gains_file)  # before any motion: only a regular file or a new path
    spec = StepSpec(
        max_overshoot=args.max_overshoot if args.max_overshoot is not None
        else cfg.design.max_overshoot,
        max_settling_time=args.max_settling_time if args.max_settling_time is not None
        else cfg.design.max_settling_time,
        max_time_saturated=args.max_saturation,
    )
    out_root = Path(args.out) if args.out else default_out_dir("step")
    from autotune.job.attempts import run_attempts

    res = run_attempts(cfg, args, choice, spec, out_root, stdout, stdin)
    write_outputs(out_root, res.outcomes, res.end_reason, res.gains_file, res.sessions)
    last = res.outcomes[-1] if res.outcomes else None
    if last is None or last.verdict is None or res.end_reason != "completed":
        print(f"autotune step: {res.reason}", file=sys.stderr)
        return res.exit_code
    print(f"result: {out_root / 'result.json'}", file=stdout)
    if res.exit_code != EXIT_OK:
        print(f"autotune step: the step misses the spec: {res.reason}", file=sys.stderr)
    return res.exit_code
