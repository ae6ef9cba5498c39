"""Small renderables of the bench view, each a pure function of a snapshot (or part of one).

Nothing here reads a clock, a key or the runner: give it values, get a rich renderable back.
Every number carries its unit: PV units ("PV"), output units ("out") or seconds.
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
from autotune.ui.chart import BrailleChart, Series, legend_text
from autotune.ui.views import CUT_OFF, KP_UNIT, OUT_UNIT, PV_UNIT, UNITS_NOTE, LiveContext

# Keys that stop the motor on every screen (handled first by the key thread).
ABORT_KEYS = ("Space", "Esc", "q", "Ctrl-C")

PHASE_LABELS: dict[Phase, str] = {
    Phase.CONNECT: "connect",
    Phase.PRECHECK_REST: "rest",
    Phase.PRECHECK_DIRECTION: "direction",
    Phase.PRECHECK_BREAKAWAY: "breakaway",
    Phase.RELAY: "relay",
    Phase.ANALYSIS: "analysis",
    Phase.PROPOSALS: "gains",
    Phase.STEP: "step",
    Phase.WAITING: "waiting",
    Phase.STOPPING: "stopping",
    Phase.DONE: "done",
}
# Every stage a job may travel, in order (waiting/stopping/done are shown apart).
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
# The unit of each limit where the snapshot gives none.
LIMIT_UNITS = {
    "pv_window": PV_UNIT,
    "pv_rate": f"{PV_UNIT}/s",
    "output": OUT_UNIT,
    "duration": "s",
    "sample_gap": "s",
}


def fmt(v: float | None, digits: int = 4) -> str:
    """A figure with `digits` significant digits; '—' for None or NaN."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    if v == 0:
        return "0"
    return f"{v:.{digits}g}"


def with_unit(v: float | None, unit: str, digits: int = 4) -> str:
    """`fmt(v)` followed by its unit ('—' alone when unknown)."""
    text = fmt(v, digits)
    return text if text == "—" or not unit else f"{text} {unit}"


def phase_label(snap: RunSnapshot) -> str:
    """The current phase in words, with the relay cycle count where it applies."""
    label = PHASE_LABELS.get(snap.phase, str(snap.phase.value))
    if snap.phase is Phase.RELAY and snap.cycle:
        label += f" cycle {snap.cycle}"
    return label


def default_road() -> tuple[Phase, ...]:
    """The road of a whole tuning job without the optional breakaway."""
    return tuple(p for p in PHASE_ROAD if p is not Phase.PRECHECK_BREAKAWAY)


def phase_road(snap: RunSnapshot, road: Sequence[Phase] = ()) -> Text:
    """The job's stages as a road: done ones muted, the current one lit, the rest dim. Only the
    stages in `road` are shown (default: the whole job without the breakaway)."""
    road = tuple(road) or default_road()
    text = Text(no_wrap=True, overflow="ellipsis")
    if snap.phase in road:
        here = road.index(snap.phase)
    elif snap.phase is Phase.DONE:
        here = len(road)
    else:  # waiting or stopping: after the last stage the run reached
        here = -1
    for i, phase in enumerate(road):
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
    elif snap.phase is Phase.WAITING:
        text.append("  ‖ waiting for you, motor unpowered", style=f"bold {theme.WARN}")
    elif snap.phase is Phase.DONE:
        text.append("  ✓ done", style=f"bold {theme.OK}")
    return text


