"""The screens of the bench view, composed from the small renderables in `autotune.ui.widgets`.

Every screen is a pure function of one snapshot or view and of the terminal size (columns, rows)
it must fit; it returns a rich renderable. The abort keys and the reminder that the physical
cut-off is the real stop sit on the second line of every screen, right under the title, so no
terminal size can push them out of sight.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from rich.box import HEAVY, ROUNDED, SIMPLE_HEAD
from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from autotune.core.progress import Phase, RunSnapshot
from autotune.ui import theme
from autotune.ui.chart import BrailleChart
from autotune.ui.views import (
    KD_UNIT,
    KI_UNIT,
    KP_UNIT,
    OUT_UNIT,
    PV_UNIT,
    ConfirmView,
    FinishView,
    LiveContext,
    ProposalRow,
    ProposalsView,
    StartView,
    StepView,
)
from autotune.ui.widgets import (
    alarm_advice,
    alarm_banner,
    chart_legend,
    cycle_table,
    fmt,
    header,
    key_bar,
    key_rows,
    limit_bars,
    link_line,
    message_log,
    phase_road,
    predicted_series,
    progress_line,
    pv_series,
    run_chart,
    setpoint_series,
    stop_banner,
)

MIN_WIDTH = 80  # narrowest supported terminal, columns
MIN_HEIGHT = 24  # smallest supported terminal, rows

# The key that selects each proposal row on the gains screen, in row order: digits, then
# letters that no other key of that screen uses (m M Ms, n p Tab move, s step, q stop, y).
ROW_KEYS = "123456789abcdefghijkl"

# Keys of each screen besides the abort keys: (key cap, what it does).
START_KEYS = (("Y", "all true: start"),)
CONFIRM_KEYS = (("Y", "power the motor"), ("any other", "back"))
ALARM_KEYS = (("Enter", "leave"),)


def row_key(i: int) -> str:
    """The selection key of proposal row `i` (0-based); "" beyond ROW_KEYS (Tab reaches it)."""
    return ROW_KEYS[i] if 0 <= i < len(ROW_KEYS) else ""


def proposal_keys(n: int, can_step: bool = True) -> tuple[tuple[str, str], ...]:
    """The keys of the gains screen for `n` proposals."""
    last = row_key(min(n, len(ROW_KEYS)) - 1) if n else ""
    pick = "1" if n <= 1 else (f"1-{last}" if n <= 9 else f"1-9 a-{last}")
    keys = [(pick, "choose"), ("Tab n p", "next/back"), ("m M", "Ms −/+")]
    if can_step:
        keys.append(("s", "step with the chosen"))
    return tuple(keys)


# ---------------------------------------------------------------------------- live run
def live_screen(snap: RunSnapshot, width: int = MIN_WIDTH, height: int = MIN_HEIGHT,
                ctx: LiveContext | None = None) -> Group:
    """The run as it happens: stages, progress, chart, relay cycles (or what happened), the
    distance to every limit, link health, keys."""
    width, height = max(width, MIN_WIDTH), max(height, MIN_HEIGHT)
    ctx = ctx or LiveContext()
    stopped = snap.stopped and snap.phase in (Phase.STOPPING, Phase.DONE, Phase.WAITING)
    parts: list[RenderableType] = [header("bench run", snap), key_bar(stopped=stopped)]
    fixed = 2
    if snap.alarm:
        parts.append(alarm_banner(snap.alarm, alarm_advice(snap)))
        fixed += 4
    banner = stop_banner(snap)
    parts += [phase_road(snap, ctx.road), banner if banner is not None else
              progress_line(snap, ctx)]
    fixed += 2
    limits = [g for g in snap.limits]
    bottom_h = max(6, 3 + len(limits)) + max(0, height - MIN_HEIGHT) // 4
    fixed += 3 + bottom_h  # the chart's time axis, its labels and the legend; the bottom row
    spare = height - fixed
    spacer = spare >= 16
    if spacer:
        fixed += 2
        spare -= 2
    room = max(5, spare)
    out_h = 3 if room < 14 else 4
    pv_h = min(room - out_h, 16)
    gap: list[RenderableType] = [Text("")] if spacer else []
    parts += [*gap, run_chart(snap, height=pv_h, out_height=out_h, t0=ctx.t0), *gap]
    bar_w = 6 if width < 100 else 14
    right = Group(limit_bars(limits, width=bar_w), link_line(snap.link))
    right_w = 10 + 1 + bar_w + 18
    reached = ctx.reached
    if snap.estimates and reached in (Phase.RELAY, Phase.ANALYSIS):
        left: RenderableType = cycle_table(snap.estimates, snap.converged,
                                           max_rows=bottom_h - 3)
    else:
        left = message_log(ctx.log, max_rows=bottom_h - 1)
    bottom = Table.grid(expand=True, padding=(0, 1))
    bottom.add_column(ratio=1)
    bottom.add_column(width=right_w)
    bottom.add_row(left, right)
    parts.append(bottom)
    return Group(*parts)


# ---------------------------------------------------------------------------- start
def packed_pairs(pairs: Sequence[tuple[str, str]], width: int, title: str = "") -> Text:
    """Label/value pairs on as few lines as `width` allows, never cutting a pair (a pair is
    broken only when it is wider than a line by itself); `title` leads the first line."""
    text = Text()
    line = 0
    if title:
        text.append(title + "  ", style=theme.TITLE)
        line = len(title) + 2
    first = True
    for label, value in pairs:
        piece = len(label) + 1 + len(value)
        sep = 0 if first else 3
        if not first and line + sep + piece > width:
            text.append("\n  ")
            line = 2
            sep = 0
        elif not first:
            text.append(" · ", style=theme.AXIS)
        text.append(label + " ", style=theme.MUTED)
        text.append(value, style="bold")
        line += sep + piece
        first = False
    return text


def caution_panel(cautions: Sequence[str]) -> Panel:
    """The cautions in a heavy warning frame."""
    text = Text()
    for i, line in enumerate(cautions):
        text.append("▸ ", style=f"bold {theme.WARN}")
        text.append(line + ("\n" if i < len(cautions) - 1 else ""))
    return Panel(text, title=Text(" before the motor moves ", style=f"bold {theme.WARN}"),
                 title_align="left", border_style=theme.WARN, box=HEAVY, padding=(0, 1))


def start_screen(view: StartView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """Before any motion: which board will move (name and firmware from its handshake), the
    limits in force, the plan, the cautions, and the confirm key."""
    width = max(width, MIN_WIDTH)
    board = [("board", view.device)]
    if view.firmware:
        board.append(("firmware", view.firmware))
    board += list(view.board)
    where = [("port", view.port + (" (simulated board: no motor moves)" if view.simulated
                                   else "")),
             ("axis", str(view.axis)),
             ("loop", view.loop_mode + {"device": " (relay and PID run on the board)",
                                        "host": " (relay and PID run here)"}.get(
                                            view.loop_mode, ""))]
    if view.out_dir:
        where.append(("files to", view.out_dir))
    keys = () if view.unattended else START_KEYS
    parts: list[RenderableType] = [
        header("before power"), key_bar(keys),
        packed_pairs(board, width), packed_pairs(where, width),
        packed_pairs(view.limits, width, "limits"),
    ]
    if view.plan:
        parts.append(packed_pairs(view.plan, width, view.plan_title))
    parts.append(caution_panel(view.cautions))
    confirm = Text()
    if view.unattended:
        confirm.append("--yes given: the run starts without a key. ", style="bold")
        confirm.append("A stop key stops it at any moment.", style=theme.MUTED)
    else:
        confirm.append(" Y ", style=theme.KEYCAP)
        confirm.append(" when every line above is true: the motor will be powered. ",
                       style="bold")
        confirm.append("A stop key leaves, nothing moves.", style=theme.MUTED)
    parts.append(confirm)
    return Group(*parts)


# ---------------------------------------------------------------------------- proposals
@dataclass(frozen=True)
class Column:
    """One column of the proposals table: key into the predicted figures (or a gain),
    heading, unit line, significant digits."""

    key: str
    title: str
    unit: str = ""
    digits: int = 3


GAIN_COLUMNS = (Column("kp", "kp", KP_UNIT, 4), Column("ki", "ki", KI_UNIT, 4),
                Column("kd", "kd", KD_UNIT, 4), Column("b", "b", "", 2))
FIGURE_COLUMNS = (
    Column("ms", "Ms"),
    Column("gain_margin", "GM", "×"),
    Column("phase_margin_deg", "PM", "°"),
    Column("overshoot", "OS", "%"),
    Column("rise_time", "tr", "s"),
    Column("settling_time", "ts", "s"),
    Column("iae_load", "IAE ld", f"{PV_UNIT}·s"),
    Column("peak_output", "u peak", OUT_UNIT),
)
# Which figures stay when the width runs short, most important first.
FIGURE_PRIORITY = ("ms", "overshoot", "settling_time", "phase_margin_deg", "gain_margin",
                   "rise_time", "peak_output", "iae_load")
GAP = 3  # columns between table columns: padding either side and the (blank) rule


def _cell(row: ProposalRow, col: Column) -> str:
    if col.key == "b":
        return f"{row.setpoint_weight:.2f}"
    if col.key in ("kp", "ki", "kd"):
        return fmt(getattr(row, col.key), col.digits)
    v = row.predicted.get(col.key)
    return fmt(v, col.digits) if v is not None else "—"


def _flags_full(row: ProposalRow) -> str:
    return ("✗ " + "; ".join(row.violations)) if row.violations else "✓"


def _flags_short(row: ProposalRow) -> str:
    """The violations by their first word ("✗ overshoot, settling"), or ✓."""
    if not row.violations:
        return "✓"
    words = [v.split(":")[0].split()[0] if v.split() else v for v in row.violations]
    return "✗ " + ", ".join(dict.fromkeys(words))


def _flags(row: ProposalRow, form: str) -> str:
    if form == "full":
        return _flags_full(row)
    if form == "short":
        return _flags_short(row)
    return f"✗ {len(row.violations)}" if row.violations else "✓"


def fit_columns(rows: Sequence[ProposalRow], width: int) -> tuple[list[Column], str]:
    """The figure columns and the flags form ("full", "short" or "count") with which every
    cell of every row fits `width` columns uncut: as many figures as fit (the least important
    dropped first), then the fullest flags that still fit (the chosen row's violations are
    spelled out under the table)."""
    def need(cells: Sequence[str], *titles: str) -> int:
        return max([*map(len, titles), *map(len, cells)])

    name_w = need([f"  {r.name}" for r in rows], "design")
    key_w = need([row_key(i) or "·" for i in range(len(rows))], "key")
    base = key_w + GAP + name_w + GAP + sum(
        need([_cell(r, c) for r in rows], c.title, c.unit) + GAP for c in GAIN_COLUMNS)
    widths = {c.key: need([_cell(r, c) for r in rows], c.title, c.unit) + GAP
              for c in FIGURE_COLUMNS}
    for n in range(len(FIGURE_PRIORITY), -1, -1):
        keep = set(FIGURE_PRIORITY[:n])
        cols = [c for c in FIGURE_COLUMNS if c.key in keep]
        used = base + sum(widths[c.key] for c in cols)
        for form in ("full", "short", "count"):
            if used + need([_flags(r, form) for r in rows], "flags") <= width:
                return cols, form
    return [], "count"


def proposals_table(view: ProposalsView, width: int = MIN_WIDTH,
                    rows: tuple[int, int] | None = None) -> Table:
    """Every design (or rows[0]:rows[1] of them): its key, gains and predicted figures with
    their units; default marked ◆, violations flagged; no cell is ever cut."""
    cols, form = fit_columns(view.rows, width)
    table = Table(box=SIMPLE_HEAD, padding=(0, 1), header_style=theme.MUTED, expand=False,
                  border_style="grey35", show_edge=False, pad_edge=False)
    table.add_column("key\n", justify="right", no_wrap=True)
    table.add_column("design\n", no_wrap=True)
    for c in (*GAIN_COLUMNS, *cols):
        table.add_column(f"{c.title}\n{c.unit}", justify="right", no_wrap=True)
    table.add_column("flags\n", no_wrap=True)
    lo, hi = rows if rows is not None else (0, len(view.rows))
    for i in range(lo, hi):
        row = view.rows[i]
        mark = Text(no_wrap=True)
        mark.append("◆ " if row.default else "  ", style=f"bold {theme.OK}")
        mark.append(row.name)
        flags = Text(_flags(row, form), no_wrap=True,
                     style=f"bold {theme.BAD}" if row.violations else theme.OK)
        cells = [row_key(i) or "·", mark, *(_cell(row, c) for c in (*GAIN_COLUMNS, *cols))]
        table.add_row(*cells, flags, style=theme.SELECTED if i == view.selected else None)
    return table


def proposals_screen(view: ProposalsView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """Choose the gains to try: the table, the chosen one in detail, the Ms knob."""
    width, height = max(width, MIN_WIDTH), max(height, MIN_HEIGHT)
    keys = proposal_keys(len(view.rows), view.can_step)
    ident = Text()
    ident.append("identified ", style=theme.MUTED)
    ident.append(f"Ku {fmt(view.ku)} {KP_UNIT}  Tu {fmt(view.tu)} s", style="bold")
    if view.model:  # on the same line where it fits, else on its own
        model = f"model {view.model}"
        ident.append("   " if ident.cell_len + 3 + len(model) <= width else "\n")
        ident.append(model, style=theme.MUTED)
    knobs = Text(no_wrap=True, overflow="ellipsis")
    knobs.append("Ms target ", style=theme.MUTED)
    knobs.append(f"{view.ms_target:.2f}", style=f"bold {theme.PV}")
    if view.spec:
        knobs.append(f"   spec {view.spec}", style=theme.MUTED)
    knobs.append("   ◆", style=f"bold {theme.OK}")
    knobs.append(" default", style=theme.MUTED)
    legend = "   b setpoint weight   Ms max sensitivity"
    if knobs.cell_len + len(legend) <= width:
        knobs.append(legend, style=theme.MUTED)
    n = len(view.rows)
    sel = min(max(view.selected, 0), n - 1) if n else 0
    ident_rows = sum(-(-max(len(ln), 1) // width) for ln in ident.plain.split("\n"))
    fixed = 1 + key_rows(keys, width) + ident_rows + 1 + 3 + 1 + (1 if view.message else 0)
    if n and view.rows[sel].violations:
        fixed += 1
    room = max(3, height - fixed)
    lo, hi = 0, n
    if n > room:  # a window of rows around the chosen one; the rest a key or Tab away
        room -= 1
        lo = min(max(0, sel - room // 2), n - room)
        hi = lo + room
    parts: list[RenderableType] = [header("gain choices"), key_bar(keys), ident, knobs,
                                   proposals_table(view, width, (lo, hi))]
    if (lo, hi) != (0, n):
        parts.append(Text(f"rows {lo + 1}-{hi} of {n}: Tab, n and p move through all",
                          style=theme.MUTED))
    if view.rows:
        r = view.rows[sel]
        chosen = Text(no_wrap=True, overflow="ellipsis")
        chosen.append(f"chosen {r.name}", style="bold")
        chosen.append(f"  kp {fmt(r.kp)} {KP_UNIT}  ki {fmt(r.ki)} {KI_UNIT}  kd {fmt(r.kd)} "
                      f"{KD_UNIT}  b {r.setpoint_weight:.2f}")
        parts.append(chosen)
        if r.violations:
            parts.append(Text("✗ " + "; ".join(r.violations), style=f"bold {theme.BAD}"))
    if view.message:
        parts.append(Text(view.message, style=theme.WARN))
    return Group(*parts)


# ---------------------------------------------------------------------------- step result
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
    "rise_time": "rise 10-90 % s",
    "settling_time": "settling s",
    "steady_state_error": f"offset {PV_UNIT}",
    "iae": f"IAE {PV_UNIT}·s",
    "peak_output": f"peak output {OUT_UNIT}",
    "time_saturated": "saturated s",
}


def figure_label(row: object) -> str:
    """A step figure's name with its unit."""
    name = str(getattr(row, "name", ""))
    unit = str(getattr(row, "unit", "") or "")
    return FIGURE_LABELS.get(name, f"{name.replace('_', ' ')} {unit}".strip())


