"""The bench-view renderers as pure functions of hand-made snapshots and views.

Rendered with rich's Console(record=True) at fixed sizes, including the narrowest supported
terminal (80 columns x 24 rows). These check layout and content, not looks.
"""

from __future__ import annotations

import math
import re

import pytest
from rich.console import Console

from autotune.core.progress import CycleEstimate, LimitGauge, LinkHealth, Phase, RunSnapshot
from autotune.core.verdict import StepSpec, compare, judge
from autotune.ui import plain, screens
from autotune.ui.chart import BRAILLE_BASE, BrailleChart, Series, nice_range, rasterise
from autotune.ui.views import (
    CAUTIONS,
    ConfirmView,
    FinishView,
    ProposalRow,
    ProposalsView,
    StartView,
    StepView,
)
from autotune.ui.widgets import estimate_changes, limit_bar

SIZES = [(80, 24), (100, 30), (140, 45)]
ESC = "\x1b"


def render(renderable, width: int, height: int = 24) -> str:
    console = Console(record=True, width=width, height=height, force_terminal=True,
                      color_system="truecolor")
    console.print(renderable)
    return console.export_text()


def lines_of(text: str) -> list[str]:
    return text.rstrip("\n").split("\n")


def relay_snapshot(alarm: str | None = None, stopped: bool = False,
                   phase: Phase = Phase.RELAY) -> RunSnapshot:
    t = tuple(i * 0.01 for i in range(500))
    pv = tuple(0.4 * math.sin(2 * math.pi * x / 0.9) for x in t)
    out = tuple(-40.0 if math.sin(2 * math.pi * (x - 0.1) / 0.9) > 0 else 40.0 for x in t)
    est = tuple(CycleEstimate(i, 0.9 + 0.05 / i, 0.8, 127.0 + 3.0 / i, 0.9 + 0.05 / i)
                for i in range(1, 8))
    limits = (
        LimitGauge("pv_window", 0.42, 1.0, "rad/s"),
        LimitGauge("pv_rate", 3.9, 4.0, "rad/s²"),
        LimitGauge("output", 40.0, 60.0, "%"),
        LimitGauge("duration", 12.0, 60.0, "s"),
        LimitGauge("sample_gap", 0.01, 0.0, "s"),
    )
    return RunSnapshot(
        phase=phase, message="relay: amplitude 40, centre 0", device="bench-sim 0.3", axis=1,
        loop_mode="device", t=t, pv=pv, sp=(0.0,) * len(t), out=out, cycle=7, max_cycles=20,
        progress=0.35, estimates=est, converged=True, limits=limits,
        link=LinkHealth(0.0021, 0.0042, 5123, 2, 1), alarm=alarm, stopped=stopped,
    )


def start_view() -> StartView:
    return StartView(
        device="bench-sim 0.3", port="/dev/pts/7", axis=0, loop_mode="device",
        limits=(("output limit", "60 %"), ("PV window", "±1.5 rad/s"), ("PV rate", "8 rad/s²"),
                ("run time", "60 s"), ("sample gap", "0.2 s")),
        plan=(("target amplitude", "0.3 rad/s"), ("max cycles", "20")),
        simulated=True, out_dir="/tmp/run-7",
    )


NAMES = ["zn-p", "zn-pi", "zn-pid", "tl-pi", "tl-pid", "ah-pm", "simc-pi", "simc-pid",
         "amigo-pi", "amigo-pid", "robust-pi", "robust-pid"]


def proposals_view(selected: int = 10) -> ProposalsView:
    rows = []
    for i, name in enumerate(NAMES):
        pred = {"ms": 1.3 + 0.1 * i, "gain_margin": 3.0 - 0.1 * i, "phase_margin_deg": 60 - i,
                "overshoot": 2.0 * i, "rise_time": 0.2, "settling_time": 1.0 + 0.1 * i,
                "iae_load": 0.01 * (i + 1), "peak_output": 30 + i}
        viol = ("overshoot 22% > 20%",) if name.startswith("zn") else ()
        rows.append(ProposalRow(name, 10.0 + i, 20.0 + i, 0.1 * (i % 3), pred, viol,
                                name == "robust-pi"))
    return ProposalsView(tuple(rows), selected=selected, ms_target=1.4, ku=127.4,
                         tu=0.9, model="fopdt K 2 T 0.5 s L 0.05 s", spec="overshoot <= 20 %")


def step_view(passed: bool = True) -> StepView:
    t = tuple(i * 0.01 for i in range(300))
    y = tuple(1 - math.exp(-x / 0.2) * math.cos(5 * x) for x in t)
    yp = tuple(1 - math.exp(-x / 0.21) * math.cos(5.2 * x) for x in t)
    meas = {"overshoot": 8.1 if passed else 31.0, "rise_time": 0.21, "settling_time": 1.1,
            "steady_state_error": 0.001, "iae": 0.3, "peak_output": 54.0, "time_saturated": 0.0}
    pred = {"overshoot": 9.0, "rise_time": 0.2, "settling_time": 1.2, "iae": 0.28,
            "peak_output": 55.0}
    return StepView("robust-pi", 33.0, 52.1, 0.0, t, y, (1.0,) * len(t), (0.0,) * len(t), t, yp,
                    tuple(compare(meas, pred)), judge(meas, StepSpec(20.0, 2.0, 0.0)))


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


