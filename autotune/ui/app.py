"""The interactive shell of the bench view: one screen, one key thread, the whole tuning job.

`Terminal` owns the screen (rich Live on the alternate screen, or plain lines when stdout is not
a terminal) and the single key thread (`KeyRouter`, built on `autotune.keys.AbortKeys`): abort
keys are handled first, in the key thread, by whatever stop the current stage installed; other
keys go to a queue the screens read.

`TerminalOperator` is the job's operator (autotune.job.operator) on that terminal; `run_job`
runs autotune.job.job.TuningJob with it and prints the finish screen. The job stops the motor
before any screen waits for the operator.
"""

from __future__ import annotations

import contextlib
import queue
import sys
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

from rich.console import Console, RenderableType
from rich.live import Live

from autotune.core.progress import RunSnapshot
from autotune.errors import EXIT_OK
from autotune.job.job import JobOutcome, TuningJob
from autotune.job.operator import (
    Decision,
    GainsMenu,
    JobSummary,
    MenuAnswer,
    StartInfo,
    StepReport,
)
from autotune.job.requests import JobRequest
from autotune.keys import AbortKeys
from autotune.ui import plain, screens
from autotune.ui.operator import red_alarm
from autotune.ui.screens import ROW_KEYS
from autotune.ui.tracker import LiveTracker
from autotune.ui.views import (
    ConfirmView,
    FinishView,
    LiveContext,
    ProposalRow,
    ProposalsView,
    StartView,
    StepView,
)

ABORT = "<abort>"  # what the key queue carries for an abort key
FRAME_RATE = 8.0  # most frames a second the screen thread draws
# While a screen thread draws (pure Python, tens of ms a frame), the runner's thread waits for the
# interpreter lock at every sample; a short switch interval hands it over within a millisecond
# instead of the default 5 ms, so the runner never falls behind the device's samples.
SWITCH_INTERVAL = 0.0005
ENTER_KEYS = ("\r", "\n")


class KeyRouter(AbortKeys):
    """The one key thread: abort keys to `on_abort` first, every other key to `on_key`.

    Same terminal handling as AbortKeys (cbreak, signal keys off, restored on stop). A read that
    holds an abort key anywhere calls `on_abort` and drops the rest of that read (so an arrow
    key's escape sequence counts as Esc: it stops the motor; the screens use no arrow keys).
    """

    def __init__(self, on_abort: Callable[[str], None], on_key: Callable[[str], None],
                 stream: Any = None) -> None:
        super().__init__(on_abort, stream=stream, on_key=on_key)


