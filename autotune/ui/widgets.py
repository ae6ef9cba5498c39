"""Small renderables of the bench view, each a pure function of a snapshot (or part of one).

Nothing here reads a clock, a key or the runner: give it values, get a rich renderable back.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from rich.console import Console, ConsoleOptions, Group, RenderableType, RenderResult
from rich.padding import Padding
from rich.table import Table
from rich.text import Text

from autotune.core.progress import CycleEstimate, LimitGauge, LinkHealth, Phase, RunSnapshot
from autotune.ui import theme
from autotune.ui.chart import BrailleChart, Series

# Keys that stop the motor on every screen (handled first by the key thread).
ABORT_KEYS = ("Space", "Esc", "q", "Ctrl-C")

PHASE_LABELS: dict[Phase, str] = {
    Phase.CONNECT: "link",
    Phase.PRECHECK_REST: "rest",
    Phase.PRECHECK_DIRECTION: "direction",
    Phase.PRECHECK_BREAKAWAY: "breakaway",
    Phase.RELAY: "relay",
    Phase.ANALYSIS: "analysis",
    Phase.PROPOSALS: "gains",
    Phase.STEP: "step",
    Phase.STOPPING: "stopping",
    Phase.DONE: "done",
}
# The road a run travels, in order (stopping/done are shown apart).
PHASE_ROAD = (
    Phase.CONNECT,
    Phase.PRECHECK_REST,
    Phase.PRECHECK_DIRECTION,
    Phase.PRECHECK_BREAKAWAY,
    Phase.RELAY,
    Phase.ANALYSIS,
    Phase.PROPOSALS,
    Phase.STEP,
)

LIMIT_LABELS = {
    "pv_window": "PV window",
    "pv_rate": "PV rate",
    "output": "output",
    "duration": "run time",
    "sample_gap": "sample gap",
}


def fmt(v: float | None, digits: int = 4) -> str:
    """A figure with `digits` significant digits; '—' for None or NaN."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    if v == 0:
        return "0"
    s = f"{v:.{digits}g}"
    return s


def phase_label(snap: RunSnapshot) -> str:
    """The current phase in words, with the relay cycle count where it applies."""
    label = PHASE_LABELS.get(snap.phase, str(snap.phase.value))
    if snap.phase is Phase.RELAY and snap.max_cycles:
        label += f" {snap.cycle}/{snap.max_cycles}"
    return label


def phase_road(snap: RunSnapshot) -> Text:
    """The phases as a road: done ones muted, the current one lit, the rest dim."""
    text = Text(no_wrap=True, overflow="ellipsis")
    try:
        here = PHASE_ROAD.index(snap.phase)
    except ValueError:
        here = len(PHASE_ROAD) if snap.phase is Phase.DONE else -1
    for i, phase in enumerate(PHASE_ROAD):
        if i:
            text.append(" › ", style=theme.AXIS)
        if i == here:
            text.append(f" {phase_label(snap)} ", style=theme.CURRENT)
        elif i < here:
            text.append(PHASE_LABELS[phase], style=theme.MUTED)
        else:
            text.append(PHASE_LABELS[phase], style="grey42")
    if snap.phase is Phase.STOPPING:
        text.append("  ■ stopping", style=f"bold {theme.BAD}")
    elif snap.phase is Phase.DONE:
        text.append("  ✓ done", style=f"bold {theme.OK}")
    return text


def progress_line(snap: RunSnapshot) -> Table:
    """A bar of progress within the phase, its percentage and the one-line message."""
    frac = snap.progress
    if not frac and snap.phase is Phase.RELAY and snap.max_cycles:
        frac = snap.cycle / snap.max_cycles  # at most this share of the cycles is done
    frac = min(max(frac, 0.0), 1.0)
    grid = Table.grid(expand=True, padding=(0, 1))
    grid.add_column(width=22, no_wrap=True)
    grid.add_column(width=4, justify="right", no_wrap=True)
    grid.add_column(ratio=1, no_wrap=True, overflow="ellipsis")
    filled = round(frac * 22)
    bar = Text("━" * filled, style=theme.PV)
    bar.append("─" * (22 - filled), style="grey30")
    grid.add_row(bar, Text(f"{frac * 100:.0f}%", style=theme.MUTED), Text(snap.message or ""))
    return grid


def stop_banner(snap: RunSnapshot) -> Text | None:
    """A line that says the motor is stopping or stopped, and why; None while it runs."""
    if snap.phase is Phase.STOPPING and not snap.stopped:
        return Text(f" ■ STOPPING THE MOTOR  {snap.message} ", style="bold black on " + theme.WARN,
                    no_wrap=True, overflow="ellipsis")
    if snap.stopped:
        return Text(f" ■ MOTOR STOPPED: zero output confirmed  {snap.message} ",
                    style="bold black on " + theme.OK, no_wrap=True, overflow="ellipsis")
    return None


