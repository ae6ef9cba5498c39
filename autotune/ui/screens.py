"""The screens of the bench view, composed from the small renderables in `autotune.ui.widgets`.

Every screen is a pure function of one snapshot or view and of the terminal size (columns, rows)
it must fit; it returns a rich renderable. The abort keys sit on the second line of every screen,
right under the title, so no terminal height can push them out of sight.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from rich.box import HEAVY, ROUNDED, SIMPLE_HEAD
from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from autotune.core.progress import RunSnapshot
from autotune.ui import theme
from autotune.ui.chart import BrailleChart, Series
from autotune.ui.views import ConfirmView, FinishView, ProposalsView, StartView, StepView
from autotune.ui.widgets import (
    alarm_advice,
    alarm_banner,
    chart_legend,
    estimates_table,
    fmt,
    header,
    key_bar,
    limit_bars,
    link_line,
    phase_road,
    progress_line,
    run_chart,
    stop_banner,
)

MIN_WIDTH = 80  # narrowest supported terminal, columns
MIN_HEIGHT = 24  # smallest supported terminal, rows

# Keys of each screen besides the abort keys: (key cap, what it does).
START_KEYS = (("Y", "all true: start"),)
PROPOSAL_KEYS = (
    ("1-9 Tab", "choose"),
    ("m M", "Ms"),
    ("s", "step with the chosen"),
)
STEP_KEYS = (("a", "accept"), ("d", "detune"), ("o", "other"), ("r", "repeat"))
CONFIRM_KEYS = (("Y", "power the motor"), ("any other", "back"))
ALARM_KEYS = (("Enter", "leave"),)

# Predicted figures shown for each proposal: key, column title, digits; the wide set adds more.
NARROW_FIGURES = (("ms", "Ms", 3), ("overshoot", "OS %", 3), ("settling_time", "ts s", 3))
WIDE_FIGURES = (
    ("ms", "Ms", 3),
    ("gain_margin", "GM", 3),
    ("phase_margin_deg", "PM °", 3),
    ("overshoot", "OS %", 3),
    ("rise_time", "tr s", 3),
    ("settling_time", "ts s", 3),
    ("iae_load", "IAE ld", 3),
    ("peak_output", "u pk", 3),
)


def live_screen(snap: RunSnapshot, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """The run as it happens: phase, chart, estimates, distance to every limit, link, keys."""
    width, height = max(width, MIN_WIDTH), max(height, MIN_HEIGHT)
    parts: list[RenderableType] = [
        header("bench run", snap),
        key_bar(stopped=snap.stopped and snap.phase.value in ("stopping", "done")),
    ]
    fixed = 17  # every row but the chart's plot rows
    if snap.alarm:
        parts.append(alarm_banner(snap.alarm, alarm_advice(snap)))
        fixed += 4
    compact = height - fixed < 7  # short terminal: drop the spacer lines first
    if compact:
        fixed -= 2
    spacer: list[RenderableType] = [] if compact else [Text("")]
    banner = stop_banner(snap)
    parts += [phase_road(snap), banner if banner is not None else progress_line(snap), *spacer]
    room = max(5, height - fixed)
    out_h = 2 if room < 10 else (3 if room < 16 else 4)
    pv_h = min(room - out_h, 14)
    parts += [run_chart(snap, height=pv_h, out_height=out_h), *spacer]
    bar_w = 10 if width < 100 else 16
    right = Group(limit_bars(snap.limits, width=bar_w), link_line(snap.link))
    table = estimates_table(snap.estimates, snap.converged, max_rows=5)
    bottom = Table.grid(expand=True, padding=(0, 1))
    bottom.add_column(ratio=1)
    bottom.add_column(width=min(48, 10 + 1 + bar_w + 17))
    bottom.add_row(table, right)
    parts.append(bottom)
    return Group(*parts)


def _pairs_grid(pairs: Sequence[tuple[str, str]], columns: int) -> Table:
    """Label/value pairs laid out `columns` pairs a line."""
    grid = Table.grid(padding=(0, 1))
    for _ in range(columns):
        grid.add_column(style=theme.MUTED, no_wrap=True, justify="right")
        grid.add_column(no_wrap=True)
    cells: list[str] = []
    for label, value in pairs:
        cells += [label, value + "   "]
    while cells:
        row, cells = cells[: 2 * columns], cells[2 * columns :]
        row += [""] * (2 * columns - len(row))
        grid.add_row(*row)
    return grid


def start_screen(view: StartView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """Before any motion: what will move, the limits in force, the cautions, the confirm key."""
    width = max(width, MIN_WIDTH)
    where = Text()
    where.append("device ", style=theme.MUTED)
    where.append(view.device, style="bold")
    where.append(f" on {view.port}")
    if view.simulated:
        where.append(" (simulated: no motor moves)", style=theme.MUTED)
    where.append("   axis ", style=theme.MUTED)
    where.append(str(view.axis), style="bold")
    where.append("   loop ", style=theme.MUTED)
    where.append(f"{view.loop_mode}", style="bold")
    if view.loop_mode in ("device", "host"):
        where.append(" (relay and PID run on the " +
                     ("board)" if view.loop_mode == "device" else "host)"), style=theme.MUTED)
    cols = 2 if width < 120 else 3
    parts: list[RenderableType] = [header("before power"), key_bar(START_KEYS), where]
    if view.out_dir:
        parts.append(Text.assemble(("files to ", theme.MUTED), view.out_dir))
    parts += [Text("limits in force", style=theme.TITLE), _pairs_grid(view.limits, cols)]
    if view.plan:
        parts += [Text("relay plan", style=theme.TITLE), _pairs_grid(view.plan, cols)]
    cautions = Text()
    for i, line in enumerate(view.cautions):
        cautions.append("▸ ", style=f"bold {theme.WARN}")
        cautions.append(line + ("\n" if i < len(view.cautions) - 1 else ""))
    confirm = Text()
    confirm.append(" Y ", style=theme.KEYCAP)
    confirm.append(" when every line above is true: the motor will be powered. ", style="bold")
    confirm.append("A stop key leaves, nothing moves.", style=theme.MUTED)
    parts += [
        Panel(cautions, title=Text(" before the motor moves ", style=f"bold {theme.WARN}"),
              title_align="left", border_style=theme.WARN, box=HEAVY, padding=(0, 1)),
        confirm,
    ]
    return Group(*parts)


def _figure(row_pred: dict[str, float], key: str, digits: int) -> str:
    v = row_pred.get(key)
    return fmt(v, digits) if v is not None else "—"


def proposals_table(view: ProposalsView, width: int = MIN_WIDTH) -> Table:
    """Every design: its gains and predicted figures; default marked, violations flagged."""
    figures = WIDE_FIGURES if width >= 120 else NARROW_FIGURES
    table = Table(box=SIMPLE_HEAD, padding=(0, 1), header_style=theme.MUTED, expand=False,
                  border_style="grey35", show_edge=False, pad_edge=False)
    table.add_column("#", justify="right", no_wrap=True, min_width=2)
    table.add_column("design", no_wrap=True, min_width=12)
    for name in ("kp", "ki /s", "kd s"):
        table.add_column(name, justify="right", no_wrap=True, min_width=6)
    table.add_column("b", justify="right", no_wrap=True, min_width=4)  # setpoint weight
    for _, title, _ in figures:
        table.add_column(title, justify="right", no_wrap=True, min_width=4)
    used = 2 + 12 + 3 * 6 + 4 + sum(5 for _ in figures) + 2 * (len(figures) + 6)
    table.add_column("flags", no_wrap=True, overflow="ellipsis",
                     max_width=max(6, width - used - 2))
    for i, row in enumerate(view.rows):
        mark = Text(no_wrap=True)
        mark.append("◆ " if row.default else "  ", style=f"bold {theme.OK}")
        mark.append(row.name)
        flags = Text(no_wrap=True, overflow="ellipsis")
        if row.violations:
            flags.append("✗ " + "; ".join(row.violations), style=f"bold {theme.BAD}")
        else:
            flags.append("✓", style=theme.OK)
        cells = [str(i + 1) if i < 9 else "", mark, fmt(row.kp), fmt(row.ki), fmt(row.kd),
                 f"{row.setpoint_weight:.2f}"]
        cells += [_figure(dict(row.predicted), key, d) for key, _, d in figures]
        table.add_row(*cells, flags, style=theme.SELECTED if i == view.selected else None)
    return table


MODEL_PARAM_NAMES = {"gain": "K", "time_constant": "T", "velocity_gain": "Kv", "delay": "L",
                     "t1": "T1", "t2": "T2", "zero_time": "Tz"}


def proposals_screen(view: ProposalsView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """Choose the gains to try: the table, the chosen one in detail, the Ms and detune knobs."""
    width = max(width, MIN_WIDTH)
    ident = Text(no_wrap=True, overflow="ellipsis")
    ident.append("identified ", style=theme.MUTED)
    ident.append(f"Ku {fmt(view.ku)}  Tu {fmt(view.tu)} s", style="bold")
    if view.model:
        ident.append(f"   model {view.model}", style=theme.MUTED)
    knobs = Text()
    knobs.append("Ms target ", style=theme.MUTED)
    knobs.append(f"{view.ms_target:.2f}", style=f"bold {theme.PV}")
    if view.spec:
        knobs.append(f"   spec {view.spec}", style=theme.MUTED)
    knobs.append("   ◆", style=f"bold {theme.OK}")
    knobs.append(" default", style=theme.MUTED)
    parts: list[RenderableType] = [
        header("gain choices"),
        key_bar(PROPOSAL_KEYS if view.can_step else PROPOSAL_KEYS[:3]),
        ident,
        knobs,
        proposals_table(view, width),
    ]
    if view.rows:
        sel = view.rows[min(max(view.selected, 0), len(view.rows) - 1)]
        chosen = Text()
        chosen.append(f"chosen {sel.name}", style="bold")
        chosen.append(f"  kp {fmt(sel.kp)}  ki {fmt(sel.ki)} /s  kd {fmt(sel.kd)} s"
                      f"  b {sel.setpoint_weight:.2f}")
        parts.append(chosen)
        if sel.violations:
            parts.append(Text("✗ " + "; ".join(sel.violations), style=f"bold {theme.BAD}"))
    if view.message:
        parts.append(Text(view.message, style=theme.WARN))
    return Group(*parts)


def _verdict_banner(view: StepView) -> Text:
    v = view.verdict
    if v is None:
        return Text(f" no verdict: {view.message or 'the step was stopped'} ",
                    style="bold black on " + theme.WARN)
    if v.passed:
        return Text(f" ✓ PASS  {v.reason} ", style="bold black on " + theme.OK)
    action = getattr(v.action, "value", str(v.action)).replace("_", " ")
    return Text(f" ✗ NOT MET  {v.reason}  → suggested: {action} ",
                style="bold white on dark_orange3")


FIGURE_LABELS = {
    "overshoot": "overshoot %",
    "rise_time": "rise 10-90 s",
    "settling_time": "settling 2% s",
    "steady_state_error": "offset PV",
    "iae": "IAE PV·s",
    "peak_output": "peak output",
    "time_saturated": "saturated s",
}


def step_figures_table(rows: Sequence[object]) -> Table:
    """Measured beside predicted, with the difference (measured - predicted)."""
    table = Table(box=None, padding=(0, 1), header_style=theme.MUTED, expand=False)
    table.add_column("figure", no_wrap=True)
    table.add_column("measured", justify="right", no_wrap=True, style=theme.PV)
    table.add_column("predicted", justify="right", no_wrap=True, style=theme.PREDICTED)
    table.add_column("difference", justify="right", no_wrap=True)
    for r in rows:
        name = str(getattr(r, "name", ""))
        label = FIGURE_LABELS.get(name, f"{name} {getattr(r, 'unit', '')}")
        diff = getattr(r, "difference", None)
        rel = getattr(r, "relative", None)
        dtext = "—" if diff is None else f"{diff:+.3g}"
        if rel is not None and math.isfinite(rel):
            dtext += f" ({rel * 100:+.0f}%)"
        table.add_row(label, fmt(getattr(r, "measured", None), 3),
                      fmt(getattr(r, "predicted", None), 3), dtext)
    return table


def verdict_checks(verdict: object, one_line: bool = False) -> Text:
    """The spec checks, ticked or crossed: one a line, or all on one line by name."""
    checks = Text()
    for c in getattr(verdict, "checks", ()) if verdict is not None else ():
        checks.append("✓ " if c.passed else "✗ ", style=theme.OK if c.passed else theme.BAD)
        if one_line:
            checks.append(c.name.replace("_", " ") + "   ")
        else:
            checks.append(c.message + "\n")
    checks.rstrip()
    return checks


def step_screen(view: StepView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """The confirmation step: response with the prediction overlaid, figures, verdict, keys."""
    width, height = max(width, MIN_WIDTH), max(height, MIN_HEIGHT)
    series = [Series(view.t, view.sp, theme.SP, "setpoint")]
    if view.pred_t:
        series.append(Series(view.pred_t, view.pred_y, theme.PREDICTED, "predicted"))
    series.append(Series(view.t, view.pv, theme.PV, "measured"))
    xs = [x for s in series for x in s.x]
    xr = (min(xs), max(xs)) if len(xs) >= 2 and max(xs) > min(xs) else None
    side_by_side = width >= 100
    checks = verdict_checks(view.verdict, one_line=not side_by_side)
    fixed = 4 + 3 + (len(view.rows) + 1) + (0 if side_by_side else 1) + (1 if view.message else 0)
    chart_h = max(4, min(14, height - fixed))
    keys = view.keys or STEP_KEYS
    gains = Text()
    gains.append(f"{view.name}", style="bold")
    gains.append(f"  kp {fmt(view.kp)}  ki {fmt(view.ki)} /s  kd {fmt(view.kd)} s", style=theme.MUTED)
    parts: list[RenderableType] = [
        header("step check"),
        key_bar(keys),
        gains,
        _verdict_banner(view),
        BrailleChart(series, height=chart_h, x_range=xr, legend=False),
        chart_legend(series),
    ]
    if side_by_side:
        lower = Table.grid(padding=(0, 3))
        lower.add_column()
        lower.add_column()
        lower.add_row(step_figures_table(view.rows), checks)
        parts.append(lower)
    else:
        parts += [step_figures_table(view.rows), checks]
    if view.detune_hint and any(k == "d" for k, _ in keys):
        parts.append(Text.assemble(("d runs the gentler design ", theme.MUTED),
                                   view.detune_hint))
    if view.message:
        parts.append(Text(view.message, style=theme.WARN))
    return Group(*parts)


def confirm_screen(view: ConfirmView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT
                   ) -> Group:
    """The deliberate confirmation before the motor is powered: what will run, the cautions,
    and the one key that goes ahead."""
    width = max(width, MIN_WIDTH)
    what = Text(view.action, style="bold")
    cautions = Text()
    for i, line in enumerate(view.cautions):
        cautions.append("▸ ", style=f"bold {theme.WARN}")
        cautions.append(line + ("\n" if i < len(view.cautions) - 1 else ""))
    confirm = Text()
    confirm.append(" Y ", style=theme.KEYCAP)
    confirm.append(" powers the motor. ", style="bold")
    confirm.append("Any other key goes back; nothing moves.", style=theme.MUTED)
    return Group(
        header("power the motor?"),
        key_bar(CONFIRM_KEYS),
        what,
        Panel(cautions, title=Text(" before the motor moves ", style=f"bold {theme.WARN}"),
              title_align="left", border_style=theme.WARN, box=HEAVY, padding=(0, 1)),
        confirm,
    )


def finish_screen(view: FinishView, width: int = MIN_WIDTH) -> Group:
    """Where the files went, the accepted gains and a code-ready block."""
    style = "bold black on " + (theme.OK if view.ok else theme.WARN)
    files = Table(box=None, padding=(0, 1), show_header=False)
    files.add_column(style=theme.MUTED, no_wrap=True)
    files.add_column(overflow="fold")
    for what, path in view.files:
        files.add_row(what, path)
    parts: list[RenderableType] = [header("finished"), Text(f" {view.message} ", style=style),
                                   Text(""), Text("files written", style=theme.TITLE), files]
    if view.gains:
        g = Table(box=None, padding=(0, 1), show_header=False)
        g.add_column(style=theme.MUTED, no_wrap=True)
        g.add_column()
        for label, value in view.gains:
            g.add_row(label, value)
        parts += [Text("accepted gains", style=theme.TITLE), g]
    if view.code:
        parts.append(Panel(Text(view.code), title="per-tick values for your loop code",
                           title_align="left", border_style="grey35", box=ROUNDED))
    return Group(*parts)
