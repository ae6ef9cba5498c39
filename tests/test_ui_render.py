"""The bench-view renderers as pure functions of hand-made snapshots and views.

Rendered with rich's Console(record=True) at fixed sizes: the narrowest supported terminal
(80 columns x 24 rows), 100 x 30 and 120 x 40. These check layout and content, not looks: that
every number has its unit, that a second cue besides colour tells the traces apart, that
nothing is cut or left over, and that the stop keys and the cut-off reminder never go.
"""

from __future__ import annotations

import math
import re
from dataclasses import replace

import pytest
from rich.console import Console

from autotune.core.progress import CycleEstimate, LimitGauge, LinkHealth, Phase, RunSnapshot
from autotune.core.verdict import StepSpec, compare, judge
from autotune.ui import plain, screens
from autotune.ui.chart import BRAILLE_BASE, BrailleChart, Series, nice_range, rasterise
from autotune.ui.tracker import LiveTracker
from autotune.ui.views import (
    CAUTIONS,
    CUT_OFF,
    ConfirmView,
    FinishView,
    LiveContext,
    ProposalRow,
    ProposalsView,
    StartView,
    StepView,
)
from autotune.ui.widgets import cycle_table, estimate_changes, limit_bar

SIZES = [(80, 24), (100, 30), (120, 40)]
ESC = "\x1b"
# Labels of other programs' printouts that must appear nowhere we draw (see the scan of a
# whole demo run in tests/integration/test_demo.py).
RECALLED = ("classic", "noise band", "noise_band")


def render(renderable, width: int, height: int = 24) -> str:
    console = Console(record=True, width=width, height=height, force_terminal=True,
                      color_system="truecolor")
    console.print(renderable)
    return console.export_text()


def lines_of(text: str) -> list[str]:
    return text.rstrip("\n").split("\n")


def assert_frame(text: str, width: int, height: int) -> list[str]:
    """The screen fits, keeps the stop keys and the cut-off reminder on its second line, and
    shows none of the recalled labels."""
    lines = lines_of(text)
    assert len(lines) <= height, len(lines)
    assert all(len(ln) <= width for ln in lines)
    assert "SPACE ESC Q" in lines[1] and CUT_OFF in lines[1], lines[1]
    low = text.lower()
    for label in RECALLED:
        assert label not in low, label
    return lines


ROAD = (Phase.CONNECT, Phase.PRECHECK_REST, Phase.PRECHECK_DIRECTION, Phase.RELAY,
        Phase.ANALYSIS, Phase.PROPOSALS, Phase.STEP)


def relay_snapshot(alarm: str | None = None, stopped: bool = False,
                   phase: Phase = Phase.RELAY, t_start: float = 0.0,
                   converged: bool = True) -> RunSnapshot:
    t = tuple(t_start + i * 0.01 for i in range(500))
    pv = tuple(0.4 * math.sin(2 * math.pi * x / 0.9) for x in t)
    out = tuple(-40.0 if math.sin(2 * math.pi * (x - 0.1) / 0.9) > 0 else 40.0 for x in t)
    est = tuple(CycleEstimate(i, 0.9 + 0.05 / i, 0.8, 127.0 + 3.0 / i, 0.9 + 0.05 / i)
                for i in range(1, 8))
    limits = (
        LimitGauge("pv_window", 0.42, 1.0),
        LimitGauge("pv_rate", 3.9, 4.0),
        LimitGauge("output", 40.0, 60.0),
        LimitGauge("duration", 12.0, 60.0, "s"),
        LimitGauge("sample_gap", 0.01, 0.0),
    )
    return RunSnapshot(
        phase=phase, message="relay: amplitude 40, centre 0", device="bench-sim 0.3", axis=1,
        loop_mode="device", t=t, pv=pv, sp=(0.0,) * len(t), out=out, cycle=7, max_cycles=20,
        progress=0.0, estimates=est, converged=converged, limits=limits,
        link=LinkHealth(0.0021, 0.0042, 5123, 2, 1), alarm=alarm, stopped=stopped,
    )


