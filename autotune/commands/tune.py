"""`autotune tune`: prechecks and a bounded relay experiment on one loop, gain proposals, then
the confirmation step: the one job orchestration (autotune.job.job) on a terminal."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from autotune.commands.matched import run_plan_verb
from autotune.commands.options import (
    add_connection_options,
    add_safety_options,
    add_sim_options,
    add_view_options,
    common_overrides,
    default_out_dir,
    terminal_for,
)
from autotune.config import RelayConfig, load_config, with_overrides
from autotune.errors import EXIT_OK, EXIT_USAGE, UserError
from autotune.job.requests import BoardRequest, JobRequest
from autotune.ui.app import run_job

HELP = "run the relay experiment on one loop and propose PID gains (powers the motor)"

_R = RelayConfig()


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.formatter_class = argparse.RawDescriptionHelpFormatter
    p.epilog = (
        "Options override the config file, which overrides the built-in defaults shown.\n"
        "Abort at any time with Space, Esc, q or Ctrl-C; keep a physical power cut-off within\n"
        "reach. Exit codes: 0 converged (and the confirmation step, when run, accepted or\n"
        "within the spec), 1 limit/fault/failed check, no convergence or a step off the spec,\n"
        "2 usage or configuration, 3 aborted, 4 link lost, 5 zero output not confirmed."
    )
    add_connection_options(p)
    p.add_argument("--yes", action="store_true",
                   help="do not ask for confirmation (for scripts; the cautions still apply)")
    p.add_argument("--out", metavar="DIR",
                   help="directory for session.jsonl and result.json (default: "
                        "./autotune-sessions/tune-YYYYmmdd-HHMMSS)")
    p.add_argument("--loop", choices=("host", "device"),
                   help="where the relay runs: on the board (device) or here (host) (default: "
                        "device when the board offers it and sign is +1, else host)")
    add_safety_options(p)
    p.add_argument("--target-amplitude", type=float, metavar="A",
                   help=f"PV oscillation peak amplitude to aim for, PV units "
                        f"(default: {_R.target_amplitude:g})")
    p.add_argument("--amplitude", type=float, metavar="D",
                   help="relay start amplitude, output units (default: a quarter of the "
                        "output limit)")
    p.add_argument("--hysteresis", type=float, metavar="EPS",
                   help="relay hysteresis, PV units (default: from the rest check, "
                        "max(3 x noise, 2 x resolution))")
    p.add_argument("--max-cycles", type=int, metavar="N",
                   help=f"stop the relay after N cycles (default: {_R.max_cycles})")
    p.add_argument("--max-time", type=float, metavar="S",
                   help=f"stop the relay after S seconds (default: {_R.max_time:g})")
    add_sim_options(p)
    p.add_argument("--csv", action="store_true",
                   help="also write the samples as session.csv next to session.jsonl")
    add_view_options(p)
    p.add_argument("--no-step", action="store_true",
                   help="do not offer the confirmation step after the proposals (default: with "
                        "--yes the step runs with the default proposal; otherwise you choose a "
                        "proposal and confirm)")
    p.add_argument("--force", action="store_true",
                   help="allow a proposal the design marks not runnable (unstable on the "
                        "model); on a terminal the confirmation says so")


def _overrides(args: argparse.Namespace) -> dict[str, object]:
    return {
        **common_overrides(args),
        "relay.target_amplitude": args.target_amplitude,
        "relay.start_amplitude": args.amplitude,
        "relay.hysteresis": args.hysteresis,
        "relay.max_cycles": args.max_cycles,
        "relay.max_time": args.max_time,
    }


def run(args: argparse.Namespace) -> int:
    cfg = with_overrides(load_config(args.config), _overrides(args))
    board = BoardRequest.of(cfg, args.faults, args.seed)
    out = Path(args.out) if args.out else default_out_dir("tune")
    req = JobRequest(cfg=cfg, board=board, out_dir=out, verb="tune", yes=args.yes,
                     force=args.force, confirm_step=not args.no_step, csv=args.csv)
    if cfg.plan:  # the config's [[loop]] plan: each loop in turn, OUT/<loop name>/
        if args.axis is not None:
            raise UserError(f"--axis {args.axis}: {cfg.source} holds a [[loop]] plan, whose "
                            "loops name their own axes", exit_code=EXIT_USAGE)
        return run_plan_verb(args, req)
    outcome = run_job(req, term=terminal_for(args))
    if outcome.exit_code != EXIT_OK:
        print(f"autotune tune: {outcome.reason}: {outcome.message}", file=sys.stderr)
    return outcome.exit_code