def phase_progress(snap: RunSnapshot, ctx: LiveContext) -> tuple[float | None, str]:
    """How far the current phase is (0..1, None when nothing bounds it) and that in words.

    Relay: the cycles done against the cycle and time limits (it usually converges before
    either); a phase with a known longest duration: the time spent against it; otherwise only
    the time spent. Done: 1.
    """
    t_now = snap.t[-1] if snap.t else None
    spent = ctx.elapsed(t_now)
    spent_txt = "" if spent is None else f"{spent:.1f} s"
    if snap.phase is Phase.DONE:
        return 1.0, "finished"
    if snap.phase in (Phase.WAITING, Phase.PROPOSALS):
        return None, "motor unpowered" + (f", {spent_txt} so far" if spent_txt else "")
    if snap.progress:
        return min(max(snap.progress, 0.0), 1.0), spent_txt
    if snap.phase is Phase.RELAY:
        if snap.converged:
            return 1.0, f"converged after {snap.cycle} cycles"
        parts = [f"cycle {snap.cycle}" + (f" of at most {snap.max_cycles}"
                                          if snap.max_cycles else "")]
        fracs = [snap.cycle / snap.max_cycles] if snap.max_cycles else []
        if spent is not None and ctx.expected:
            fracs.append(spent / ctx.expected)
            parts.append(f"{spent:.1f} of at most {ctx.expected:g} s")
        return (min(max(fracs), 1.0) if fracs else None), ", ".join(parts)
    if spent is not None and ctx.expected:
        return min(spent / ctx.expected, 1.0), f"{spent:.1f} of at most {ctx.expected:g} s"
    return None, spent_txt


def progress_line(snap: RunSnapshot, ctx: LiveContext | None = None) -> Table:
    """Where the job is (stage k of n), a bar of the phase's progress where something bounds
    it, that progress in words, and the phase's one-line message."""
    ctx = ctx or LiveContext()
    frac, words = phase_progress(snap, ctx)
    road = ctx.road or default_road()
    grid = Table.grid(expand=True, padding=(0, 1))
    grid.add_column(width=12, no_wrap=True)
    grid.add_column(width=14, no_wrap=True)
    grid.add_column(ratio=1, no_wrap=True, overflow="ellipsis")
    stage = Text(no_wrap=True)
    if ctx.stage:
        stage.append(f"stage {ctx.stage}/{len(road)}", style=theme.MUTED)
    elif snap.phase is Phase.DONE:
        stage.append(f"stage {len(road)}/{len(road)}", style=theme.MUTED)
    bar = Text(no_wrap=True)
    if frac is None:
        bar.append("·" * 14, style="grey30")
    else:
        filled = round(frac * 14)
        bar.append("━" * filled, style=theme.PV)
        bar.append("─" * (14 - filled), style="grey30")
    message = Text(no_wrap=True, overflow="ellipsis")
    if words:
        message.append(words, style="bold")
    if snap.message:
        message.append(("  " if words else "") + snap.message)
    grid.add_row(stage, bar, message)
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


def setpoint_series(x: Sequence[float], y: Sequence[float], name: str = "setpoint") -> Series:
    return Series(x, y, theme.SP, name, "dashed", "S")


def pv_series(x: Sequence[float], y: Sequence[float], name: str = "PV") -> Series:
    return Series(x, y, theme.PV, name, "solid", "P")


def output_series(x: Sequence[float], y: Sequence[float]) -> Series:
    return Series(x, y, theme.OUT, "output", "solid", "U")


def predicted_series(x: Sequence[float], y: Sequence[float]) -> Series:
    return Series(x, y, theme.PREDICTED, "predicted (model)", "dotted", "M")


def run_chart(snap: RunSnapshot, height: int = 9, out_height: int = 3,
              t0: float | None = None) -> Group:
    """PV and setpoint over the recent samples, output on its own strip below (shared time
    axis in seconds since `t0`, the job's first sample; device time when None)."""
    origin = t0 if t0 is not None else 0.0
    t = [x - origin for x in snap.t]
    n = min(len(t), len(snap.pv))
    if not t:
        return Group(Text("  waiting for samples…", style=theme.MUTED))
    xr = (t[0], t[-1]) if n >= 2 and t[-1] > t[0] else None
    upper = [setpoint_series(t[: len(snap.sp)], list(snap.sp))] if snap.sp else []
    upper.append(pv_series(t[:n], list(snap.pv[:n])))
    lower = [output_series(t[: len(snap.out)], list(snap.out))]
    since = "since the start" if t0 is not None else "device time"
    return Group(
        BrailleChart(upper, height=height, unit=PV_UNIT, x_range=xr, show_x_axis=False,
                     legend=False),
        BrailleChart(lower, height=out_height, unit=OUT_UNIT, x_range=xr, legend=False,
                     x_label=f"s {since}"),
        chart_legend(upper + lower, UNITS_NOTE),
    )