def relay_context(snap: RunSnapshot, t0: float | None = None, road=ROAD) -> LiveContext:
    tracker = LiveTracker([(p.value, 120.0 if p is Phase.RELAY else None) for p in road])
    tracker.update(replace(snap, t=snap.t[:1]))  # the phase began at the first sample
    ctx = tracker.update(snap)
    return replace(ctx, t0=t0 if t0 is not None else ctx.t0)


def start_view(unattended: bool = False) -> StartView:
    return StartView(
        device="bench-sim", firmware="0.3.1", port="/dev/pts/7", axis=0, loop_mode="device",
        limits=(("output limit", "±60 output units"),
                ("PV window", "±1.5 PV units around the start value"),
                ("PV rate", "8 PV units/s"), ("powered time", "60 s"), ("sample gap", "0.2 s"),
                ("watchdog", "0.5 s")),
        plan=(("target amplitude", "0.3 PV units"), ("max cycles", "20")),
        board=(("tick", "10 ms"), ("largest output", "±100 output units")),
        simulated=True, out_dir="/tmp/run-7", unattended=unattended,
    )


NAMES = ["zn-p", "zn-pi", "zn-pid", "tl-pi", "tl-pid", "ah-pm", "simc-pi", "simc-pid",
         "amigo-pi", "amigo-pid", "robust-pi", "robust-pid"]


def proposals_view(selected: int = 10, names=NAMES, long_flags: bool = False) -> ProposalsView:
    rows = []
    for i, name in enumerate(names):
        pred = {"ms": 1.3 + 0.1 * i, "gain_margin": 3.0 - 0.1 * i, "phase_margin_deg": 60 - i,
                "overshoot": 2.0 * i, "rise_time": 0.2, "settling_time": 1.0 + 0.1 * i,
                "iae_load": 0.01 * (i + 1) + 0.0812345, "peak_output": 30 + i}
        viol: tuple[str, ...] = ()
        if name.startswith("zn"):
            viol = ("overshoot 22% > 20%",)
            if long_flags:
                viol += ("settling time 3.1 s > 2 s", "closed loop unstable on the model")
        rows.append(ProposalRow(name, 10.0 + i, 20.0 + i, 0.0812345 * (i % 3), pred, viol,
                                name == "robust-pi", 0.5))
    return ProposalsView(tuple(rows), selected=selected, ms_target=1.4, ku=127.4,
                         tu=0.9, model="first order + dead time: K 2 PV/out, T 0.5 s, L 0.05 s",
                         spec="overshoot ≤ 20 %, settling ≤ 2 s")


def step_view(passed: bool = True, keys=()) -> StepView:
    t = tuple(i * 0.01 for i in range(300))
    y = tuple(1 - math.exp(-x / 0.2) * math.cos(5 * x) for x in t)
    yp = tuple(1 - math.exp(-x / 0.21) * math.cos(5.2 * x) for x in t)
    meas = {"overshoot": 8.1 if passed else 31.0, "rise_time": 0.21, "settling_time": 1.1,
            "steady_state_error": 0.001, "iae": 0.3, "peak_output": 54.0, "time_saturated": 0.0}
    pred = {"overshoot": 9.0, "rise_time": 0.2, "settling_time": 1.2, "iae": 0.28,
            "peak_output": 55.0}
    return StepView("robust-pi", 33.0, 52.1, 0.0, t, y, (1.0,) * len(t), (0.0,) * len(t), t, yp,
                    tuple(compare(meas, pred)), judge(meas, StepSpec(20.0, 2.0, 0.0)),
                    keys=keys)


# ---------------------------------------------------------------------------- chart