def test_nice_range_holds_values_and_widens_a_flat_series() -> None:
    lo, hi = nice_range([1.0, 3.0])
    assert lo < 1.0 and hi > 3.0
    lo, hi = nice_range([5.0, 5.0])
    assert lo < 5.0 < hi
    assert nice_range([]) == (-1.0, 1.0)


@pytest.mark.parametrize("width", [80, 97, 160])
def test_chart_fills_exactly_the_width(width: int) -> None:
    s = Series([0.0, 1.0, 2.0], [0.0, 1.0, 0.0], "cyan", "pv")
    text = render(BrailleChart([s], height=6, unit="rad/s"), width)
    lines = lines_of(text)
    assert len(lines) == 6 + 2 + 1  # plot rows, axis, time labels, legend
    assert all(len(ln) <= width for ln in lines)
    assert len(lines[0]) == width


# ---------------------------------------------------------------------------- widgets


def test_estimate_changes_are_relative_to_the_previous_cycle() -> None:
    est = [CycleEstimate(1, 1.0, 1.0, 100.0, 1.0), CycleEstimate(2, 1.0, 1.0, 110.0, 1.0),
           CycleEstimate(3, 1.0, 1.0, 110.0, 1.21)]
    ch = estimate_changes(est)
    assert ch[0] is None
    assert ch[1] == pytest.approx(0.1)
    assert ch[2] == pytest.approx(0.21)


def test_limit_bar_fills_in_proportion_and_marks_an_off_limit() -> None:
    text = limit_bar(LimitGauge("output", 30.0, 60.0, "%"), width=10).plain
    assert text.count("█") == 5 and text.count("░") == 5
    assert "30/60 %" in text
    assert "off" in limit_bar(LimitGauge("sample_gap", 0.1, 0.0)).plain
    full = limit_bar(LimitGauge("pv_window", -2.0, 1.0), width=10).plain
    assert full.count("█") == 10  # beyond the limit: the bar is full, never longer


# ---------------------------------------------------------------------------- live screen


@pytest.mark.parametrize("width,height", SIZES)
def test_live_screen_shows_everything_and_fits(width: int, height: int) -> None:
    snap = relay_snapshot()
    text = render(screens.live_screen(snap, width, height), width, height)
    lines = lines_of(text)
    assert len(lines) <= height
    assert all(len(ln) <= width for ln in lines)
    assert "SPACE ESC Q" in lines[1] and "STOP MOTOR" in lines[1]  # abort keys on top
    assert "relay 7/20" in text
    assert "35%" in text and "relay: amplitude 40" in text
    assert "✓ converged" in text
    for label in ("PV window", "PV rate", "output", "run time", "sample gap"):
        assert label in text
    assert "5123 ok" in text and "2 lost" in text and "1 crc" in text
    assert "2.1 ms" in text
    assert "bench-sim 0.3" in text and "axis 1" in text and "device loop" in text
    # estimates of the last cycles: Ku of cycle 7 = 127.0 + 3/7
    assert f"{127.0 + 3.0 / 7:.4g}" in text
    assert any(ch in text for ch in "⡀⠁⠂⢀⣀⠉")  # the braille chart is there


def test_live_screen_without_samples_says_it_waits() -> None:
    snap = RunSnapshot(phase=Phase.CONNECT, message="opening /dev/ttyACM0")
    text = render(screens.live_screen(snap), 80)
    assert "waiting for samples" in text
    assert "opening /dev/ttyACM0" in text
    assert "estimates per cycle" in text


@pytest.mark.parametrize("width,height", SIZES)
def test_alarm_is_full_width_and_says_what_to_do(width: int, height: int) -> None:
    snap = relay_snapshot(alarm="LINK LOST: no frame from the device for 1 s")
    text = render(screens.live_screen(snap, width, height), width, height)
    lines = lines_of(text)
    assert len(lines) <= height
    i = next(k for k, ln in enumerate(lines) if "LINK LOST" in ln)
    assert "CUT POWER" in lines[i + 1]  # not confirmed stopped -> cut power
    assert "SPACE ESC Q" in lines[1]  # the abort keys stay visible with the alarm up
    snap2 = relay_snapshot(alarm="FAULT: PV_WINDOW latched", stopped=True, phase=Phase.DONE)
    text2 = render(screens.live_screen(snap2, width, height), width, height)
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
def test_start_screen_has_the_cautions_limits_and_confirm_key(width: int, height: int) -> None:
    text = render(screens.start_screen(start_view(), width, height), width, height)
    lines = lines_of(text)
    assert len(lines) <= height
    flat = " ".join(" ".join(ln.strip("┃ ").split()) for ln in lines)
    for caution in CAUTIONS:
        assert caution in flat, caution
    for needle in ("bench-sim 0.3", "/dev/pts/7", "axis 0", "device", "60 %", "±1.5 rad/s",
                   "8 rad/s²", "target amplitude", "/tmp/run-7", "simulated"):
        assert needle in flat, needle
    assert " Y " in text and "STOP MOTOR" in lines[1]