def chart_legend(series: Sequence[Series], note: str = "") -> Text:
    """Key of a chart: letter, line pattern, colour and name of each trace (see legend_text)."""
    return legend_text(series, BrailleChart.GUTTER + 1, note)


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


def plain_df(e: CycleEstimate) -> float | None:
    """The plain describing-function Ku of a cycle where the estimate carries it beside a
    refined one (None: the estimate's own Ku is the plain figure)."""
    v = getattr(e, "ku_df", None)
    return float(v) if isinstance(v, int | float) else None


def cycle_columns(estimates: Sequence[CycleEstimate]) -> list[tuple[str, str]]:
    """(heading, unit) of the per-cycle table: with both Ku figures where the estimates carry
    the refined one beside the plain describing function (DF: Åström and Hägglund's relay
    experiment read with the describing function, 4 d / (pi a))."""
    both = any(plain_df(e) is not None for e in estimates)
    cols = [("#", ""), ("period", "s"), ("swing", f"{PV_UNIT} p-p")]
    cols += [("Ku", KP_UNIT), ("Ku DF", KP_UNIT)] if both else [("Ku DF", KP_UNIT)]
    cols += [("Tu", "s"), ("Δ", "%")]
    return cols


def cycle_cells(e: CycleEstimate, change: float | None, both: bool) -> list[str]:
    """The cells of one cycle row (see cycle_columns)."""
    cells = [str(e.index), fmt(e.period, 3), fmt(e.amplitude, 3), fmt(e.ku, 4)]
    if both:
        cells.append(fmt(plain_df(e), 4))
    cells += [fmt(e.tu, 3), "—" if change is None else f"{change * 100:.1f}"]
    return cells


def cycle_table(
    estimates: Sequence[CycleEstimate],
    converged: bool,
    max_rows: int = 6,
    tolerance: float = 0.02,
) -> Table:
    """The last `max_rows` relay cycles: period, PV swing, Ku, Tu and the change from the cycle
    before, each column with its unit. A change within `tolerance` (relative) is green; the
    title says when the relay has converged."""
    title = Text("relay cycles ", style=theme.TITLE)
    if converged:
        title.append("✓ converged", style=f"bold {theme.OK}")
    elif estimates:
        title.append("settling…", style=theme.WARN)
    table = Table(title=title, title_justify="left", box=None, padding=(0, 1),
                  header_style=theme.MUTED, expand=False, pad_edge=False)
    cols = cycle_columns(estimates)
    both = len(cols) == 7
    for name, unit in cols:
        table.add_column(f"{name}\n{unit}" if unit else f"{name}\n", justify="right",
                         no_wrap=True)
    changes = estimate_changes(estimates)
    shown = list(zip(estimates, changes, strict=True))[-max_rows:] if max_rows > 0 else []
    for e, ch in shown:
        cells = cycle_cells(e, ch, both)
        style = theme.MUTED if ch is None else (theme.OK if ch <= tolerance else theme.WARN)
        table.add_row(*cells[:-1], Text(cells[-1], style=style))
    return table


def message_log(lines: Sequence[str], max_rows: int = 6, title: str = "what happened") -> Group:
    """The newest lines the job said, oldest first, under a title."""
    rows: list[RenderableType] = [Text(title, style=theme.TITLE)]
    for line in list(lines)[-max_rows:] if max_rows > 0 else []:
        rows.append(Text(line, no_wrap=True, overflow="ellipsis", style=theme.MUTED))
    if len(rows) == 1:
        rows.append(Text("nothing yet", style=theme.MUTED))
    return Group(*rows)


def gauge_unit(gauge: LimitGauge) -> str:
    """The unit of a limit (the snapshot's, else the usual one for its name)."""
    return gauge.unit or LIMIT_UNITS.get(gauge.name, "")


