"""Plain lines for when stdout is not a terminal: no escape codes, the same information.

One format for every verb: each line starts with the stage it belongs to in a column of its own
(`start`, `connect`, `rest`, `relay`, `gains`, `step`, `finish`, ...), then the text, with a unit
on every number. Each function is pure: a snapshot or view in, lines out. `PlainReporter`
prints what changed since the last snapshot (a new phase, a relay cycle as one table row, the
limits used when a phase that moves the motor ends, an alarm, the stop) rather than every
sample, so a log file stays readable.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from autotune.core.progress import CycleEstimate, LimitGauge, Phase, RunSnapshot
from autotune.ui.screens import FIGURE_COLUMNS, GAIN_COLUMNS, figure_label, row_key
from autotune.ui.views import (
    CUT_OFF,
    KD_UNIT,
    KI_UNIT,
    KP_UNIT,
    ConfirmView,
    FinishView,
    LiveContext,
    ProposalsView,
    StartView,
    StepView,
)
from autotune.ui.widgets import (
    LIMIT_LABELS,
    PHASE_LABELS,
    cycle_cells,
    cycle_columns,
    estimate_changes,
    fmt,
    gauge_unit,
    plain_df,
)

TAG_WIDTH = 10
ABORT_HINT = f"stop keys: Space, Esc, q, Ctrl-C; {CUT_OFF}"

# What a phase is doing when the runner gives it no message of its own.
PHASE_WORDS = {
    Phase.CONNECT: "armed: the limits are loaded into the board and read back",
    Phase.STOPPING: "stopping the motor",
    Phase.DONE: "the powered run is over",
    Phase.WAITING: "the motor is unpowered",
}
# The stage tags a line may carry (a line the job says that starts with one belongs to it).
STAGE_LABELS = frozenset(v for k, v in PHASE_LABELS.items()
                         if k not in (Phase.WAITING, Phase.STOPPING, Phase.DONE))

# Phases that move the motor: when one ends, one line says how much of each limit it used.
MOVING = (Phase.PRECHECK_DIRECTION, Phase.PRECHECK_BREAKAWAY, Phase.RELAY, Phase.STEP)


def tagged(tag: str, text: str) -> str:
    """One line: the stage tag in its column, then the text."""
    return f"{tag:<{TAG_WIDTH}} {text}".rstrip()


def tag_all(tag: str, lines: Sequence[str]) -> list[str]:
    return [tagged(tag, ln) for ln in lines]


def phase_tag(phase: Phase | None) -> str:
    return "start" if phase is None else PHASE_LABELS.get(phase, str(phase.value))


def start_lines(view: StartView) -> list[str]:
    """The start screen as lines."""
    board = f"board {view.device}" + (f", firmware {view.firmware}" if view.firmware else "")
    if view.board:
        board += ", " + ", ".join(f"{k} {v}" for k, v in view.board)
    lines = [board,
             f"port {view.port}" + (" (simulated board: no motor moves)" if view.simulated
                                    else "") + f", axis {view.axis}, {view.loop_mode} loop"]
    if view.out_dir:
        lines.append(f"files to {view.out_dir}")
    lines.append("limits: " + "; ".join(f"{k} {v}" for k, v in view.limits))
    if view.plan:
        lines.append(f"{view.plan_title}: " + "; ".join(f"{k} {v}" for k, v in view.plan))
    lines.append("before the motor moves:")
    lines += [f"  - {c}" for c in view.cautions]
    lines.append(ABORT_HINT)
    return tag_all("start", lines)


def gauge_text(g: LimitGauge) -> str:
    """One limit as 'PV window 0.15 of 3 PV (5 %)'."""
    label = LIMIT_LABELS.get(g.name, g.name)
    if not g.limit or g.limit == float("inf"):
        return f"{label} off"
    unit = gauge_unit(g)
    return (f"{label} {fmt(abs(g.value), 3)} of {fmt(g.limit, 3)}{' ' + unit if unit else ''}"
            f" ({g.fraction * 100:.0f} %)")


def limits_text(limits: Sequence[LimitGauge]) -> str:
    """Every limit as 'name value of limit unit (percent)'."""
    return ", ".join(gauge_text(g) for g in limits)


def link_text(snap: RunSnapshot) -> str:
    """Link health in one phrase."""
    ln = snap.link
    rtt = "—" if ln.rtt_median is None else f"{ln.rtt_median * 1e3:.1f} ms"
    return (f"round trip {rtt}, {ln.frames_good} frames ok, {ln.frames_lost} lost, "
            f"{ln.crc_errors} damaged")


def cycle_header(estimates: Sequence[CycleEstimate]) -> str:
    """The heading of the per-cycle table (names with units)."""
    cols = cycle_columns(estimates)
    return "  ".join(f"{(name + (' ' + unit if unit else '')):>{_width(name, unit)}}"
                     for name, unit in cols)


def _width(name: str, unit: str) -> int:
    return max(6, len(name) + (len(unit) + 1 if unit else 0))


def cycle_line(estimates: Sequence[CycleEstimate], i: int) -> str:
    """Row `i` of the per-cycle table, aligned under cycle_header."""
    cols = cycle_columns(estimates)
    both = any(plain_df(e) is not None for e in estimates)
    cells = cycle_cells(estimates[i], estimate_changes(estimates)[i], both)
    return "  ".join(f"{c:>{_width(n, u)}}" for c, (n, u) in zip(cells, cols, strict=True))


def snapshot_lines(snap: RunSnapshot) -> list[str]:
    """The live screen as lines: phase and message, the relay cycles, limits, link, alarm."""
    tag = phase_tag(snap.phase)
    lines = []
    if snap.alarm:
        lines.append(tagged("ALARM", snap.alarm))
    lines.append(tagged(tag, snap.message or PHASE_WORDS.get(snap.phase, "")))
    if snap.estimates:
        lines.append(tagged(tag, cycle_header(snap.estimates)))
        lines += [tagged(tag, cycle_line(snap.estimates, i))
                  for i in range(len(snap.estimates))]
        if snap.converged:
            lines.append(tagged(tag, f"converged after {len(snap.estimates)} cycles"))
    if snap.limits:
        lines.append(tagged(tag, "limits: " + limits_text(snap.limits)))
    lines.append(tagged(tag, "link: " + link_text(snap)))
    if snap.stopped:
        lines.append(tagged(tag, "motor stopped: the device confirmed zero output"))
    return lines


class PlainReporter:
    """Prints, through `write` (one line a call), what each snapshot adds to the one before
    (see the module docstring)."""

    def __init__(self, write: Callable[[str], None]) -> None:
        self.write = write
        self.prev: RunSnapshot | None = None
        self.cycles = 0  # relay cycles printed
        self.peak: dict[str, LimitGauge] = {}  # the most of each limit the phase used
        self._link_said: Phase | None = None

    @property
    def phase(self) -> Phase | None:
        return None if self.prev is None else self.prev.phase

    @property
    def tag(self) -> str:
        return phase_tag(self.phase) if self.prev is not None else "connect"

    def update(self, snap: RunSnapshot, ctx: LiveContext | None = None) -> None:
        """Print what `snap` adds to the previous snapshot."""
        for line in self.changes(snap):
            self.write(line)
        self.prev = snap

    def changes(self, snap: RunSnapshot) -> list[str]:
        prev = self.prev
        tag = phase_tag(snap.phase)
        lines: list[str] = []
        if prev is None or prev.phase != snap.phase:
            if prev is not None and prev.phase in MOVING and self.peak:
                lines.append(tagged(phase_tag(prev.phase), "limits used: " + limits_text(
                    list(self.peak.values()))))
            self.peak = {}
            lines.append(tagged(tag, snap.message or PHASE_WORDS.get(snap.phase, "")))
        elif snap.message != prev.message and snap.message:
            lines.append(tagged(tag, snap.message))
        for g in snap.limits:
            if g.name not in self.peak or g.fraction > self.peak[g.name].fraction:
                self.peak[g.name] = g
        if snap.alarm and (prev is None or snap.alarm != prev.alarm):
            lines.append(tagged("ALARM", snap.alarm))
        est = snap.estimates
        if len(est) > self.cycles:
            if self.cycles == 0:
                lines.append(tagged(tag, cycle_header(est)))
            lines += [tagged(tag, cycle_line(est, i)) for i in range(self.cycles, len(est))]
            self.cycles = len(est)
        if snap.converged and (prev is None or not prev.converged):
            e = est[-1] if est else None
            figures = "" if e is None else (f": period {fmt(e.period, 3)} s, Ku "
                                            f"{fmt(e.ku)} {KP_UNIT} on the last cycle")
            lines.append(tagged(tag, f"converged after {len(est)} cycles{figures}"))
        ln = snap.link
        worse = prev is not None and (ln.frames_lost > prev.link.frames_lost
                                      or ln.crc_errors > prev.link.crc_errors)
        if worse and self._link_said is not snap.phase:
            self._link_said = snap.phase  # at most once a phase
            lines.append(tagged(tag, "link: " + link_text(snap)))
        if snap.stopped and (prev is None or not prev.stopped):
            lines.append(tagged(tag, "motor stopped: the device confirmed zero output"))
            lines.append(tagged(tag, "link: " + link_text(snap)))
        return lines


def proposals_lines(view: ProposalsView) -> list[str]:
    """The proposals table as lines: the key that picks each row (the same keys as the
    screen; the row number works too), the default marked '*', violations after '!'."""
    cols = [*GAIN_COLUMNS, *FIGURE_COLUMNS]
    head = [f"{c.title} {c.unit}".strip() for c in cols]
    widths = [max(len(h), 7) for h in head]
    lines = [f"identified Ku {fmt(view.ku)} {KP_UNIT}, Tu {fmt(view.tu)} s"
             + (f"; model {view.model}" if view.model else ""),
             f"Ms target {view.ms_target:.2f}" + (f"; spec {view.spec}" if view.spec else "")
             + "; b is the setpoint weight, Ms the largest sensitivity",
             f"{'key':>3}  {'design':<14}" + "".join(f"{h:>{w + 1}}" for h, w in
                                                   zip(head, widths, strict=True)) + "  flags"]
    for i, r in enumerate(view.rows):
        mark = "*" if r.default else " "
        cells = []
        for c in cols:
            if c.key == "b":
                cells.append(f"{r.setpoint_weight:.2f}")
            elif c.key in ("kp", "ki", "kd"):
                cells.append(fmt(getattr(r, c.key), c.digits))
            else:
                cells.append(fmt(r.predicted.get(c.key), c.digits))
        flags = ("default " if r.default else "") + (
            "! " + "; ".join(r.violations) if r.violations else "")
        lines.append(f"{row_key(i) or str(i + 1):>3}{mark} {r.name:<14}"
                     + "".join(f"{v:>{w + 1}}" for v, w in zip(cells, widths, strict=True))
                     + f"  {flags}".rstrip())
    if view.rows:
        sel = view.rows[min(max(view.selected, 0), len(view.rows) - 1)]
        lines.append(f"chosen: {sel.name}: kp {fmt(sel.kp)} {KP_UNIT}, ki {fmt(sel.ki)} "
                     f"{KI_UNIT}, kd {fmt(sel.kd)} {KD_UNIT}, setpoint weight b "
                     f"{sel.setpoint_weight:.2f}")
    if view.message:
        lines.append(view.message)
    return tag_all("gains", lines)


def step_lines(view: StepView) -> list[str]:
    """The step result as lines: gains, verdict, measured vs predicted."""
    lines = [f"step with {view.name}: kp {fmt(view.kp)} {KP_UNIT}, ki {fmt(view.ki)} "
             f"{KI_UNIT}, kd {fmt(view.kd)} {KD_UNIT}"]
    v = view.verdict
    if v is None:
        lines.append(f"no verdict: {view.message or 'the step was stopped'}")
    else:
        action = getattr(v.action, "value", str(v.action)).replace("_", " ")
        lines.append(("PASS: " if v.passed else "NOT MET: ") + v.reason
                     + ("" if v.passed else f" (suggested: {action})"))
        for c in v.checks:
            status = getattr(c, "status", "pass" if c.passed else "fail")
            word = {"pass": "ok  ", "fail": "FAIL", "not judged": "n/j ", "off": "off "}.get(
                status, "FAIL")
            lines.append(f"  {word} {c.message}")
    lines.append(f"  {'figure':<22}{'measured':>11}{'predicted':>11}{'difference':>12}")
    for r in view.rows:
        diff = "—" if r.difference is None else f"{r.difference:+.3g}"
        lines.append(f"  {figure_label(r):<22}{fmt(r.measured, 3):>11}"
                     f"{fmt(r.predicted, 3):>11}{diff:>12}")
    if view.detune_hint:
        lines.append(f"detune would run {view.detune_hint}")
    if view.message and v is not None:
        lines.append(view.message)
    return tag_all("step", lines)


def confirm_lines(view: ConfirmView) -> list[str]:
    """The confirmation before power as lines (the prompt follows)."""
    return tag_all("confirm", [view.action, "before the motor moves:",
                               *(f"  - {c}" for c in view.cautions)])


def finish_lines(view: FinishView) -> list[str]:
    """The finish screen as lines."""
    lines = [("done: " if view.ok else "ended: ") + view.message]
    lines += [f"  {what}: {path}" for what, path in view.files]
    if view.gains:
        lines.append("accepted gains: " + ", ".join(f"{k} {v}" for k, v in view.gains))
    if view.code:
        lines.append(view.code_title + ":")
        lines += ["  " + ln for ln in view.code.splitlines()]
    return tag_all("finish", lines)