def _isatty(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


class Terminal:
    """Screen and keys of one job. `rich` is True when stdout is a terminal (full screens),
    `keys` when stdin is one too (the operator can answer); otherwise plain lines."""

    def __init__(self, console: Console | None = None, stdin: Any = None,
                 rich: bool | None = None) -> None:
        self.console = console or Console(highlight=False)
        self.stdin = stdin if stdin is not None else sys.stdin
        # full screens need a terminal that moves the cursor; a dumb one gets plain lines
        self.rich = self.console.is_interactive if rich is None else rich
        self.keys_available = _isatty(self.stdin)  # abort keys work whenever someone types
        self.keys: queue.Queue[str] = queue.Queue()
        self.live: Live | None = None
        self.router: KeyRouter | None = None
        self._cond = threading.Condition()
        self._pending: Callable[[int, int], RenderableType] | None = None
        self._seq = 0
        self._drawn = 0
        self._closing = False
        self._drawer: threading.Thread | None = None
        self._old_switch = sys.getswitchinterval()
        self.on_abort: Callable[[str], None] | None = None  # installed by the current stage
        self.abort_key: str | None = None
        self.reporter = plain.PlainReporter(self.line)
        self.captured: dict[str, Callable[[int, int], RenderableType]] | None = None

    # ---------------------------------------------------------------- life cycle
    def start(self) -> Terminal:
        if self.keys_available:
            self.router = KeyRouter(self._abort, self.keys.put, stream=self.stdin).start()
        if self.rich:
            self.live = Live(console=self.console, screen=True, auto_refresh=False,
                             redirect_stdout=False, redirect_stderr=False)
            self.live.start()
            self._closing = False
            self._old_switch = sys.getswitchinterval()
            sys.setswitchinterval(SWITCH_INTERVAL)
            self._drawer = threading.Thread(target=self._draw_loop, name="screen", daemon=True)
            self._drawer.start()
        return self

    def close(self) -> None:
        if self._drawer is not None:
            with self._cond:
                self._closing = True
                self._cond.notify_all()
            self._drawer.join(timeout=5.0)
            self._drawer = None
            sys.setswitchinterval(self._old_switch)
        if self.live is not None:
            with contextlib.suppress(Exception):
                self.live.stop()
            self.live = None
        if self.router is not None:
            self.router.stop()
            self.router = None

    def __enter__(self) -> Terminal:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---------------------------------------------------------------- keys
    def _abort(self, key: str) -> None:
        """Key thread: stop first (the current stage's stop), then tell the screens."""
        self.abort_key = key
        target = self.on_abort
        if target is not None:
            with contextlib.suppress(Exception):
                target(key)
        self.keys.put(ABORT)

    def drain(self) -> None:
        """Forget keys typed while nothing was asking (abort keys were handled already)."""
        while True:
            try:
                self.keys.get_nowait()
            except queue.Empty:
                return

    def wait_key(self, allowed: str | tuple[str, ...] = ()) -> str:
        """The next key among `allowed` (any key when empty), or ABORT."""
        while True:
            key = self.keys.get()
            if key == ABORT or not allowed or key in allowed:
                return key

    # ---------------------------------------------------------------- output
    def size(self) -> tuple[int, int]:
        w, h = self.console.size
        return max(w, screens.MIN_WIDTH), max(h, screens.MIN_HEIGHT)

    def show(self, build: Callable[[int, int], RenderableType], name: str = "",
             wait: bool = True) -> None:
        """Draw a screen built for the terminal's size (rich mode only). With `captured` set,
        the latest builder of each named screen is kept there (for the screenshot export).

        The drawing happens on the screen thread, so a runner that publishes a snapshot never
        waits for the terminal; `wait` blocks until this screen (or a newer one) is drawn."""
        if self.captured is not None and name:
            self.captured[name] = build
        if self.live is None:
            return
        with self._cond:
            self._seq += 1
            self._pending = build
            self._cond.notify_all()
            if wait:
                target = self._seq
                self._cond.wait_for(lambda: self._drawn >= target or self._closing, timeout=5.0)

    def _draw_loop(self) -> None:
        """Screen thread: draw the newest pending screen, at most FRAME_RATE times a second."""
        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._pending is not None or self._closing)
                if self._closing and self._pending is None:
                    return
                build, seq = self._pending, self._seq
                self._pending = None
            live = self.live
            if live is not None and build is not None:
                w, h = self.size()
                with contextlib.suppress(Exception):  # a broken frame must not end the job
                    live.update(build(w, h), refresh=True)
            with self._cond:
                self._drawn = seq
                self._cond.notify_all()
            time.sleep(1.0 / FRAME_RATE)

    def line(self, text: str) -> None:
        """One plain line (plain mode), flushed."""
        if self.live is None:
            print(text, file=self.console.file, flush=True)

    def lines(self, lines: list[str]) -> None:
        for ln in lines:
            self.line(ln)

    def snapshot(self, snap: RunSnapshot, ctx: LiveContext | None = None) -> None:
        """Runner callback: draw the live screen, or print what changed."""
        def build(w: int, h: int) -> RenderableType:
            return screens.live_screen(snap, w, h, ctx)

        if self.live is not None:
            self.show(build, f"live-{snap.phase.value}", wait=False)
        else:
            if self.captured is not None:
                self.captured[f"live-{snap.phase.value}"] = build
            self.reporter.update(snap, ctx)

    def read_line(self, prompt: str) -> str | None:
        """Plain mode: print `prompt` and collect typed keys (echoed) up to Enter; None when a
        stop key is pressed or nobody can type. Keys typed before the prompt do not count."""
        if not self.keys_available:
            return None
        self.drain()
        out = self.console.file
        out.write(prompt)
        out.flush()
        typed: list[str] = []
        while True:
            key = self.keys.get()
            if key == ABORT:
                out.write("\n")
                out.flush()
                return None
            if key in ENTER_KEYS:
                out.write("\n")
                out.flush()
                return "".join(typed)
            if key in ("\x7f", "\b"):
                if typed:
                    typed.pop()
                    out.write("\b \b")
            elif key.isprintable():
                typed.append(key)
                out.write(key)
            out.flush()


