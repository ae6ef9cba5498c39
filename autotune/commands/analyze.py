"""`autotune analyze SESSION [--json FILE]`: the relay analysis offline, from a session file."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

import numpy as np

from autotune.commands.sessions import run_several
from autotune.core.analysis import AnalysisError
from autotune.core.design import design_limits
from autotune.core.session_record import RECORD_PHASES, finite, get_path, session_record
from autotune.errors import EXIT_OK, UserError
from autotune.job.tune import analyse_record
from autotune.recorder import check_target, read_session, write_result

HELP = "analyse a recorded relay session: ultimate gain and period, model, gain proposals"

def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("session", metavar="SESSION", nargs="+",
                        help="session.jsonl written by `tune`; several sessions of one loop "
                             "get one design that holds on all of them")
    parser.add_argument("--json", metavar="FILE", default=None,
                        help="where to write result.json (default: result.json next to SESSION; "
                             "with several sessions or --gains: written only when given)")
    parser.add_argument("--gains", metavar="FILE", default=None,
                        help="a gains file written by the tool: judge those gains on the "
                             "session's model and measured points (Ms, margins, predicted "
                             "step and load response, verdict; exit 1 when they fail)")
    parser.add_argument("--deadband", metavar="U", type=float, default=None,
                        help="actuator dead zone to take out of the output before the analysis "
                             "(output units; default: as the live run decided it, from the "
                             "breakaway ramps or the swing at the relay amplitudes; 0 = none)")


def run(args: argparse.Namespace) -> int:
    if len(args.session) > 1 or args.gains:
        return run_several(args)
    args.session = args.session[0]
    if args.json:
        check_target(args.json)  # before the work: only a regular file or a new path
    # only the phases the analysis reads are kept in memory (the rest is streamed past)
    session = read_session(args.session, phases=RECORD_PHASES)
    if args.deadband is not None and args.deadband < 0:
        raise UserError(f"--deadband must be >= 0, got {args.deadband:g}")
    record = session_record(session, args.deadband)
    if int(np.sum(record.phase == "relay")) < 10:
        raise UserError(f"{args.session}: no relay samples to analyse")
    header = session.header
    try:
        fields, notes = analyse_record(
            record, design_limits(get_path(header, "config", "design") or {},
                                  get_path(header, "config", "spec")),
            finite(get_path(header, "config", "relay", "target_amplitude")))
    except AnalysisError as exc:
        raise UserError(f"{args.session}: {exc}") from None
    result: dict[str, Any] = {"source": str(args.session), **fields}
    result["end_reason"] = session.reason or "cut-off"
    result["notes"] = list(session.warnings) + notes
    out = Path(args.json) if args.json else Path(args.session).with_name("result.json")
    write_result(out, result)
    unc = result["uncertainty"]
    print(f"ultimate gain   {result['ultimate_gain']:.5g} (+/- "
          f"{100 * unc['ultimate_gain']:.1f}%)   plain {result['ultimate_gain_df']:.5g}")
    print(f"ultimate period {result['ultimate_period']:.5g} s (+/- "
          f"{100 * unc['ultimate_period']:.1f}%)   plain {result['ultimate_period_df']:.5g} s")
    if result["static_gain"] is not None:
        print(f"static gain     {result['static_gain']:.5g} (+/- "
              f"{100 * (unc['static_gain'] or 0.0):.1f}%)")
    if result["velocity_gain"] is not None:
        print(f"velocity gain   {result['velocity_gain']:.5g} /s (+/- "
              f"{100 * (unc['velocity_gain'] or 0.0):.1f}%)")
    model = result["model"]
    params = ", ".join(f"{k} {v:.4g}" for k, v in model["params"].items())
    print(f"model           {model['kind']}: {params}"
          f"{'' if model['reliable'] else ' (does not reproduce the measurement)'}")
    print(f"cycles used     {result['cycles_used']}"
          f"{'' if result['converged'] else ' (not converged)'}")
    if result["dead_zone"]:
        print(f"dead zone       {result['dead_zone']:.4g} taken out of the output "
              f"({result['identification']['dead_zone']['method']}; --deadband 0: none)")
    for w in notes:
        print(f"warning: {w}")
    print(f"wrote {out}")
    return EXIT_OK
