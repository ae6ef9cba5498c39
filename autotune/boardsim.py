"""The C simulated board (protocol/board, `board-sim`): build it and start it on a pty.

`board-sim` links the board-side C library (protocol/board/atboard.c) with a plant simulation
in C; like the mock device it prints its pty path as the first stdout line. Building needs the
system C compiler and make: `build_board_sim` runs `make -C protocol/board sim` and raises
BuildError naming the cause (no compiler, no make, or the compiler's first error).
"""

from __future__ import annotations

import os
import shutil
import subprocess
from collections.abc import Mapping
from pathlib import Path

from autotune.simdevice import SimDevice, launch

BOARD_DIR = Path(__file__).resolve().parent.parent / "protocol" / "board"
BUILD_DIR = BOARD_DIR / "build"
BOARD_SIM = BUILD_DIR / "board-sim"
MAX_AXES = 8
"""Axes board-sim has room for (SIM_AXES in protocol/board/Makefile)."""
AXIS_PLANT_KEYS = ("gain", "lag", "lag2", "delay", "deadband", "load", "noise", "integrating")
"""Plant figures one axis may have of its own (board-sim --axis-plant)."""


class BuildError(RuntimeError):
    """The C code could not be built; the message says why."""


def compiler() -> str:
    """The C compiler make will use ($CC, else cc); BuildError when there is none."""
    cc = os.environ.get("CC", "cc")
    if shutil.which(cc.split()[0]) is None:
        raise BuildError(f"no C compiler: '{cc}' is not on PATH (install gcc or clang, e.g. "
                         "`apt-get install gcc make`, or set CC)")
    return cc


def build(*targets: str, timeout: float = 600.0) -> None:
    """Run `make -C protocol/board TARGETS...` with the system compiler."""
    compiler()
    if shutil.which("make") is None:
        raise BuildError("no `make` on PATH (install it, e.g. `apt-get install make`)")
    proc = subprocess.run(["make", "-C", str(BOARD_DIR), *targets], capture_output=True,
                          text=True, timeout=timeout)
    if proc.returncode != 0:
        lines = [ln for ln in (proc.stderr + proc.stdout).splitlines() if ln.strip()]
        errors = [ln for ln in lines if "error" in ln.lower()] or lines[-3:]
        raise BuildError(f"make -C {BOARD_DIR} {' '.join(targets)} failed: "
                         + " | ".join(errors[:3]))


def build_board_sim() -> Path:
    """Build protocol/board/build/board-sim (if out of date) and return its path."""
    build("sim")
    return BOARD_SIM


def board_sim_command(gain: float, lag: float, delay: float, *, lag2: float = 0.0,
                      integrating: bool = False, deadband: float = 0.0, load: float = 0.0,
                      noise: float = 0.0, resolution: float = 0.0, period: float = 0.01,
                      speed: float = 1.0, baud: int | None = None, watchdog: float = 0.25,
                      axes: int = 1,
                      axis_plants: Mapping[int, Mapping[str, float | bool]] | None = None,
                      extra: tuple[str, ...] = ()) -> list[str]:
    """The board-sim command line for a plant K / ((T s + 1)(T2 s + 1)) [1/s] exp(-L s).

    ``axes`` (1..MAX_AXES) axes, each with its own copy of that plant; ``axis_plants`` maps an
    axis (0-based, < axes) to the figures it has of its own, by the names of AXIS_PLANT_KEYS
    (gain in PV units per output unit, or per second when integrating; lag, lag2 and delay in
    s; deadband and load in output units; noise in PV units; integrating a bool). With the
    defaults the command line is the single-axis one. ValueError for an axis or key out of
    range.
    """
    if not 1 <= axes <= MAX_AXES:
        raise ValueError(f"axes must be 1..{MAX_AXES}, got {axes}")
    cmd = [str(BOARD_SIM), "--pty", "--gain", repr(gain), "--lag", repr(lag), "--delay",
           repr(delay), "--lag2", repr(lag2), "--deadband", repr(deadband), "--load",
           repr(load), "--noise", repr(noise), "--resolution", repr(resolution), "--period",
           repr(period), "--speed", repr(speed), "--watchdog", repr(watchdog)]
    if integrating:
        cmd.append("--integrating")
    if baud is not None:
        cmd += ["--baud", str(baud)]
    if axes != 1:
        cmd += ["--axes", str(axes)]
    for axis, figures in sorted((axis_plants or {}).items()):
        if not 0 <= axis < axes:
            raise ValueError(f"axis_plants: axis {axis} is not one of 0..{axes - 1}")
        unknown = sorted(set(figures) - set(AXIS_PLANT_KEYS))
        if unknown:
            raise ValueError(f"axis_plants: unknown key(s) {', '.join(unknown)} (known: "
                             f"{', '.join(AXIS_PLANT_KEYS)})")
        if figures:
            items = ",".join(f"{key}={int(val) if isinstance(val, bool) else repr(float(val))}"
                             for key, val in figures.items())
            cmd += ["--axis-plant", f"{axis}:{items}"]
    return cmd + list(extra)


def start_board_sim(gain: float, lag: float, delay: float, *, speed: float = 1.0,
                    startup_timeout: float = 10.0, **kwargs: object) -> SimDevice:
    """Build (if needed) and start board-sim; returns once its pty path is known. Keyword
    arguments as `board_sim_command`."""
    build_board_sim()
    cmd = board_sim_command(gain, lag, delay, speed=speed, **kwargs)  # type: ignore[arg-type]
    return launch(cmd, f"board-sim K={gain:g} T={lag:g} L={delay:g}", speed, startup_timeout,
                  what="board-sim")