def step_figures_table(rows: Sequence[object]) -> Table:
    """Measured beside predicted, with the difference (measured - predicted)."""
    table = Table(box=None, padding=(0, 1), header_style=theme.MUTED, expand=False)
    table.add_column("figure", no_wrap=True)
    table.add_column("measured", justify="right", no_wrap=True, style=theme.PV)
    table.add_column("predicted", justify="right", no_wrap=True, style=theme.PREDICTED)
    table.add_column("difference", justify="right", no_wrap=True)
    for r in rows:
        diff = getattr(r, "difference", None)
        rel = getattr(r, "relative", None)
        dtext = "—" if diff is None else f"{diff:+.3g}"
        if rel is not None and math.isfinite(rel):
            dtext += f" ({rel * 100:+.0f}%)"
        table.add_row(figure_label(r), fmt(getattr(r, "measured", None), 3),
                      fmt(getattr(r, "predicted", None), 3), dtext)
    return table


CHECK_MARKS = {"pass": ("✓ ", theme.OK), "fail": ("✗ ", theme.BAD),
               "not judged": ("? ", theme.WARN), "off": ("– ", theme.MUTED)}
"""How each check status is drawn: "not judged" is never a tick."""


def verdict_checks(verdict: object, one_line: bool = False) -> Text:
    """The spec checks, ticked or crossed: one a line, or all on one line by name."""
    checks = Text()
    for c in getattr(verdict, "checks", ()) if verdict is not None else ():
        status = getattr(c, "status", "pass" if c.passed else "fail")
        mark, style = CHECK_MARKS.get(status, ("✗ ", theme.BAD))
        checks.append(mark, style=style)
        if one_line:
            checks.append(c.name.replace("_", " ") + "   ")
        else:
            checks.append(c.message + "\n")
    checks.rstrip()
    return checks