@pytest.mark.parametrize("width,height", SIZES)
def test_proposals_screen_lists_every_design(width: int, height: int) -> None:
    view = proposals_view()
    text = render(screens.proposals_screen(view, width, height), width, height)
    lines = lines_of(text)
    assert len(lines) <= height
    assert all(len(ln) <= width for ln in lines)
    for name in NAMES:
        assert name in text
    default_line = next(ln for ln in lines if "robust-pi " in ln or "robust-pi│" in ln)
    assert "◆" in default_line
    zn_line = next(ln for ln in lines if " zn-pi " in ln)
    assert "✗" in zn_line
    assert "Ms target 1.40" in text
    assert "chosen robust-pi" in text
    assert "Ku 127.4" in text and "Tu 0.9 s" in text
    if width >= 120:
        assert "GM" in text and "PM" in text and "IAE" in text


def test_proposals_screen_shows_the_chosen_gains_and_its_violations() -> None:
    view = proposals_view(selected=0)
    text = render(screens.proposals_screen(view), 80)
    # zn-p: kp 10, ki 20, kd 0, as designed (a detune is a new design, not a factor)
    assert "chosen zn-p  kp 10  ki 20 /s  kd 0 s" in text
    assert "overshoot 22% > 20%" in text  # the chosen one's violations in full
    assert "Enter" not in lines_of(text)[1]  # Enter never starts a step


def test_confirm_screen_names_the_action_and_the_one_key() -> None:
    text = render(screens.confirm_screen(ConfirmView("run the confirmation step with zn-p: kp "
                                                     "10 (powers the motor)")), 80)
    assert "run the confirmation step with zn-p" in text
    assert " Y " in text and "powers the motor" in text
    assert "The robot is on blocks" in text


@pytest.mark.parametrize("width,height", SIZES)
def test_step_screen_shows_verdict_figures_and_keys(width: int, height: int) -> None:
    text = render(screens.step_screen(step_view(True), width, height), width, height)
    lines = lines_of(text)
    assert len(lines) <= height
    assert "✓ PASS" in text
    for label in ("overshoot", "rise", "settling", "IAE", "peak output"):
        assert label in text
    assert "measured" in text and "predicted" in text
    assert "-0.9" in text  # overshoot difference 8.1 - 9
    for key in (" a ", " d ", " o ", " r "):
        assert key in lines[1]
    bad = render(screens.step_screen(step_view(False), width, height), width, height)
    assert "NOT MET" in bad and "detune" in bad


def test_finish_screen_lists_the_files() -> None:
    view = FinishView(True, "gains accepted", (("session", "/tmp/r/session.jsonl"),
                                               ("gains", "/tmp/r/gains.toml")),
                      (("kp", "33"),), "kp = 33\n")
    text = render(screens.finish_screen(view), 80)
    assert "/tmp/r/session.jsonl" in text and "/tmp/r/gains.toml" in text
    assert "gains accepted" in text and "kp = 33" in text


# ---------------------------------------------------------------------------- plain lines


def test_plain_lines_carry_the_same_information_without_escapes() -> None:
    snap = relay_snapshot(alarm="LINK LOST")
    lines = plain.snapshot_lines(snap)
    joined = "\n".join(lines)
    assert ESC not in joined
    assert "ALARM: LINK LOST" in joined and "relay 7/20" in joined
    assert "converged" in joined and "PV window 0.42/1 (42%)" in joined
    assert "sample gap off" in joined
    assert "5123 ok, 2 lost, 1 crc" in joined
    start = "\n".join(plain.start_lines(start_view()))
    for caution in CAUTIONS:
        assert caution in start
    assert "Space, Esc, q" in start
    props = plain.proposals_lines(proposals_view())
    assert any(ln.startswith("11* robust-pi") for ln in props)
    assert any("! overshoot 22% > 20%" in ln for ln in props)
    step = "\n".join(plain.step_lines(step_view(False)))
    assert "NOT MET" in step and "overshoot" in step and ESC not in step
    fin = plain.finish_lines(FinishView(True, "ok", (("gains", "/x/gains.toml"),)))
    assert "  gains: /x/gains.toml" in fin


def test_plain_reporter_prints_changes_not_every_sample() -> None:
    out: list[str] = []
    rep = plain.PlainReporter(out.append)
    s1 = relay_snapshot()
    rep.update(s1)
    n = len(out)
    assert n > 0
    from dataclasses import replace

    rep.update(replace(s1, t=s1.t[1:], pv=s1.pv[1:]))  # only samples moved on
    assert len(out) == n
    rep.update(replace(s1, estimates=s1.estimates + (CycleEstimate(8, 0.9, 0.8, 127.3, 0.9),)))
    assert any("cycle 8" in ln for ln in out[n:])
    rep.update(replace(s1, phase=Phase.DONE, stopped=True, message="aborted"))
    assert any("motor stopped" in ln for ln in out)


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
