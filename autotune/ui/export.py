"""Screenshots of the bench view: rich's SVG export of screens captured during a run.

`record_demo` runs the unattended demo job against the simulated board with a terminal that
draws into memory and keeps the latest builder of every named screen; `export_svgs` renders each
at a fixed size and writes it as SVG (for the README).
"""

from __future__ import annotations

import io
from collections.abc import Callable, Iterable
from pathlib import Path

from rich.console import Console, RenderableType

from autotune.job.requests import JobRequest
from autotune.ui.app import Terminal, run_job
from autotune.ui.theme import BENCH_THEME

Builder = Callable[[int, int], RenderableType]

# screen name in the capture -> file name (without .svg) and SVG window title
SHOTS: dict[str, tuple[str, str]] = {
    "start": ("start", "autotune demo: before power"),
    "live-relay": ("relay", "autotune demo: bench run, relay"),
    "proposals": ("proposals", "autotune demo: gain choices"),
    "live-step": ("step-live", "autotune demo: bench run, step"),
    "step": ("step", "autotune demo: step check"),
    "finish": ("finish", "autotune demo: finished"),
}


def render_svg(build: Builder, width: int, height: int, title: str) -> str:
    """One screen as SVG text, rendered at `width` x `height` cells."""
    console = Console(record=True, width=width, height=height, file=io.StringIO(),
                      force_terminal=True, color_system="truecolor", theme=BENCH_THEME)
    console.print(build(width, height))
    return console.export_svg(title=title)


def export_svgs(captured: dict[str, Builder], out_dir: Path, width: int = 100,
                height: int = 32, names: Iterable[str] | None = None) -> list[Path]:
    """Write the captured screens named in SHOTS (or `names`) to out_dir/<file>.svg."""
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for key in names or SHOTS:
        if key not in captured or key not in SHOTS:
            continue
        stem, title = SHOTS[key]
        path = out_dir / f"{stem}.svg"
        path.write_text(render_svg(captured[key], width, height, title), encoding="utf-8")
        written.append(path)
    return written


def render_text(build: Builder, width: int, height: int) -> str:
    """One screen as plain text at `width` x `height` cells (to look at without a browser)."""
    console = Console(record=True, width=width, height=height, file=io.StringIO(),
                      force_terminal=True, color_system="truecolor", theme=BENCH_THEME)
    console.print(build(width, height))
    return console.export_text()


def export_texts(captured: dict[str, Builder], out_dir: Path, width: int, height: int
                 ) -> list[Path]:
    """Write every captured screen as out_dir/<name>-<width>x<height>.txt."""
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for key, build in sorted(captured.items()):
        path = out_dir / f"{key.replace(':', '-')}-{width}x{height}.txt"
        path.write_text(render_text(build, width, height), encoding="utf-8")
        written.append(path)
    return written


def record_demo(request: JobRequest, width: int = 100, height: int = 32
                ) -> tuple[int, dict[str, Builder]]:
    """Run the job unattended (request.yes) on an in-memory terminal; (exit code, captured
    screens). The screens are drawn as an operator at the terminal sees them (the start screen
    with its Y key), though nobody is asked."""
    console = Console(file=io.StringIO(), width=width, height=height, force_terminal=True,
                      color_system="truecolor")
    term = Terminal(console, stdin=io.StringIO(), rich=True)
    term.captured = {}
    result = run_job(request, term=term, unattended=False)
    return result.exit_code, term.captured