def run_chart(snap: RunSnapshot, height: int = 9, out_height: int = 3) -> Group:
    """PV and setpoint over the recent samples, output on its own strip below (shared time axis)."""
    t = list(snap.t)
    n = min(len(t), len(snap.pv))
    xr = (t[0], t[-1]) if n >= 2 and t[-1] > t[0] else None
    upper = [Series(t[: len(snap.sp)], list(snap.sp), theme.SP, "setpoint")] if snap.sp else []
    upper.append(Series(t[:n], list(snap.pv[:n]), theme.PV, "PV"))
    lower = [Series(t[: len(snap.out)], list(snap.out), theme.OUT, "output")]
    if not t:
        return Group(Text("  waiting for samples…", style=theme.MUTED))
    return Group(
        BrailleChart(upper, height=height, x_range=xr, show_x_axis=False, legend=False),
        BrailleChart(lower, height=out_height, x_range=xr, legend=False),
        chart_legend(upper + lower),
    )


def chart_legend(series: Sequence[Series]) -> Text:
    """Colour key for a chart."""
    legend = Text(" " * (BrailleChart.GUTTER + 1), no_wrap=True, overflow="ellipsis")
    for s in series:
        legend.append("━━ ", style=s.style)
        legend.append(s.name + "   ", style=theme.MUTED)
    return legend


def estimate_changes(estimates: Sequence[CycleEstimate]) -> list[float | None]:
    """Per cycle: the largest relative change of Ku or Tu from the previous cycle (None first)."""
    changes: list[float | None] = []
    for i, e in enumerate(estimates):
        if i == 0:
            changes.append(None)
            continue
        p = estimates[i - 1]
        rel = []
        for a, b in ((e.ku, p.ku), (e.tu, p.tu)):
            if b and math.isfinite(a) and math.isfinite(b):
                rel.append(abs(a - b) / abs(b))
        changes.append(max(rel) if rel else None)
    return changes


def estimates_table(
    estimates: Sequence[CycleEstimate],
    converged: bool,
    max_rows: int = 6,
    tolerance: float = 0.02,
) -> Table:
    """The last `max_rows` cycles: period, amplitude, Ku (refined from the harmonics) beside the
    plain describing-function Ku, Tu and the change from the cycle before.

    A change within `tolerance` (relative) is green; the title says when the run has converged.
    """
    title = Text("estimates per cycle ", style=theme.TITLE)
    if converged:
        title.append("✓ converged", style=f"bold {theme.OK}")
    elif estimates:
        title.append("settling…", style=theme.WARN)
    table = Table(
        title=title,
        title_justify="left",
        box=None,
        padding=(0, 1),
        header_style=theme.MUTED,
        expand=False,
    )
    for name in ("cyc", "period s", "p-p", "Ku (plain)", "Tu s", "Δ"):
        table.add_column(name, justify="right", no_wrap=True)
    changes = estimate_changes(estimates)
    shown = list(zip(estimates, changes, strict=True))[-max_rows:] if max_rows > 0 else []
    for e, ch in shown:
        if ch is None:
            delta = Text("—", style=theme.MUTED)
        else:
            delta = Text(f"{ch * 100:.1f}%", style=theme.OK if ch <= tolerance else theme.WARN)
        ku = Text(fmt(e.ku))
        if e.ku_df is not None:
            ku.append(f" ({fmt(e.ku_df, 3)})", style=theme.MUTED)
        table.add_row(str(e.index), fmt(e.period), fmt(e.amplitude), ku, fmt(e.tu), delta)
    if not estimates:
        table.add_row("—", "", "", "", "", "")
    return table


def limit_bar(gauge: LimitGauge, width: int = 14) -> Text:
    """One safety limit: label, a bar filled to value/limit, the figures."""
    frac = gauge.fraction
    label = LIMIT_LABELS.get(gauge.name, gauge.name)
    text = Text(f"{label:<10} ", style=theme.MUTED, no_wrap=True, overflow="ellipsis")
    if not gauge.limit or gauge.limit == float("inf"):
        text.append("·" * width, style="grey30")
        text.append(" off")
        return text
    filled = min(width, round(min(frac, 1.0) * width))
    style = theme.level_style(frac)
    text.append("█" * filled, style=style)
    text.append("░" * (width - filled), style="grey30")
    unit = f" {gauge.unit}" if gauge.unit else ""
    text.append(f" {fmt(abs(gauge.value), 3)}/{fmt(gauge.limit, 3)}{unit}", style=style)
    return text


