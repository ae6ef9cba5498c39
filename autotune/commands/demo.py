"""`autotune demo`: the whole tuning job against the built-in simulated board.

Starts the simulated board (autotune.simdevice: `python -m mock_device` on a pseudo-terminal) in
the background and runs start screen, relay, proposals, confirmation step and accept against it,
exactly as against a real board on a serial port. `--yes` runs it unattended.

`--plant drive-base` runs a plan (autotune.job.plan): the two wheel loops of a two-wheel drive
base, one after the other on one connection, each loop's files under OUT/<loop name>/, then the
matched-loop report (autotune.commands.matched) in summary.json and summary.txt beside them.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
from pathlib import Path

from autotune.commands.matched import run_plan_verb
from autotune.commands.options import add_view_options, default_out_dir, terminal_for
from autotune.config import Config, config_from_dict, load_config, with_overrides
from autotune.errors import UserError
from autotune.job.requests import BoardRequest, JobRequest
from autotune.simdevice import SIM
from autotune.ui.app import run_job

HELP = "run the whole tuning job against the built-in simulated board (no hardware needed)"

PLANTS = ("cart-wheel", "mast-pan", "drive-base")

# Demo settings per scenario (invented demo data): limits and relay targets that suit each plant.
# cart-wheel: wheel speed in rad/s, output in % duty; mast-pan: pan angle in degrees, % duty.
# The watchdog (device time) is longer than a real board's so that a demo run many times faster
# than the wall clock (--speed) on a busy machine does not trip it with a late heartbeat: 2 s of
# device time is 0.4 s of wall clock at --speed 5 (1 s, tried before, tripped now and then).
DEMO_WATCHDOG_WALL = 1.0
"""The demo's watchdog covers at least this many seconds of wall clock, whatever --speed: a
host on a heavily loaded machine may fall silent for some tenths of a second while it analyses
(common practice, no source)."""
DEMO_CONFIG: dict[str, dict[str, object]] = {
    "cart-wheel": {
        "safety.watchdog": 2.0,
        "safety.output_limit": 40.0,
        "safety.pv_window": 6.0,
        "relay.target_amplitude": 0.4,
        # the step the predictions are made for; the step plan raises it where the encoder's
        # noise would hide the settling band
        "design.step_size": 2.5,
    },
    "mast-pan": {
        "prechecks.breakaway": True,  # the pan drive has a dead zone: measure it first
        "safety.watchdog": 2.0,
        "safety.output_limit": 90.0,
        "safety.pv_window": 25.0,
        "relay.target_amplitude": 2.5,
        "design.step_size": 12.0,
        "step.duration": 20.0,
    },
    # drive-base: two wheel-speed loops in rad/s, output in % duty (each wheel much like the
    # cart's); the limits hold for both wheels
    "drive-base": {
        "safety.watchdog": 2.0,
        "safety.output_limit": 40.0,
        "safety.pv_window": 6.0,
        "relay.target_amplitude": 0.4,
        "design.step_size": 2.5,
    },
}

# The plan of a scenario with several loops: [[loop]] tables as in a config file.
DEMO_PLANS: dict[str, list[dict[str, object]]] = {
    "drive-base": [{"name": "left", "axis": 0, "role": "matched"},
                   {"name": "right", "axis": 1, "role": "matched"}],
}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.formatter_class = argparse.RawDescriptionHelpFormatter
    p.epilog = (
        "Keys: Space, Esc, q or Ctrl-C stop the motor on every screen; the start screen waits\n"
        "for Y. On the gain choices: each row's key (1-9, then a, b, c, ...) or Tab/n/p\n"
        "choose, m/M lower/raise the Ms target, s asks to run the step with the chosen gains,\n"
        "Y then powers the motor (Enter never does).\n"
        "On the step result: a accept, d detune (a gentler design), o other proposal,\n"
        "r repeat (each asks for Y again). Exit codes as for `tune`; 0 once gains are\n"
        "accepted and written."
    )
    p.add_argument("--plant", choices=PLANTS, default="cart-wheel",
                   help="simulated scenario: a cart's wheel-speed loop, a camera mast's "
                        "pan-angle loop, or the two wheel loops of a drive base, tuned in "
                        "turn and compared (default: cart-wheel)")
    p.add_argument("--yes", action="store_true",
                   help="run unattended: no questions, default proposal, accept a passing step")
    p.add_argument("--out", metavar="DIR",
                   help="directory for the session, result and gains files (default: "
                        "./autotune-sessions/demo-YYYYmmdd-HHMMSS)")
    p.add_argument("--speed", type=float, default=1.0, metavar="X",
                   help="simulated time runs X times faster than the wall clock (default: 1)")
    p.add_argument("--config", metavar="FILE",
                   help="TOML config file; its values replace the demo's (default: none)")
    p.add_argument("--loop", choices=("host", "device"),
                   help="where the relay and PID run (default: device, as the board offers it)")
    p.add_argument("--seed", type=int, metavar="N", help="noise seed of the simulated board")
    add_view_options(p)


def build_config(args: argparse.Namespace) -> Config:
    """The demo's config: the scenario's settings, then the config file, then the options."""
    plan = {"loop": DEMO_PLANS[args.plant]} if args.plant in DEMO_PLANS else {}
    if args.config:
        cfg = load_config(args.config)
        if plan and not cfg.plan:  # the file's settings on the scenario's plan
            cfg = dataclasses.replace(cfg, plan=config_from_dict(plan, "<demo>").plan)
    else:
        settings = dict(DEMO_CONFIG[args.plant])
        # at least DEMO_WATCHDOG_WALL s of wall clock at any --speed (device time runs faster)
        # (and within the 60 s the wire format carries)
        settings["safety.watchdog"] = round(min(60.0, max(float(settings["safety.watchdog"]),
                                                          DEMO_WATCHDOG_WALL * args.speed)), 3)
        cfg = with_overrides(config_from_dict(plan, "<demo>"), settings,
                             origin=f"{args.plant} demo scenario")
    return with_overrides(cfg, {"connection.plant": args.plant,
                                "connection.speed": args.speed,
                                "connection.loop": args.loop})


def run(args: argparse.Namespace) -> int:
    if not args.speed > 0:
        raise UserError("--speed must be a positive number")
    cfg = build_config(args)
    out = Path(args.out) if args.out else default_out_dir("demo")
    # port "sim": the job starts the simulated board (autotune.simdevice, a `python -m
    # mock_device` process on a pty) in the background and ends it with the job
    req = JobRequest(cfg=cfg, board=BoardRequest(SIM, args.plant, args.speed, None, args.seed),
                     out_dir=out, verb="demo", yes=args.yes)
    if cfg.plan:
        return run_plan_verb(args, req)
    outcome = run_job(req, term=terminal_for(args))
    if outcome.exit_code != 0:
        print(f"autotune demo: {outcome.message or outcome.reason}", file=sys.stderr)
    return outcome.exit_code

