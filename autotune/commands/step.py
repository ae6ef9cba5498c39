"""`autotune step`: prove PID gains on the loop with one setpoint step (powers the motor).

Builds the job request (autotune.job.requests) from the config and the options and runs the
one job orchestration from its confirmation step (autotune.job.job): the gains run on the board
(device PID) or here (host loop), the setpoint steps, the measured figures are compared with the
predicted ones and judged on the spec; then accept (gains file), detune (a gentler design),
another proposal, repeat, or quit.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from pathlib import Path
from typing import Any

from autotune.commands.options import (
    add_connection_options,
    add_safety_options,
    add_sim_options,
    add_view_options,
    common_overrides,
    default_out_dir,
    terminal_for,
)
from autotune.config import DesignConfig, SpecConfig, StepConfig, load_config, with_overrides
from autotune.core.pid import PidGains
from autotune.errors import EXIT_OK, EXIT_USAGE, UserError
from autotune.job.requests import BoardRequest, GainsChoice, JobRequest
from autotune.recorder import check_gains, check_target, read_proposals
from autotune.ui.app import run_job

HELP = "try PID gains on the loop with one setpoint step and judge the response (powers the motor)"

_ST, _D, _SP = StepConfig(), DesignConfig(), SpecConfig()


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
                   help=f"shortest record after each change, s (default: {_ST.duration:g})")
    p.add_argument("--load-offset", type=float, metavar="U",
                   help=f"load-disturbance test: output offset added at the device once the "
                        f"step has settled, output units (default: {_ST.load_offset:g}, none)")
    p.add_argument("--filter-n", type=float, metavar="N",
                   help=f"derivative filter of hand-given gains: Tf = Td/N (default: "
                        f"{_ST.deriv_filter_n:g})")
    p.add_argument("--setpoint-weight", type=float, metavar="B", default=None,
                   help="setpoint weight b of the proportional term (kp (b sp - pv)), 0..1 "
                        "(default: the proposal's b with --from-result, else 1)")
    p.add_argument("--tracking-time", type=float, metavar="S",
                   help="back-calculation anti-windup tracking time, s (default: clamping)")
    p.add_argument("--max-overshoot", type=float, metavar="P",
                   help=f"spec: largest overshoot, percent (default: spec.max_overshoot, "
                        f"{_SP.max_overshoot:g})")
    p.add_argument("--max-settling-time", type=float, metavar="S",
                   help="spec: largest settling time, s (default: design.max_settling_time)")
    p.add_argument("--max-saturation", type=float, metavar="S",
                   help=f"spec: longest time at the output limit, s (default: "
                        f"{_SP.max_saturation:g})")
    p.add_argument("--retries", type=int, metavar="N",
                   help=f"with --yes: after a step that misses the spec, try up to N gentler "
                        f"designs (needs --from-result for the model) (default: {_ST.retries})")
    p.add_argument("--gains-file", metavar="FILE",
                   help="where accepted gains are written (default: OUT/gains.toml)")
    p.add_argument("--store", action="store_true",
                   help="on accept, also store the gains on the board (needs its store-gains "
                        "capability)")
    p.add_argument("--force", action="store_true",
                   help="run gains the design marks not runnable (unstable on the model); on a "
                        "terminal the confirmation says so")
    p.add_argument("--yes", action="store_true",
                   help="no questions: accept when the step meets the spec (for scripts)")
    p.add_argument("--out", metavar="DIR",
                   help="directory for session.jsonl, result.json and gains.toml (default: "
                        "./autotune-sessions/step-YYYYmmdd-HHMMSS)")
    add_view_options(p)
    add_sim_options(p)


def _overrides(args: argparse.Namespace) -> dict[str, object]:
    return {
        **common_overrides(args),
        "step.size": args.size,
        "step.settle_time": args.hold,
        "step.duration": args.timeout,
        "step.load_offset": args.load_offset,
        "step.deriv_filter_n": args.filter_n,
        "spec.max_saturation": args.max_saturation,
        "step.retries": args.retries,
        "spec.max_overshoot": args.max_overshoot,
        "design.max_settling_time": args.max_settling_time,
    }


def choose_gains(args: argparse.Namespace, filter_n: float
                 ) -> tuple[GainsChoice, tuple[dict[str, Any], ...], dict[str, Any] | None]:
    """The gains to try (from --kp/--ki/--kd and/or --from-result/--proposal), the proposals
    of the result and its model; every gain checked before anything is connected
    (autotune.recorder.check_gains: finite, and unless --force not negative nor far beyond
    every published rule for the result's Ku and Tu)."""
    if args.from_result is None and args.kp is None:
        raise UserError("no gains given: use --kp (and --ki, --kd) or --from-result FILE",
                        exit_code=EXIT_USAGE)
    if args.proposal is not None and args.from_result is None:
        raise UserError("--proposal needs --from-result FILE", exit_code=EXIT_USAGE)
    force = bool(args.force)
    pool: tuple[dict[str, Any], ...] = ()
    model = None
    ku = tu = None
    if args.from_result is not None:
        props = read_proposals(args.from_result, force=force)  # validated before any motion
        pool, model = tuple(props.proposals), props.model
        ku, tu = props.ultimate_gain, props.ultimate_period
        choice = GainsChoice.of_proposal(props.pick(args.proposal), filter_n)
    else:
        choice = GainsChoice("manual", PidGains(args.kp, args.ki or 0.0, args.kd or 0.0),
                             deriv_filter_n=filter_n)
    given = (args.kp, args.ki, args.kd)
    g = choice.gains
    if args.from_result is not None and given != (None, None, None):
        new = PidGains(*(v if v is not None else old
                         for v, old in zip(given, (g.kp, g.ki, g.kd), strict=True)))
        if new != g:
            choice = replace(choice, name=f"{choice.name} (edited)", gains=new, predicted={},
                             runnable=True, why_not="", default=False, violations=())
    g = choice.gains
    kp, ki, kd = check_gains(g.kp, g.ki, g.kd, where=args.from_result or "--kp/--ki/--kd",
                             ultimate_gain=ku, ultimate_period=tu, force=force)
    choice = replace(choice, gains=PidGains(kp, ki, kd))
    if args.setpoint_weight is not None:
        if not 0.0 <= args.setpoint_weight <= 1.0:
            raise UserError(f"--setpoint-weight must lie between 0 and 1, got "
                            f"{args.setpoint_weight:g}", exit_code=EXIT_USAGE)
        choice = replace(choice, setpoint_weight=float(args.setpoint_weight))
    if args.tracking_time is not None:
        if not args.tracking_time > 0:
            raise UserError("--tracking-time must be > 0 s", exit_code=EXIT_USAGE)
        choice = replace(choice, tracking_time=float(args.tracking_time))
    return choice, pool, model


def run(args: argparse.Namespace) -> int:
    cfg = with_overrides(load_config(args.config), _overrides(args))
    if cfg.plan:
        raise UserError(f"{cfg.source}: step runs one loop with given gains, and this "
                        "configuration holds a [[loop]] plan: use a configuration without one "
                        "(--config) and --axis for the loop")
    board = BoardRequest.of(cfg, args.faults, args.seed)
    choice, pool, model = choose_gains(args, cfg.step.deriv_filter_n)
    if args.gains_file:
        check_target(args.gains_file)  # before any motion: only a regular file or a new path
    out = Path(args.out) if args.out else default_out_dir("step")
    req = JobRequest(cfg=cfg, board=board, out_dir=out, verb="step", yes=args.yes,
                     force=args.force, relay=False, gains=choice, proposals=pool, model=model,
                     result_source=Path(args.from_result) if args.from_result else None,
                     gains_file=Path(args.gains_file) if args.gains_file else None,
                     store=args.store)
    outcome = run_job(req, term=terminal_for(args))
    if outcome.exit_code != EXIT_OK:
        print(f"autotune step: {outcome.message or outcome.reason}", file=sys.stderr)
    return outcome.exit_code