# ------------------------------------------------------------------------ the operator
LINE_CONFIRM = plain.tagged("confirm", "Type yes and Enter to power the motor (anything else "
                                       "goes back): ")


class TerminalOperator:
    """The job's operator on a terminal: full screens when stdout is a terminal, plain lines
    otherwise; answers come from the one key thread (see autotune.job.operator for the
    confirmation rule: the Y key on the screen, `yes` typed in line mode). `unattended`: the
    job asks nothing (--yes), so no screen offers a key to start."""

    def __init__(self, term: Terminal, unattended: bool = False) -> None:
        self.term = term
        self.unattended = unattended
        self.summary: JobSummary | None = None
        self.last_step: StepView | None = None
        self.log: list[str] = []  # every line the job said
        self.tracker = LiveTracker()
        self.tag = "connect"  # the stage the next plain line belongs to
        self._on_start = False
        self.alarms: list[str] = []  # said again once the full screen is closed

    @property
    def can_ask(self) -> bool:
        return self.term.keys_available

    # ---------------------------------------------------------------- showing
    def show_start(self, info: StartInfo) -> None:
        self.tracker.plan(info.stages)
        view = StartView(device=info.device, port=info.port, axis=info.axis,
                         loop_mode=info.loop_mode, limits=info.limits, plan=info.plan,
                         simulated=info.simulated, out_dir=info.out_dir,
                         firmware=info.firmware, board=info.facts,
                         road=self.tracker.context.road,
                         plan_title="relay plan" if any(s == "relay" for s, _ in info.stages)
                         or not info.stages else "step plan",
                         unattended=self.unattended)
        term = self.term
        term.show(lambda w, h: screens.start_screen(view, w, h), "start")
        if term.live is None:
            term.lines(plain.start_lines(view))
        self.tag = "start"
        self._on_start = True  # the start screen asks for Y itself

    def update(self, snap: RunSnapshot) -> None:
        ctx = self.tracker.update(snap)
        self.tag = plain.phase_tag(snap.phase)
        self.term.snapshot(snap, ctx)

    def say(self, line: str) -> None:
        """One line of the job: on the live screen's log, or as a plain line of the current
        stage (a leading "<stage>: " the line repeats is dropped)."""
        self.log.append(line)
        self.tracker.said(line)
        tag, text = self.tag, line
        head, sep, rest = line.partition(": ")
        if sep and head in plain.STAGE_LABELS:
            tag, text = head, rest
        elif line.split(" ", 1)[0] in plain.STAGE_LABELS:
            tag = line.split(" ", 1)[0]  # a line that names its stage ("step +1 PV units ...")
        self.term.line(plain.tagged(tag, text))

    def alarm(self, text: str) -> None:
        self.log.append(text)
        self.alarms.append(text)
        self.tracker.said(f"ALARM: {text}")
        self.term.line(plain.tagged("ALARM", text))
        if self.term.live is None:
            red_alarm(text)  # on stderr too, red on a terminal

    def watch_abort(self, stop: Callable[[str], None] | None) -> None:
        self.term.on_abort = stop

    def show_gains(self, menu: GainsMenu) -> None:
        view = _proposals_view(menu)
        self.term.show(lambda w, h: screens.proposals_screen(view, w, h), "proposals")
        if self.term.live is None:
            self.term.lines(plain.proposals_lines(view))

    def show_step(self, report: StepReport) -> None:
        # unattended nothing is read after the step: no keys (a picture of the screen shows them)
        keys = () if self.unattended else tuple((k, label) for k, label, _ in STEP_DECISIONS)
        view = _step_view(report, keys)
        self.last_step = view
        self.term.show(lambda w, h: screens.step_screen(view, w, h), "step")
        if self.term.live is None:
            self.term.lines(plain.step_lines(view))

    def finish(self, summary: JobSummary) -> None:
        self.summary = summary

    # ---------------------------------------------------------------- asking
    def confirm_power(self, action: str) -> bool:
        term = self.term
        view = ConfirmView(action)
        on_start, self._on_start = self._on_start, False
        term.drain()  # keys typed before this question do not count
        if term.live is not None:
            if not on_start:
                term.show(lambda w, h: screens.confirm_screen(view, w, h), "confirm")
            key = term.wait_key()
            return key in ("y", "Y")
        if not on_start:
            term.lines(plain.confirm_lines(view))
        answer = term.read_line(LINE_CONFIRM)
        return answer is not None and answer.strip().lower() == "yes"

    def choose_gains(self, menu: GainsMenu) -> MenuAnswer:
        """The gains menu. Screen: a row's key (1-9, then a, b, c, ...), Tab/n/p to move, m/M
        for the Ms target, s to choose; line mode: a row's key or number and Enter. A stop key
        leaves (with the proposals as last redesigned, so that result.json keeps them)."""
        term = self.term
        props, selected, ms, message = menu.proposals, menu.selected, menu.ms_target, ""
        changed = False
        term.drain()

        def answer(index: int | None) -> MenuAnswer:
            return MenuAnswer(index, props if changed else (), ms)

        while True:
            m = replace(menu, proposals=props, selected=selected, ms_target=ms,
                        message=message or menu.message)
            view = _proposals_view(m)
            if term.live is None:
                term.lines(plain.proposals_lines(view))
                default = next((i for i, p in enumerate(props) if p.get("default")), selected)
                last = screens.row_key(len(props) - 1) or str(len(props))
                typed = term.read_line(plain.tagged(
                    "gains", f"proposal for the confirmation step (1-{last} or its number; "
                             f"Enter: {screens.row_key(default) or default + 1} "
                             f"{props[default].get('name')}; a stop key leaves): "))
                if typed is None:
                    return answer(None)
                a = typed.strip()
                if not a:
                    return answer(default)
                pick = _row_of(a, len(props))
                if pick is not None:
                    return answer(pick)
                message = f"no proposal {a!r}"
                continue
            term.show(lambda w, h, v=view: screens.proposals_screen(v, w, h), "proposals")
            key = term.wait_key()
            message = ""
            if key == ABORT:
                return answer(None)
            if key in ROW_KEYS and ROW_KEYS.index(key) < len(props):
                selected = ROW_KEYS.index(key)
            elif key in ("\t", "n"):
                selected = (selected + 1) % len(props)
            elif key == "p":
                selected = (selected - 1) % len(props)
            elif key in ("m", "M") and menu.redesign is not None:
                new = round(ms + (0.05 if key == "M" else -0.05), 2)
                if not 1.1 <= new <= 2.0:
                    message = "Ms target stays between 1.10 and 2.00"
                    continue
                busy = replace(view, message="redesigning…")
                term.show(lambda w, h, v=busy: screens.proposals_screen(v, w, h))
                name = props[selected].get("name")
                props, message = menu.redesign(new)
                ms, changed = new, True
                selected = next((i for i, p in enumerate(props) if p.get("name") == name), 0)
            elif key == "s":
                return answer(selected)
            elif key in ENTER_KEYS:
                message = "Enter never starts the motor: s chooses, then Y confirms"

    def after_step(self, report: StepReport, offer: Sequence[Decision]) -> Decision:
        term = self.term
        keys = tuple((k, label) for k, label, d in STEP_DECISIONS if d in offer)
        view = _step_view(report, keys)
        self.last_step = view
        term.drain()  # the keys of the step run were handled there (abort) or do not count
        allowed = {k: d for k, _, d in STEP_DECISIONS if d in offer}
        if term.live is None:
            term.lines(plain.step_lines(view))
            words = ", ".join(f"[{k}]{label[1:]}" if label.startswith(k) else f"{k} {label}"
                              for k, label in keys)
            while True:
                answer = term.read_line(plain.tagged("step", f"{words} (a stop key leaves): "))
                if answer is None:
                    return Decision.LEAVE
                a = answer.strip().lower()
                pick = allowed.get(a[:1]) if a else None
                if pick is not None and (len(a) == 1 or pick.value.startswith(a)):
                    return pick
        term.show(lambda w, h: screens.step_screen(view, w, h), "step")
        while True:
            key = term.wait_key()
            if key == ABORT:
                return Decision.LEAVE
            if key in allowed:
                return allowed[key]


