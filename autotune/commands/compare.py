"""`autotune compare SESSION SESSION...`: what changed between recorded sessions of one loop."""

from __future__ import annotations

import argparse

from autotune.commands.sessions import run_compare

HELP = ("compare recorded sessions of one loop: Ku, Tu, static gain, dead time, dead zone and "
        "model, the change from the first and whether it exceeds the uncertainty")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = ("Exit codes: 0 compared, 2 unreadable input (the file is named) or "
                     "sessions of different loops.")
    parser.add_argument("session", metavar="SESSION", nargs="+",
                        help="session.jsonl files written by `tune` (at least two, one loop)")
    parser.add_argument("--json", metavar="FILE", default=None,
                        help="also write the comparison as JSON to FILE")
    parser.add_argument("--deadband", metavar="U", type=float, default=None,
                        help="actuator dead zone to take out of the output before each "
                             "analysis (output units; default: each session's breakaway "
                             "figure; 0 = none)")


def run(args: argparse.Namespace) -> int:
    return run_compare(args.session, args.json, args.deadband)
