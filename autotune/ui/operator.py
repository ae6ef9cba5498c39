"""How the front ends raise an alarm (autotune.job.powered.RunOptions.alarm): one line that must
reach the operator whatever else fails."""

from __future__ import annotations

import sys

CONFIRM_WORDS = ("yes", "y")


def red_alarm(text: str) -> None:
    """An unmistakable alarm on stderr: bold red on a terminal (rich), the capitals always."""
    try:
        from rich.console import Console  # rich loads only when there is an alarm

        Console(file=sys.stderr, highlight=False, soft_wrap=True).print(
            f"[bold red]{text}[/bold red]")
    except Exception:  # noqa: BLE001 (must reach the operator whatever happens)
        print(text, file=sys.stderr, flush=True)