STEP_DECISIONS = (("a", "accept", Decision.ACCEPT), ("d", "detune", Decision.DETUNE),
                  ("o", "other proposal", Decision.OTHER), ("r", "repeat", Decision.REPEAT),
                  ("q", "quit", Decision.LEAVE))


def _row_of(typed: str, n: int) -> int | None:
    """The proposal row a typed answer names: its key (1-9, a, b, ...) or its number."""
    if typed.isdigit() and 1 <= int(typed) <= n:
        return int(typed) - 1
    if len(typed) == 1 and typed in ROW_KEYS and ROW_KEYS.index(typed) < n:
        return ROW_KEYS.index(typed)
    return None


def _proposals_view(menu: GainsMenu) -> ProposalsView:
    return ProposalsView(rows=tuple(ProposalRow.of_dict(p) for p in menu.proposals),
                         selected=menu.selected, ms_target=menu.ms_target, ku=menu.ku,
                         tu=menu.tu, model=menu.model, spec=menu.spec, message=menu.message)


def _step_view(report: StepReport, keys: tuple[tuple[str, str], ...]) -> StepView:
    o = report.outcome
    if o is None or not o.t:
        return StepView(report.name, report.kp, report.ki, report.kd, (), (), (), (),
                        keys=keys, message=f"stopped before the step: {report.message}")
    seg = next((s for s in o.segments if str(s.phase.value) == "step"), None)
    t0 = seg.t_start if seg is not None else o.t[0]
    t1 = seg.t_end if seg is not None else o.t[-1]
    lead = min(0.5, 0.25 * max(t1 - t0, 0.0))  # a little of the hold before the step
    keep = [i for i, x in enumerate(o.t) if t0 - lead <= x <= t1 + 1e-9]
    t = tuple(o.t[i] - t0 for i in keep)

    def pick(a: list[float]) -> tuple[float, ...]:
        return tuple(a[i] for i in keep)

    verdict, note = o.verdict, ""
    if report.reason != "completed":
        # a step cut short proves nothing: figures shown, no verdict, nothing to accept
        verdict = None
        note = f"stopped: {report.message}; the motor is unpowered"
    return StepView(report.name, report.kp, report.ki, report.kd, t, pick(o.pv), pick(o.sp),
                    pick(o.out), report.pred_t, report.pred_y, tuple(o.rows), verdict,
                    detune_hint=report.detune_hint, keys=keys, message=note)