def test_rasterise_flat_line_fills_one_row_across_the_width() -> None:
    s = Series([0.0, 1.0], [0.5, 0.5], "x", "flat")
    grid = rasterise([s], width=20, height=4, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
    used_rows = {r for r, row in enumerate(grid) for ch, _ in row if ch != " "}
    assert len(used_rows) == 1
    row = grid[used_rows.pop()]
    assert all(ch != " " for ch, _ in row)  # connected from the left edge to the right edge


def test_rasterise_diagonal_touches_opposite_corners() -> None:
    s = Series([0.0, 1.0], [0.0, 1.0], "x", "ramp")
    grid = rasterise([s], width=10, height=5, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
    # bottom-left dot: column 0, row 3 of the bottom cell -> bit 0x40; top-right: bit 0x08
    assert ord(grid[-1][0][0]) - BRAILLE_BASE & 0x40
    assert ord(grid[0][-1][0]) - BRAILLE_BASE & 0x08


def test_rasterise_nan_breaks_the_line_and_later_series_wins_the_cell() -> None:
    a = Series([0.0, 0.5, 1.0], [0.0, math.nan, 0.0], "a", "a")
    grid = rasterise([a], width=10, height=2, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
    bottom = [ch for ch, _ in grid[-1]]
    assert bottom[0] != " " and bottom[-1] != " " and bottom[4] == " "
    b = Series([0.0, 1.0], [0.0, 0.0], "b", "b")
    grid = rasterise([a, b], width=10, height=2, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
    assert grid[-1][0][1] == "b"


def test_line_patterns_and_letters_tell_the_traces_apart_without_colour() -> None:
    """A dashed line has gaps, a dotted one more; a lettered series carries its letter on the
    line where it alone runs."""
    def row_of(pattern: str) -> str:
        s = Series([0.0, 1.0], [0.5, 0.5], "x", "flat", pattern)
        grid = rasterise([s], width=40, height=2, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
        return "".join(ch for row in grid for ch, _ in row if True).strip()

    solid, dashed, dotted = row_of("solid"), row_of("dashed"), row_of("dotted")
    assert " " not in solid and " " in dashed
    dots = [sum(bin(ord(ch) - BRAILLE_BASE).count("1") for ch in r if ch != " ")
            for r in (solid, dashed, dotted)]
    assert dots[0] > dots[1] > dots[2] > 0
    sp = Series([0.0, 1.0], [0.8, 0.8], "yellow", "setpoint", "dashed", "S")
    pv = Series([0.0, 1.0], [0.2, 0.2], "cyan", "PV", "solid", "P")
    grid = rasterise([sp, pv], width=40, height=4, x_range=(0.0, 1.0), y_range=(0.0, 1.0))
    text = ["".join(ch for ch, _ in row) for row in grid]
    assert any("S" in r for r in text) and any("P" in r for r in text)
    # each letter sits on its own trace's row: S high, P low
    assert min(i for i, r in enumerate(text) if "S" in r) < min(i for i, r in enumerate(text)
                                                               if "P" in r)


def test_nice_range_holds_values_and_widens_a_flat_series() -> None:
    lo, hi = nice_range([1.0, 3.0])
    assert lo < 1.0 and hi > 3.0
    lo, hi = nice_range([5.0, 5.0])
    assert lo < 5.0 < hi
    assert nice_range([]) == (-1.0, 1.0)


@pytest.mark.parametrize("width", [80, 97, 160])
def test_chart_fills_exactly_the_width_and_names_its_unit(width: int) -> None:
    s = Series([0.0, 1.0, 2.0], [0.0, 1.0, 0.0], "cyan", "pv", "solid", "P")
    text = render(BrailleChart([s], height=6, unit="PV"), width)
    lines = lines_of(text)
    assert len(lines) == 6 + 2 + 1  # plot rows, axis, time labels, legend
    assert all(len(ln) <= width for ln in lines)
    assert len(lines[0]) == width
    assert "[PV]" in lines[1]  # the unit under the top value
    assert lines[-2].rstrip().endswith(" s")  # the time axis in seconds
    assert "P ━━ pv" in lines[-1]  # legend: letter, line pattern, name


# ---------------------------------------------------------------------------- widgets


def test_estimate_changes_are_relative_to_the_previous_cycle() -> None:
    est = [CycleEstimate(1, 1.0, 1.0, 100.0, 1.0), CycleEstimate(2, 1.0, 1.0, 110.0, 1.0),
           CycleEstimate(3, 1.0, 1.0, 110.0, 1.21)]
    ch = estimate_changes(est)
    assert ch[0] is None
    assert ch[1] == pytest.approx(0.1)
    assert ch[2] == pytest.approx(0.21)


def test_limit_bar_fills_in_proportion_and_shows_the_unit() -> None:
    text = limit_bar(LimitGauge("output", 30.0, 60.0), width=10).plain
    assert text.count("█") == 5 and text.count("░") == 5
    assert "30 of 60 out" in text  # output units, named by the gauge
    assert "0.3 of 3 PV" in limit_bar(LimitGauge("pv_window", 0.3, 3.0)).plain
    assert "off" in limit_bar(LimitGauge("sample_gap", 0.1, 0.0)).plain
    full = limit_bar(LimitGauge("pv_window", -2.0, 1.0), width=10).plain
    assert full.count("█") == 10  # beyond the limit: the bar is full, never longer


def test_cycle_table_has_units_and_shows_both_figures_when_the_estimate_has_them() -> None:
    est = [CycleEstimate(i, 0.9, 0.75, 33.9, 0.9) for i in range(1, 4)]
    text = render(cycle_table(est, converged=False), 80)
    for head in ("period", "swing", "PV p-p", "Ku DF", "out/PV", "Tu", "%"):
        assert head in text, head
    assert "p-p 0.75" not in text

    class Refined(CycleEstimate):  # an estimate that carries the plain figure beside its own
        pass

    both = []
    for e in est:
        r = Refined(e.index, e.period, e.amplitude, 58.0, 0.4)
        object.__setattr__(r, "ku_df", 33.9)
        both.append(r)
    text2 = render(cycle_table(both, converged=True), 80)
    assert "Ku DF" in text2 and re.search(r"\bKu\b", text2.replace("Ku DF", ""))
    assert "58" in text2 and "33.9" in text2 and "✓ converged" in text2


# ---------------------------------------------------------------------------- live screen


@pytest.mark.parametrize("width,height", SIZES)
def test_live_screen_shows_everything_and_fits(width: int, height: int) -> None:
    snap = relay_snapshot()
    text = render(screens.live_screen(snap, width, height, relay_context(snap)), width, height)
    assert_frame(text, width, height)
    assert "relay cycle 7" in text
    assert "converged after 7 cycles" in text and "relay: amplitude 40" in text
    assert "✓ converged" in text
    for label in ("PV window", "PV rate", "output", "run time", "sample gap"):
        assert label in text
    assert "0.42 of 1 PV" in text and "40 of 60 out" in text and "12 of 60 s" in text
    assert "5123 ok" in text and "2 lost" in text and "1 bad" in text
    assert "2.1 ms" in text
    assert "bench-sim 0.3" in text and "axis 1" in text and "device loop" in text
    # the per-cycle table: Ku of cycle 7 = 127.0 + 3/7
    assert f"{127.0 + 3.0 / 7:.4g}" in text
    assert any(ch in text for ch in "⡀⠁⠂⢀⣀⠉")  # the braille chart is there
    # units on both axes and a legend with letters and line patterns
    assert "[PV]" in text and "[out]" in text and "s since the start" in text
    assert "S ╍╍ setpoint" in text and "P ━━ PV" in text and "U ━━ output" in text
    assert "stage 4/7" in text


def test_live_screen_counts_time_from_the_start_not_device_uptime() -> None:
    """A board started by hand: device time 236.4 s at the first sample."""
    snap = relay_snapshot(t_start=236.4)
    text = render(screens.live_screen(snap, 80, 24, relay_context(snap, t0=236.4)), 80, 24)
    axis = next(ln for ln in lines_of(text) if "since the start" in ln)
    assert axis.split()[0] == "0" and "4.99 s since the start" in axis
    assert "236" not in axis


def test_live_screen_road_shows_only_the_stages_the_job_runs() -> None:
    snap = relay_snapshot()
    text = render(screens.live_screen(snap, 100, 30, relay_context(snap)), 100, 30)
    assert "breakaway" not in text  # the breakaway is off: no leftover stage
    with_b = ROAD[:3] + (Phase.PRECHECK_BREAKAWAY,) + ROAD[3:]
    text = render(screens.live_screen(snap, 100, 30, relay_context(snap, road=with_b)), 100, 30)
    assert "direction › breakaway ›" in text
    step_only = (Phase.CONNECT, Phase.STEP)
    snap2 = replace(relay_snapshot(phase=Phase.STEP), estimates=(), converged=False,
                    message="step +1 PV units with manual")
    text = render(screens.live_screen(snap2, 100, 30, relay_context(snap2, road=step_only)),
                  100, 30)
    assert "relay" not in text.split("\n")[2] and "connect ›  step" in text


def test_unplanned_phase_joins_the_road_where_it_ran() -> None:
    tracker = LiveTracker([(p.value, None) for p in ROAD])
    for phase in (Phase.CONNECT, Phase.PRECHECK_REST, Phase.PRECHECK_DIRECTION, Phase.RELAY,
                  Phase.PRECHECK_BREAKAWAY):
        ctx = tracker.update(RunSnapshot(phase=phase, t=(1.0,)))
    assert ctx.road.index(Phase.PRECHECK_BREAKAWAY) == ctx.road.index(Phase.RELAY) + 1
    assert ctx.stage == ctx.road.index(Phase.PRECHECK_BREAKAWAY) + 1


@pytest.mark.parametrize("phase,expected,words", [
    (Phase.PRECHECK_REST, 1.0, "of at most 1 s"),
    (Phase.RELAY, 120.0, "cycle 7 of at most 20"),
    (Phase.STEP, None, " s "),
    (Phase.DONE, None, "finished"),
])
def test_progress_means_something_in_every_phase(phase: Phase, expected: float | None,
                                                 words: str) -> None:
    snap = replace(relay_snapshot(phase=phase, converged=False), message="m", cycle=7)
    tracker = LiveTracker([(phase.value, expected)])
    tracker.update(replace(snap, t=snap.t[:1]))
    ctx = tracker.update(replace(snap, t=snap.t[:50]))  # 0.49 s into the phase
    text = render(screens.live_screen(replace(snap, t=snap.t[:50], pv=snap.pv[:50],
                                              sp=snap.sp[:50], out=snap.out[:50]),
                                      100, 30, ctx), 100, 30)
    line = lines_of(text)[3]
    assert words in line, line
    assert "0%" not in line and "[done]" not in line


def test_live_screen_without_samples_says_it_waits() -> None:
    snap = RunSnapshot(phase=Phase.CONNECT, message="opening /dev/ttyACM0")
    text = render(screens.live_screen(snap), 80)
    assert "waiting for samples" in text
    assert "opening /dev/ttyACM0" in text


@pytest.mark.parametrize("width,height", SIZES)
def test_live_step_shows_what_happened_instead_of_an_empty_cycle_table(width: int,
                                                                        height: int) -> None:
    snap = replace(relay_snapshot(phase=Phase.STEP), estimates=(), converged=False)
    tracker = LiveTracker([(p.value, None) for p in (Phase.CONNECT, Phase.STEP)])
    tracker.said("step +1 PV units with manual: kp 2, ki 1 /s, kd 0 s")
    ctx = tracker.update(snap)
    text = render(screens.live_screen(snap, width, height, ctx), width, height)
    assert_frame(text, width, height)
    assert "relay cycles" not in text and "what happened" in text
    assert "step +1 PV units with manual" in text


@pytest.mark.parametrize("width,height", SIZES)
def test_alarm_is_full_width_and_says_what_to_do(width: int, height: int) -> None:
    snap = relay_snapshot(alarm="LINK LOST: no frame from the device for 1 s")
    text = render(screens.live_screen(snap, width, height, relay_context(snap)), width, height)
    lines = assert_frame(text, width, height)
    i = next(k for k, ln in enumerate(lines) if "LINK LOST" in ln)
    assert "CUT POWER" in lines[i + 1]  # not confirmed stopped -> cut power
    snap2 = relay_snapshot(alarm="FAULT: PV_WINDOW latched", stopped=True, phase=Phase.DONE)
    text2 = render(screens.live_screen(snap2, width, height, relay_context(snap2)), width,
                   height)
    assert "confirmed zero" in text2 and "CUT POWER" not in text2
    assert "motor stopped" in text2


@pytest.mark.parametrize("width", [80, 123])
def test_alarm_banner_spans_the_terminal(width: int) -> None:
    from autotune.ui.widgets import alarm_banner

    console = Console(record=True, width=width, force_terminal=True, color_system="truecolor")
    console.print(alarm_banner("FAULT", "do this"))
    styled = console.export_text(styles=True)
    for ln in styled.rstrip("\n").split("\n"):
        # every line starts in the alarm colours and is padded to the full width
        assert ln.startswith("\x1b[1;37;48;5;160m"), repr(ln[:20])  # bold white on red3
        visible = re.sub(r"\x1b\[[0-9;]*m", "", ln)
        assert len(visible) == width


# ---------------------------------------------------------------------------- other screens


@pytest.mark.parametrize("width,height", SIZES)
def test_start_screen_names_the_board_and_shows_the_cautions_and_limits(width: int,
                                                                        height: int) -> None:
    text = render(screens.start_screen(start_view(), width, height), width, height)
    lines = assert_frame(text, width, height)
    flat = " ".join(" ".join(ln.strip("┃ ").split()) for ln in lines)
    for caution in CAUTIONS:
        assert caution in flat, caution
    for needle in ("board bench-sim", "firmware 0.3.1", "/dev/pts/7", "axis 0", "device",
                   "±60 output units", "±1.5 PV units around the start value", "8 PV units/s",
                   "target amplitude", "/tmp/run-7", "simulated", "tick 10 ms",
                   "largest output ±100 output units", "watchdog 0.5 s"):
        assert needle in flat, needle
    assert "…" not in text  # no limit is cut
    assert " Y " in text
    quiet = render(screens.start_screen(start_view(unattended=True), width, height), width,
                   height)
    assert " Y " not in quiet and "--yes" in quiet  # nothing asks for a key that is not read


@pytest.mark.parametrize("width,height", SIZES)
def test_proposals_screen_lists_every_design_each_with_a_key(width: int, height: int) -> None:
    view = proposals_view()
    text = render(screens.proposals_screen(view, width, height), width, height)
    lines = assert_frame(text, width, height)
    keys = {}
    for name in NAMES:
        line = next(ln for ln in lines if re.search(rf"\s{re.escape(name)}\s", ln))
        keys[name] = line.split()[0]
    assert list(keys.values()) == list(screens.ROW_KEYS[:12])  # 1-9, a, b, c: all reachable
    default_line = next(ln for ln in lines if " robust-pi " in ln)
    assert "◆" in default_line
    zn_line = next(ln for ln in lines if " zn-pi " in ln)
    assert "✗" in zn_line
    assert "Ms target 1.40" in text
    assert "chosen robust-pi" in text
    assert "Ku 127.4 out/PV" in text and "Tu 0.9 s" in text
    assert "out/PV/s" in text and "out·s/PV" in text  # units of ki and kd
    assert "…" not in text  # no cell is cut
    if width >= 120:
        assert "GM" in text and "PM" in text and "tr" in text


@pytest.mark.parametrize("width", [80, 100, 120])
def test_proposals_table_never_cuts_cells_with_a_spec_set(width: int) -> None:
    view = proposals_view(selected=1, long_flags=True)
    text = render(screens.proposals_screen(view, width, 40), width, 40)
    assert "…" not in text
    assert "0.08123" in text  # kd of every third row, in full
    # the chosen row's violations are spelled out in full under the table
    assert "✗ overshoot 22% > 20%; settling time 3.1 s > 2 s; closed loop unstable" in text


def test_many_proposals_scroll_around_the_chosen_one() -> None:
    names = [f"design-{i}" for i in range(30)]
    for sel in (0, 15, 29):
        text = render(screens.proposals_screen(proposals_view(sel, names), 80, 24), 80, 24)
        lines = assert_frame(text, 80, 24)
        assert f"chosen design-{sel}" in text
        assert any(f"design-{sel} " in ln for ln in lines[:-1])
        assert "of 30: Tab, n and p move through all" in text


def test_proposals_screen_shows_the_chosen_gains_and_its_violations() -> None:
    view = proposals_view(selected=0)
    text = render(screens.proposals_screen(view), 80)
    # zn-p: kp 10, ki 20, kd 0, as designed (a detune is a new design, not a factor)
    assert "chosen zn-p  kp 10 out/PV  ki 20 out/PV/s  kd 0 out·s/PV" in text
    assert "overshoot 22% > 20%" in text  # the chosen one's violations in full
    assert "Enter" not in lines_of(text)[1]  # Enter never starts a step


def test_confirm_screen_names_the_action_and_the_one_key() -> None:
    text = render(screens.confirm_screen(ConfirmView("run the confirmation step with zn-p: kp "
                                                     "10 (powers the motor)")), 80)
    assert "run the confirmation step with zn-p" in text
    assert " Y " in text and "powers the motor" in text
    assert "The robot is on blocks" in text
    assert CUT_OFF in lines_of(text)[1]


@pytest.mark.parametrize("width,height", SIZES)
def test_step_screen_shows_verdict_figures_and_keys(width: int, height: int) -> None:
    keys = (("a", "accept"), ("d", "detune"), ("o", "other proposal"), ("r", "repeat"),
            ("q", "quit"))
    text = render(screens.step_screen(step_view(True, keys), width, height), width, height)
    lines = assert_frame(text, width, height)
    assert "✓ PASS" in text
    for label in ("overshoot %", "rise 10-90 % s", "settling s", "IAE PV·s",
                  "peak output out"):
        assert label in text
    assert "measured" in text and "predicted" in text
    assert "-0.9" in text  # overshoot difference 8.1 - 9
    bar = " ".join(lines[1:3])
    for key in (" a ", " d ", " o ", " r "):
        assert key in bar
    assert "S ╍╍ setpoint" in text and "M ┈┈ predicted (model)" in text
    assert "P ━━ measured PV" in text and "[PV]" in text and "s from the step" in text
    assert "…" not in text
    bad = render(screens.step_screen(step_view(False), width, height), width, height)
    assert "NOT MET" in bad and "detune" in bad


def test_finish_screen_lists_the_files() -> None:
    view = FinishView(True, "gains accepted", (("session", "/tmp/r/session.jsonl"),
                                               ("gains", "/tmp/r/gains.toml"),
                                               ("code (C)", "/tmp/r/gains.h")),
                      (("kp", "33 out/PV"),), "KP = 33\n", "per-tick code (also in gains.h)")
    text = render(screens.finish_screen(view), 80)
    assert "/tmp/r/session.jsonl" in text and "/tmp/r/gains.toml" in text
    assert "/tmp/r/gains.h" in text and "also in gains.h" in text
    assert "gains accepted" in text and "KP = 33" in text


# ---------------------------------------------------------------------------- plain lines

TAG = re.compile(r"^(\S+) +(\S.*)?$")


def assert_plain(lines: list[str]) -> None:
    """Every line: a stage tag in its column, then the text; no escapes, no recalled label,
    no bare percentage progress."""
    for ln in lines:
        assert ESC not in ln
        assert ln[:plain.TAG_WIDTH + 1].rstrip() == ln.split(" ", 1)[0], ln
        assert not re.search(r"\]\s*\d+%", ln), ln
        for label in RECALLED:
            assert label not in ln.lower()


def test_plain_lines_carry_the_same_information_without_escapes() -> None:
    snap = relay_snapshot(alarm="LINK LOST")
    lines = plain.snapshot_lines(snap)
    assert_plain(lines)
    joined = "\n".join(lines)
    assert "ALARM      LINK LOST" in joined and lines[1].startswith("relay ")
    assert "converged after 7 cycles" in joined and "PV window 0.42 of 1 PV (42 %)" in joined
    assert "sample gap off" in joined
    assert "5123 frames ok, 2 lost, 1 damaged" in joined
    start = plain.start_lines(start_view())
    assert_plain(start)
    start_text = "\n".join(start)
    for caution in CAUTIONS:
        assert caution in start_text
    assert "Space, Esc, q" in start_text and CUT_OFF in start_text
    assert "board bench-sim, firmware 0.3.1" in start_text
    props = plain.proposals_lines(proposals_view())
    assert_plain(props)
    assert any(re.match(r"gains +b\* robust-pi ", ln) for ln in props)  # row 11: key b
    assert any("! overshoot 22% > 20%" in ln for ln in props)
    assert any("ki out/PV/s" in ln for ln in props)
    step = plain.step_lines(step_view(False))
    assert_plain(step)
    assert "NOT MET" in "\n".join(step) and "overshoot %" in "\n".join(step)
    fin = plain.finish_lines(FinishView(True, "ok", (("gains", "/x/gains.toml"),)))
    assert_plain(fin)
    assert "finish       gains: /x/gains.toml" in fin


def test_plain_reporter_prints_changes_not_every_sample() -> None:
    out: list[str] = []
    rep = plain.PlainReporter(out.append)
    s1 = replace(relay_snapshot(converged=False), estimates=relay_snapshot().estimates[:3])
    rep.update(s1)
    n = len(out)
    assert n > 0
    rep.update(replace(s1, t=s1.t[1:], pv=s1.pv[1:]))  # only samples moved on
    assert len(out) == n
    est = relay_snapshot().estimates[:4]
    rep.update(replace(s1, estimates=est))
    assert len(out) == n + 1 and re.match(r"relay +4 ", out[-1])  # one table row
    rep.update(replace(s1, estimates=est, converged=True))
    assert "converged after 4 cycles" in out[-1]
    m = len(out)
    rep.update(replace(s1, estimates=est, converged=True, phase=Phase.ANALYSIS,
                       message="analysing"))
    # leaving the relay: one line of the limits it used, one line for the new phase
    assert len(out) == m + 2
    assert out[m].startswith("relay ") and "limits used: PV window 0.42 of 1 PV" in out[m]
    assert out[m + 1] == "analysis   analysing"
    rep.update(replace(s1, phase=Phase.DONE, stopped=True, message="aborted"))
    assert any("motor stopped" in ln for ln in out)
    assert_plain(out)


# ---------------------------------------------------------------------------- the key thread


def test_key_router_handles_abort_keys_first_and_passes_the_others_on() -> None:
    """A read holding an abort key goes to on_abort only; other keys reach on_key in order."""
    import os
    import threading

    from autotune.ui.app import KeyRouter

    master, slave = os.openpty()
    aborts: list[str] = []
    keys: list[str] = []
    got = threading.Event()

    def on_abort(name: str) -> None:
        aborts.append(name)
        got.set()

    def on_key(ch: str) -> None:
        keys.append(ch)
        got.set()

    with os.fdopen(slave, "rb", buffering=0) as stream:
        router = KeyRouter(on_abort, on_key, stream=stream).start()
        try:
            assert router.active
            for data, check in ((b"2", lambda: keys == ["2"]),
                                (b"mq", lambda: aborts == ["q"]),  # abort wins the whole read
                                (b"\x1b[A", lambda: aborts == ["q", "esc"]),  # arrow = Esc
                                (b" ", lambda: aborts == ["q", "esc", "space"])):
                got.clear()
                os.write(master, data)
                assert got.wait(2.0)
                assert check(), (data, aborts, keys)
            assert keys == ["2"]  # "m" travelled with "q": dropped, never acted on
        finally:
            router.stop()
            os.close(master)
