"""Options shared by the verbs that power a motor (`tune`, `step`, `demo`): one definition
each, and the terminal they choose."""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from autotune.config import ConnectionConfig, SafetyConfig
from autotune.ui.app import Terminal

PORT_HELP = ("serial port: a device path, socket://HOST:PORT, rfc2217://..., loop://, or 'sim' "
             "for the built-in simulated board (default: connection.port of the config)")

_S, _C = SafetyConfig(), ConnectionConfig()


def add_connection_options(p: argparse.ArgumentParser) -> None:
    """--port, --config and --axis."""
    p.add_argument("--port", metavar="URL|sim", help=PORT_HELP)
    p.add_argument("--config", metavar="FILE",
                   help="TOML config file (default: none, built-in defaults)")
    p.add_argument("--axis", type=int, metavar="N",
                   help=f"axis index on the board (default: {_C.axis})")


def add_safety_options(p: argparse.ArgumentParser) -> None:
    """The safety essentials of the command-line contract: --output-limit and --pv-window."""
    p.add_argument("--output-limit", type=float, metavar="U",
                   help=f"largest |output|, output units (default: {_S.output_limit:g})")
    p.add_argument("--pv-window", type=float, metavar="W",
                   help=f"the PV may move at most W from its start value, PV units "
                        f"(default: {_S.pv_window:g})")


def add_sim_options(p: argparse.ArgumentParser) -> None:
    """--plant, --speed, --faults and --seed for the built-in simulated board (`--port sim`)."""
    p.add_argument("--plant", metavar="NAME",
                   help=f"for --port sim: scenario (cart-wheel, cart-wheel-loaded, mast-pan) "
                        f"or plant TOML file (default: {_C.plant})")
    p.add_argument("--speed", type=float, metavar="X",
                   help=f"for --port sim: simulated time runs X times faster; with another "
                        f"port: the speed that simulated device was started with, so host "
                        f"timeouts and the heartbeat scale with it (default: {_C.speed:g})")
    p.add_argument("--faults", metavar="SPEC", help="for --port sim: fault injection spec "
                   "passed to the simulated board (default: none)")
    p.add_argument("--seed", type=int, metavar="N",
                   help="for --port sim: noise seed (default: the plant's)")


def common_overrides(args: argparse.Namespace) -> dict[str, object]:
    """Config overrides ("section.key": value) from the options above (None: not given)."""
    return {
        "connection.port": args.port,
        "connection.axis": args.axis,
        "connection.loop": args.loop,
        "connection.plant": args.plant,
        "connection.speed": args.speed,
        "safety.output_limit": args.output_limit,
        "safety.pv_window": args.pv_window,
    }


def add_view_options(p: argparse.ArgumentParser) -> None:
    """--view: the full screen or plain lines."""
    p.add_argument("--view", choices=("auto", "screen", "lines"), default="auto",
                   help="screen: the full-screen bench view; lines: plain lines (default auto: "
                        "the bench view when stdout is a terminal)")


def terminal_for(args: argparse.Namespace) -> Terminal:
    """The terminal of a powered verb: full screens unless --view lines (or stdout is not a
    terminal); keys whenever stdin is a terminal."""
    view = getattr(args, "view", "auto")
    rich = None if view == "auto" else view == "screen"
    return Terminal(stdin=sys.stdin, rich=rich)


def default_out_dir(verb: str) -> Path:
    """./autotune-sessions/<verb>-YYYYmmdd-HHMMSS (made unique with a suffix)."""
    base = Path("autotune-sessions") / f"{verb}-{time.strftime('%Y%m%d-%H%M%S')}"
    p, n = base, 1
    while p.exists():
        n += 1
        p = base.with_name(f"{base.name}-{n}")
    return p
