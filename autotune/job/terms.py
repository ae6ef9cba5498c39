"""What a powered run is given and how it ends: RunOptions, RunEnded, RunOutcome,
StopOutcome (what the stop sequence achieved)."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

from autotune.errors import EXIT_FAILED, EXIT_LINK
from protocol.errors import DeviceReset


@dataclass
class StopOutcome:
    """What the stop sequence achieved.

    confirmed: a sample showed zero output for good (see the module docstring); attempts: Stop
    frames sent; message: what went wrong (empty when nothing did); t_zero: device time (s) of
    the first sample of the zero output; answered: the device replied Stopped; by_fault: the
    zero output came from a fault the device latched while Stop went unanswered; seconds:
    wall-clock time the sequence took; restarted: the device had restarted (t_zero is then on
    its new clock).
    """

    confirmed: bool
    attempts: int
    message: str = ""
    t_zero: float | None = None
    answered: bool = False
    by_fault: bool = False
    seconds: float = 0.0
    restarted: bool = False


class RunEnded(Exception):  # noqa: N818 (a control-flow signal, not an error)
    """Ends the powered part of a run: `reason` goes to the session end record.

    reason: "converged", "aborted", "limit:<which>", "fault:<which>", "precheck:<which>", ...
    message: one line for the operator; exit_code: what the process returns.
    """

    def __init__(self, reason: str, message: str = "", exit_code: int = EXIT_FAILED,
                 t: float | None = None) -> None:
        super().__init__(message or reason)
        self.reason = reason
        self.message = message or reason
        self.exit_code = exit_code
        self.t = t


@dataclass
class RunOptions:
    """How to run (from the front end).

    port: URL for serial.serial_for_url or "sim"; yes: no questions; out_dir: where
    session.jsonl / result.json go (None: nothing written); plant/faults/seed: for "sim";
    speed: how many times faster than the wall clock the device's time runs (the simulated
    board's --speed; 1 for a real board): host-side waits are divided by it;
    stdin: the stream abort keys are read from; stdout: where `say` prints by default;
    verb: for messages and the header; keys: watch abort keys when stdin is a terminal;
    cautions_shown: a start screen showed the cautions before `confirm` is asked.
    confirm: the front end's "ask the operator": called with the device info after the
    handshake, True to go ahead (it handles --yes itself and may raise UserError, e.g. when
    there is nobody to ask); None: `yes` goes ahead, else nothing is powered. alarm: the front end's "raise an alarm" (one line in
    capitals that must reach the operator); None prints it on stderr.
    connection: an open connection (autotune.job.powered.Connection) the run uses instead of
    opening the port, and leaves open: the loops of a plan share one.
    """

    port: str
    yes: bool = False
    out_dir: Path | None = None
    plant: str = "cart-wheel"
    speed: float = 1.0
    faults: str | None = None
    seed: int | None = None
    stdin: Any = None
    stdout: TextIO | None = None
    verb: str = "tune"
    keys: bool = True
    cautions_shown: bool = False
    confirm: Callable[[Any], bool] | None = None
    alarm: Callable[[str], None] | None = None
    connection: Any = None


@dataclass
class RunOutcome:
    """How a powered run ended (filled by the stop path). recording_error: why the session
    file could not be written completely (None: it was)."""

    reason: str = "unknown"
    message: str = ""
    exit_code: int = EXIT_FAILED
    stop: StopOutcome | None = None
    error: BaseException | None = None
    recording_error: str | None = None


def link_ended(exc: BaseException) -> RunEnded:
    """The RunEnded for a link error met while commanding: a device reset (boot id changed)
    is `fault:device_reset`, anything else `fault:link_lost`."""
    if isinstance(exc, DeviceReset):
        return RunEnded("fault:device_reset", f"the device restarted: {exc}", EXIT_LINK)
    return RunEnded("fault:link_lost", f"the link is lost: {exc}", EXIT_LINK)


def is_finite(x: float | None) -> bool:
    """True for a finite float."""
    return x is not None and math.isfinite(x)