def finish_view(summary: JobSummary) -> FinishView:
    """The finish screen of a job."""
    gains: tuple[tuple[str, str], ...] = ()
    rec = summary.gains
    if rec is not None:
        g = rec.gains
        gains = (("kp", f"{g.kp:.6g} out/PV"), ("ki", f"{g.ki:.6g} out/PV/s"),
                 ("kd", f"{g.kd:.6g} out·s/PV"), ("setpoint weight b", f"{rec.setpoint_weight:.3g}"),
                 ("loop period", f"{rec.period:.6g} s"))
    code_file = next((path for what, path in summary.files if what.startswith("code")), "")
    title = f"per-tick code for your loop (also in {code_file})" if code_file else (
        "per-tick code for your loop")
    return FinishView(summary.exit_code == EXIT_OK, summary.message, tuple(summary.files),
                      gains, summary.code, title)


def run_job(request: JobRequest, console: Console | None = None, stdin: Any = None,
            term: Terminal | None = None, unattended: bool | None = None,
            connection: Any = None) -> JobOutcome:
    """Run a job on the terminal (full screen, or plain lines when stdout is not a terminal),
    then print the finish screen; the JobOutcome says how it ended. `unattended` (default:
    request.yes) draws the screens without the keys that start a stage; `connection`: a
    plan's open connection to use and leave open (autotune.job.plan)."""
    term = term or Terminal(console, stdin)
    op = TerminalOperator(term, unattended=request.yes if unattended is None else unattended)
    with term:
        outcome = TuningJob(request, op, connection=connection).run()
    summary = op.summary
    if summary is not None:
        view = finish_view(summary)
        if term.captured is not None:
            term.captured["finish"] = lambda w, h: screens.finish_screen(view, w)
        if term.rich:
            if op.last_step is not None and summary.exit_code == EXIT_OK:
                term.console.print(screens.step_screen(op.last_step, *term.size()))
            term.console.print(screens.finish_screen(view, term.size()[0]))
        else:
            term.lines(plain.finish_lines(view))
    if term.rich:
        for text in op.alarms:  # the full screen is gone: the alarm must stay in view
            red_alarm(text)
    return outcome


__all__ = ["ABORT", "KeyRouter", "Terminal", "TerminalOperator", "finish_view", "run_job"]
