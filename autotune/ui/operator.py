"""What the front ends give a powered run (autotune.job.powered.RunOptions): how to ask the
operator to confirm, and how to raise an alarm."""

from __future__ import annotations

import sys
from collections.abc import Callable
from typing import Any, TextIO

from autotune.errors import EXIT_USAGE, UserError

CONFIRM_WORDS = ("yes", "y")


def typed_confirmation(stdin: Any = None, stdout: TextIO | None = None) -> Callable[[], bool]:
    """The line front end's confirmation: the operator types 'yes' and Enter (a single key,
    Enter included, never energises a motor). Refuses (UserError, exit 2) when stdin is not a
    terminal: there is nobody to ask."""

    def confirm() -> bool:
        inp = stdin if stdin is not None else sys.stdin
        out = stdout if stdout is not None else sys.stdout
        try:
            tty = inp.isatty()
        except (AttributeError, ValueError):
            tty = False
        if not tty:
            raise UserError(
                "refusing to power the motor without confirmation: stdin is not a terminal; "
                "run it from a terminal, or pass --yes once the cautions above are met",
                exit_code=EXIT_USAGE)
        out.write("Type 'yes' and Enter when all of the above holds: ")
        out.flush()
        return inp.readline().strip().lower() in CONFIRM_WORDS

    return confirm


def red_alarm(text: str) -> None:
    """An unmistakable alarm on stderr: bold red on a terminal (rich), the capitals always."""
    try:
        from rich.console import Console  # rich loads only when there is an alarm

        Console(file=sys.stderr, highlight=False, soft_wrap=True).print(
            f"[bold red]{text}[/bold red]")
    except Exception:  # noqa: BLE001 (must reach the operator whatever happens)
        print(text, file=sys.stderr, flush=True)