def limit_bars(limits: Sequence[LimitGauge], width: int = 14) -> Group:
    """One bar per safety limit, under a title."""
    rows: list[RenderableType] = [Text("distance to limits", style=theme.TITLE)]
    rows += [limit_bar(g, width) for g in limits]
    if not limits:
        rows.append(Text("no limits reported yet", style=theme.MUTED))
    return Group(*rows)


def link_line(link: LinkHealth) -> Group:
    """Round-trip time and frame counters (two lines); red when frames were lost or damaged."""
    rtt = Text(no_wrap=True, overflow="ellipsis")
    rtt.append("link ", style=theme.TITLE)
    if link.rtt_median is None:
        rtt.append("round trip —", style=theme.MUTED)
    else:
        rtt.append(f"round trip {link.rtt_median * 1e3:.1f} ms", style=theme.MUTED)
        if link.rtt_p99 is not None:
            rtt.append(f" (p99 {link.rtt_p99 * 1e3:.1f})", style=theme.MUTED)
    bad = link.frames_lost + link.crc_errors
    frames = Text("     frames ", style=theme.MUTED, no_wrap=True, overflow="ellipsis")
    frames.append(f"{link.frames_good} ok", style=theme.OK)
    frames.append(f", {link.frames_lost} lost, {link.crc_errors} crc",
                  style=f"bold {theme.BAD}" if bad else theme.MUTED)
    return Group(rtt, frames)


class KeyBar:
    """The keys of a screen, the abort keys first and always shown; the reminder that the
    cut-off switch is the real stop is added on the right where the width allows."""

    def __init__(self, extra: Sequence[tuple[str, str]] = (), stopped: bool = False) -> None:
        self.extra = tuple(extra)
        self.stopped = stopped

    def text(self) -> Text:
        """The keys as one line of text (without the right-hand reminder)."""
        left = Text(no_wrap=True, overflow="ellipsis")
        left.append(" SPACE ESC Q ", style=theme.KEYBAR)
        left.append(" motor stopped " if self.stopped else " STOP MOTOR ", style="bold " + theme.WARN)
        for key, what in self.extra:
            left.append(" ")
            left.append(f" {key} ", style=theme.KEYCAP)
            left.append(f" {what}", style=theme.MUTED)
        return left

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        left = self.text()
        right = "cut-off switch: the real stop "
        room = options.max_width - left.cell_len
        if room >= len(right) + 2:
            left.append(" " * (room - len(right)))
            left.append(right, style=theme.MUTED)
        yield left


def key_bar(extra: Sequence[tuple[str, str]] = (), stopped: bool = False) -> KeyBar:
    """The key line of a screen (see KeyBar)."""
    return KeyBar(extra, stopped)


def alarm_banner(alarm: str, advice: str | None = None) -> Table:
    """A full-width alarm: the reason and what to do. White on red, no way to miss it."""
    grid = Table.grid(expand=True)
    grid.add_column(justify="center")
    grid.add_row(Text(" ", style=theme.ALARM))
    grid.add_row(Text(f"⚠  {alarm}  ⚠", style=theme.ALARM, justify="center"))
    if advice:
        grid.add_row(Text(advice, style=theme.ALARM, justify="center"))
    grid.add_row(Text(" ", style=theme.ALARM))
    grid.rows[0].style = theme.ALARM
    for row in grid.rows:
        row.style = theme.ALARM
    return grid


def alarm_advice(snap: RunSnapshot) -> str:
    """What the operator should do for the alarm in `snap`."""
    if not snap.stopped:
        return "The device has not confirmed zero output: CUT POWER at the switch now."
    text = (snap.alarm or "").lower()
    if "link" in text:
        return "Output confirmed zero. Check the cable and port, then start again."
    return "Output confirmed zero. Find the cause before powering the motor again."


def header(title: str, snap: RunSnapshot | None = None, right: str = "") -> Table:
    """One line: our name and the screen on the left, device, axis and loop mode on the right."""
    grid = Table.grid(expand=True)
    grid.add_column(no_wrap=True)
    grid.add_column(justify="right", no_wrap=True, overflow="ellipsis")
    left = Text(no_wrap=True)
    left.append(" autotune ", style="bold black on bright_cyan")
    left.append(f" {title}", style=theme.TITLE)
    if snap is not None and not right:
        right = f"{snap.device or 'device ?'} · axis {snap.axis} · {snap.loop_mode} loop"
    grid.add_row(left, Text(right + " ", style=theme.MUTED))
    return grid


def padded(renderable: RenderableType, left: int = 1) -> Padding:
    """Indent a block by `left` columns."""
    return Padding(renderable, (0, 0, 0, left))