def limit_bar(gauge: LimitGauge, width: int = 14) -> Text:
    """One safety limit: label, a bar filled to value/limit, the figures with their unit."""
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
    unit = gauge_unit(gauge)
    text.append(f" {fmt(abs(gauge.value), 3)} of {fmt(gauge.limit, 3)}"
                f"{' ' + unit if unit else ''}", style=style)
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
            rtt.append(f", p99 {link.rtt_p99 * 1e3:.1f} ms", style=theme.MUTED)
    bad = link.frames_lost + link.crc_errors
    frames = Text("frames ", style=theme.MUTED, no_wrap=True, overflow="ellipsis")
    frames.append(f"{link.frames_good} ok", style=theme.OK)
    frames.append(f", {link.frames_lost} lost, {link.crc_errors} bad",
                  style=f"bold {theme.BAD}" if bad else theme.MUTED)
    return Group(rtt, frames)


class KeyBar:
    """The keys of a screen: the abort keys first and always shown, with the reminder that
    the physical cut-off is the real stop beside them at every width; the screen's own keys
    follow on the same line where they fit, else on a second line."""

    def __init__(self, extra: Sequence[tuple[str, str]] = (), stopped: bool = False) -> None:
        self.extra = tuple(extra)
        self.stopped = stopped

    def abort_text(self) -> Text:
        """The abort keys and the cut-off reminder, one line."""
        left = Text(no_wrap=True, overflow="ellipsis")
        left.append(" SPACE ESC Q ", style=theme.KEYBAR)
        left.append(" motor stopped " if self.stopped else " STOP MOTOR ",
                    style="bold " + theme.WARN)
        left.append(f"  {CUT_OFF}", style=theme.MUTED)
        return left

    def keys_text(self) -> Text:
        """The screen's own keys, one line."""
        keys = Text(no_wrap=True, overflow="ellipsis")
        for i, (key, what) in enumerate(self.extra):
            if i:
                keys.append("  ")
            keys.append(f" {key} ", style=theme.KEYCAP)
            keys.append(f" {what}", style=theme.MUTED)
        return keys

    def lines(self, width: int) -> list[Text]:
        """The bar as it is drawn at `width` columns (one line or two)."""
        first, keys = self.abort_text(), self.keys_text()
        if not self.extra:
            return [first]
        if first.cell_len + 3 + keys.cell_len <= width:
            first.append("   ")
            first.append_text(keys)
            return [first]
        return [first, keys]

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield from self.lines(options.max_width)


def key_bar(extra: Sequence[tuple[str, str]] = (), stopped: bool = False) -> KeyBar:
    """The key line(s) of a screen (see KeyBar)."""
    return KeyBar(extra, stopped)


def key_rows(extra: Sequence[tuple[str, str]], width: int) -> int:
    """How many lines the key bar takes at `width` columns."""
    return len(KeyBar(extra).lines(width))


def alarm_banner(alarm: str, advice: str | None = None) -> Table:
    """A full-width alarm: the reason and what to do. White on red, no way to miss it."""
    grid = Table.grid(expand=True)
    grid.add_column(justify="center")
    grid.add_row(Text(" ", style=theme.ALARM))
    grid.add_row(Text(f"⚠  {alarm}  ⚠", style=theme.ALARM, justify="center"))
    if advice:
        grid.add_row(Text(advice, style=theme.ALARM, justify="center"))
    grid.add_row(Text(" ", style=theme.ALARM))
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
    """One line: our name and the screen on the left, board, axis and loop mode on the right."""
    grid = Table.grid(expand=True)
    grid.add_column(no_wrap=True)
    grid.add_column(justify="right", no_wrap=True, overflow="ellipsis")
    left = Text(no_wrap=True)
    left.append(" autotune ", style="bold black on bright_cyan")
    left.append(f" {title}", style=theme.TITLE)
    if snap is not None and not right:
        right = f"{snap.device or 'board ?'} · axis {snap.axis} · {snap.loop_mode} loop"
    grid.add_row(left, Text(right + " ", style=theme.MUTED))
    return grid


def padded(renderable: RenderableType, left: int = 1) -> Padding:
    """Indent a block by `left` columns."""
    return Padding(renderable, (0, 0, 0, left))