def step_screen(view: StepView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT) -> Group:
    """The confirmation step: response with the prediction overlaid, figures, verdict, keys."""
    width, height = max(width, MIN_WIDTH), max(height, MIN_HEIGHT)
    series = [setpoint_series(view.t, view.sp)]
    if view.pred_t:
        series.append(predicted_series(view.pred_t, view.pred_y))
    series.append(pv_series(view.t, view.pv, "measured PV"))
    xs = [x for s in series for x in s.x]
    xr = (min(xs), max(xs)) if len(xs) >= 2 and max(xs) > min(xs) else None
    side_by_side = width >= 100
    checks = verdict_checks(view.verdict, one_line=not side_by_side)
    keys = view.keys
    hint = bool(view.detune_hint and any(k == "d" for k, _ in keys))
    fixed = (1 + key_rows(keys, width) + 2 + 3 + (len(view.rows) + 1)
             + (0 if side_by_side else 1) + (1 if view.message else 0) + (1 if hint else 0))
    chart_h = max(4, min(14, height - fixed))
    gains = Text(no_wrap=True, overflow="ellipsis")
    gains.append(f"{view.name}", style="bold")
    gains.append(f"  kp {fmt(view.kp)} {KP_UNIT}  ki {fmt(view.ki)} {KI_UNIT}  kd "
                 f"{fmt(view.kd)} {KD_UNIT}", style=theme.MUTED)
    parts: list[RenderableType] = [
        header("step check"),
        key_bar(keys),
        gains,
        _verdict_banner(view),
        BrailleChart(series, height=chart_h, unit=PV_UNIT, x_range=xr, legend=False,
                     x_label="s from the step"),
        chart_legend(series),
    ]
    if side_by_side:
        # the figures keep their natural width; the checks take what is left and wrap
        lower = Table.grid(padding=(0, 3), expand=True)
        lower.add_column(no_wrap=True)
        lower.add_column(ratio=1)
        lower.add_row(step_figures_table(view.rows), checks)
        parts.append(lower)
    else:
        parts += [step_figures_table(view.rows), checks]
    if hint:
        parts.append(Text.assemble(("d runs the gentler design ", theme.MUTED),
                                   view.detune_hint))
    if view.message:
        parts.append(Text(view.message, style=theme.WARN))
    return Group(*parts)


# ---------------------------------------------------------------------------- confirm, finish
def confirm_screen(view: ConfirmView, width: int = MIN_WIDTH, height: int = MIN_HEIGHT
                   ) -> Group:
    """The deliberate confirmation before the motor is powered: what will run, the cautions,
    and the one key that goes ahead."""
    confirm = Text()
    confirm.append(" Y ", style=theme.KEYCAP)
    confirm.append(" powers the motor. ", style="bold")
    confirm.append("Any other key goes back; nothing moves.", style=theme.MUTED)
    return Group(
        header("power the motor?"),
        key_bar(CONFIRM_KEYS),
        Text(view.action, style="bold"),
        caution_panel(view.cautions),
        confirm,
    )


def finish_screen(view: FinishView, width: int = MIN_WIDTH) -> Group:
    """Where the files went, the accepted gains and the per-tick code block."""
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
        parts.append(Panel(Text(view.code), title=view.code_title, title_align="left",
                           border_style="grey35", box=ROUNDED))
    return Group(*parts)
