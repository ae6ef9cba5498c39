"""The interactive shell of the bench view: one screen, one key thread, the whole tuning job.

`Terminal` owns the screen (rich Live on the alternate screen, or plain lines when stdout is not
a terminal) and the single key thread (`KeyRouter`, built on `autotune.keys.AbortKeys`): abort
keys are handled first, in the key thread, by whatever stop the current stage installed; other
keys go to a queue the screens read.

`BenchJob` runs start screen -> relay (autotune.job.tune.TuneRun) -> proposals -> confirmation
step (autotune.job.step.run_step on a fresh autotune.job.powered.PoweredRun) -> accept (gains
file) -> finish. The motor is stopped between stages: every powered stage is its own `with`
block, so its stop path runs before a screen waits for the operator.
"""

from __future__ import annotations

import contextlib
import io
import math
import queue
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from rich.console import Console, RenderableType
from rich.live import Live

from autotune.core.progress import RunSnapshot
from autotune.errors import EXIT_ABORTED, EXIT_FAILED, EXIT_OK, EXIT_USAGE, UserError
from autotune.keys import AbortKeys
from autotune.ui import plain, screens
from autotune.ui.operator import red_alarm
from autotune.ui.views import FinishView, ProposalRow, ProposalsView, StartView, StepView

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

    def snapshot(self, snap: RunSnapshot) -> None:
        """Runner callback: draw the live screen, or print what changed."""
        if self.live is not None:
            self.show(lambda w, h: screens.live_screen(snap, w, h), f"live-{snap.phase.value}",
                      wait=False)
        else:
            if self.captured is not None:
                self.captured[f"live-{snap.phase.value}"] = (
                    lambda w, h: screens.live_screen(snap, w, h))
            self.reporter.update(snap)


# ------------------------------------------------------------------------ the job


@dataclass
class JobSettings:
    """What a bench job needs besides the config.

    port: URL the runners open (a pty path for the demo's own simulated board); label: how the
    start screen names the port; out_dir: where session, result and gains files go; yes: run
    unattended (choose the default proposal, accept a passing step); speed: how many times
    faster than the wall clock the (simulated) device runs; max_steps: unattended attempts.
    """

    port: str
    out_dir: Path
    yes: bool = False
    label: str = ""
    simulated: bool = False
    speed: float = 1.0
    plant: str = "cart-wheel"
    seed: int | None = None
    device: str = ""  # how the start screen names the device before it is connected
    max_steps: int = 3
    settle_band: float | None = None  # settled-detection band of the step (fraction of the
    #                                   step size); None = the step test's default (2%)


class _ConfirmGate(io.TextIOBase):
    """Stands in for stdin in PoweredRun.confirm: shows the start screen and answers for the
    operator's key ('yes' only after Y). It claims to be a terminal only when an operator can
    answer or --yes was given; otherwise the runner refuses to power anything."""

    def __init__(self, job: BenchJob) -> None:
        self.job = job

    def isatty(self) -> bool:
        return self.job.settings.yes or self.job.term.keys_available

    def readline(self, size: int | None = -1) -> str:  # noqa: ARG002
        return "yes\n" if self.job.confirm_start() else "no\n"

    def confirm(self) -> bool:
        """RunOptions.confirm: the start screen's answer; refuses when nobody can answer."""
        if not self.isatty():
            raise UserError("refusing to power the motor without confirmation: no keys to "
                            "answer with; pass --yes once the cautions are met",
                            exit_code=EXIT_USAGE)
        return self.job.confirm_start()


@dataclass
class StepAttempt:
    """One confirmation step as run: the outcome, its directory, the view shown."""

    outcome: Any
    out_dir: Path
    view: StepView
    stop_confirmed: bool | None
    reason: str


@dataclass
class JobResult:
    """How the job ended."""

    exit_code: int
    message: str
    files: list[tuple[str, str]] = field(default_factory=list)
    gains: Any = None  # autotune.gainsfile.GainsRecord when accepted
    code: str = ""


class BenchJob:
    """The whole tuning job against one port, driven from the bench view."""

    def __init__(self, cfg: Any, settings: JobSettings, term: Terminal) -> None:
        self.cfg = cfg
        self.settings = settings
        self.term = term
        self.sink = io.StringIO()  # the runners' own prompts and lines (the screens show them)
        self.tune: Any = None
        self.tune_outcome: Any = None
        self.result: dict[str, Any] | None = None
        self.model: Any = None
        self.rows: list[ProposalRow] = []
        self.proposals: list[Any] = []  # design.Proposal objects when redesigned here
        self.selected = 0
        self.ms_target = float(cfg.design.ms_target)
        self.detune = 1.0
        self.attempts: list[StepAttempt] = []
        self.files: list[tuple[str, str]] = []
        self.info: Any = None
        self.loop_mode = "device"

    # ---------------------------------------------------------------- helpers
    def say(self, line: str) -> None:
        """Runner lines: printed in plain mode, kept in the session file either way."""
        self.term.line(line)

    def run_options(self, out_dir: Path, verb: str) -> Any:
        from autotune.job.powered import RunOptions

        st = self.settings
        gate = _ConfirmGate(self)
        return RunOptions(port=st.port, yes=False, out_dir=out_dir, plant=st.plant,
                          speed=st.speed, seed=st.seed, stdin=gate, stdout=self.sink,
                          verb=verb, keys=False, cautions_shown=True, confirm=gate.confirm,
                          alarm=red_alarm)

    def start_view(self) -> StartView:
        """The start screen's view. It comes before the port is opened (nothing is opened
        before the operator agrees), so the device is named by its port and the loop mode is
        the one asked for."""
        cfg = self.cfg
        s = cfg.safety
        loop = str(cfg.connection.loop)
        if loop == "auto":
            loop = "device if the board offers it, else host"
        limits = (
            ("output limit", f"±{s.output_limit:g}"),
            ("PV window", f"±{s.pv_window:g} around the start value"),
            ("PV rate", f"{s.pv_rate_limit:g}/s" if s.pv_rate_limit else "off"),
            ("run time", f"{s.max_duration:g} s"),
            ("sample gap", f"{s.max_sample_gap:g} s"),
            ("watchdog", f"{s.watchdog:g} s"),
        )
        r = cfg.relay
        plan = (
            ("target amplitude", f"{r.target_amplitude:g}"),
            ("start amplitude", f"{cfg.start_amplitude:g}"),
            ("max cycles", f"{r.max_cycles}"),
            ("max time", f"{r.max_time:g} s"),
        )
        return StartView(
            device=self.settings.device or "the board",
            port=self.settings.label or self.settings.port,
            axis=cfg.connection.axis,
            loop_mode=loop,
            limits=limits,
            plan=plan,
            simulated=self.settings.simulated,
            out_dir=str(self.settings.out_dir),
        )

    # ---------------------------------------------------------------- stage 1: start + relay
    def confirm_start(self) -> bool:
        """Called by the runner before it opens the port: the start screen and the operator's
        Y (or --yes). From a yes on, an abort key stops the run from the key thread."""
        run = self.tune.run if self.tune is not None else None
        view = self.start_view()
        term = self.term
        term.drain()  # keys typed before this screen was shown do not count
        term.show(lambda w, h: screens.start_screen(view, w, h), "start")
        if term.live is None:
            term.lines(plain.start_lines(view))
        if self.settings.yes:
            term.line("--yes given: starting without asking.")
        else:
            term.line("Press Y when every line above is true; a stop key leaves.")
            if term.wait_key(("y", "Y")) == ABORT:
                return False
        if run is not None:
            term.on_abort = lambda k: run.request_stop("aborted", f"abort key ({k}) pressed",
                                                       EXIT_ABORTED)
        return True

    def run_relay(self) -> int:
        from autotune.job.tune import TuneRun

        out_dir = self.settings.out_dir
        self.tune = TuneRun(self.cfg, self.run_options(out_dir, "demo"),
                            on_update=self.term.snapshot, say=self.say)
        try:
            self.tune_outcome = self.tune.execute()
        finally:
            self.term.on_abort = None
        o = self.tune_outcome
        run = self.tune.run
        if run is not None:
            self.info = run.info
            self.loop_mode = run.loop_mode
        if o.session_path is not None:
            self.files.append(("relay session", str(o.session_path)))
        if o.result_path is not None:
            self.files.append(("result", str(o.result_path)))
        self.result = o.result
        return o.exit_code

    # ---------------------------------------------------------------- stage 2: proposals
    def design_spec(self, ms_target: float | None = None) -> Any:
        from autotune.core.design import DesignSpec

        cfg = self.cfg
        tick = getattr(self.info, "tick", None) if self.info is not None else None
        return DesignSpec(
            ms_target=self.ms_target if ms_target is None else ms_target,
            max_overshoot=cfg.design.max_overshoot,
            max_settling_time=cfg.design.max_settling_time,
            step_size=self.step_size(),
            output_limit=cfg.safety.output_limit,
            ts=tick,
        )

    def step_size(self) -> float:
        from autotune.core.steptest import fit_step_to_window

        cfg = self.cfg
        size = cfg.step.size or cfg.design.step_size or cfg.relay.target_amplitude
        size, _ = fit_step_to_window(size, cfg.safety.pv_window)
        return float(size)

    def load_proposals(self) -> None:
        from autotune.core.steptest import model_from_dict

        res = self.result or {}
        self.rows = [ProposalRow.of(_DictProposal(p)) for p in res.get("proposals") or []]
        self.model = model_from_dict(res["model"]) if res.get("model") else None
        m = res.get("model") or {}
        if self.model is None and all(k in m for k in ("num", "den", "delay")):
            from autotune.core.lti import DelayedTF

            with contextlib.suppress(Exception):  # any kind that states its transfer function
                self.model = DelayedTF(tuple(m["num"]), tuple(m["den"]), float(m["delay"]))
        self.selected = next((i for i, r in enumerate(self.rows) if r.default), 0)

    def redesign(self) -> str:
        """Proposals again for the current Ms target (on the fitted model)."""
        from autotune.core.design import propose

        res = self.result or {}
        if self.model is None:
            return "no fitted model: the Ms target cannot change the proposals"
        try:
            props = propose(res.get("ultimate_gain"), res.get("ultimate_period"), self.model,
                            self.design_spec())
        except Exception as exc:  # noqa: BLE001 (report on the screen, keep the old table)
            return f"redesign failed: {exc}"
        name = self.rows[self.selected].name if self.rows else None
        self.proposals = props
        self.rows = [ProposalRow.of(p) for p in props]
        self.selected = next((i for i, r in enumerate(self.rows) if r.name == name), 0)
        return f"proposals redesigned for Ms ≤ {self.ms_target:.2f}"

    def proposals_view(self, message: str = "") -> ProposalsView:
        res = self.result or {}
        model = res.get("model") or {}
        params = " ".join(f"{screens.MODEL_PARAM_NAMES.get(k, k)} {v:.3g}"
                          for k, v in (model.get("params") or {}).items()
                          if isinstance(v, (int, float)))
        d = self.cfg.design
        spec = []
        if d.max_overshoot is not None:
            spec.append(f"overshoot ≤ {d.max_overshoot:g} %")
        if d.max_settling_time is not None:
            spec.append(f"settling ≤ {d.max_settling_time:g} s")
        return ProposalsView(
            rows=tuple(self.rows), selected=self.selected, ms_target=self.ms_target,
            detune=self.detune, ku=res.get("ultimate_gain"), tu=res.get("ultimate_period"),
            model=f"{str(model.get('kind', '')).replace('_', '+')} {params}".strip(),
            spec=", ".join(spec),
            message=message,
        )

    def choose(self) -> bool:
        """The proposals screen; True when the operator asked for a step."""
        term = self.term
        message = ""
        if not self.rows:
            return False
        if self.settings.yes or not term.keys_available:
            view = self.proposals_view()
            term.show(lambda w, h: screens.proposals_screen(view, w, h), "proposals")
            if term.live is None:
                term.lines(plain.proposals_lines(view))
            return True
        term.drain()
        while True:
            view = self.proposals_view(message)
            term.show(lambda w, h, v=view: screens.proposals_screen(v, w, h), "proposals")
            if term.live is None:
                term.lines(plain.proposals_lines(view))
                term.line("keys: 1-9/Tab/n/p choose, m/M Ms target, d/D detune, Enter step; "
                          "Space, Esc, q stop and leave")
            key = term.wait_key()
            message = ""
            if key == ABORT:
                return False
            if key.isdigit() and key != "0" and int(key) <= len(self.rows):
                self.selected = int(key) - 1
            elif key in ("\t", "n"):
                self.selected = (self.selected + 1) % len(self.rows)
            elif key == "p":
                self.selected = (self.selected - 1) % len(self.rows)
            elif key in ("m", "M"):
                new = round(self.ms_target + (0.05 if key == "M" else -0.05), 2)
                if 1.1 <= new <= 2.0:
                    self.ms_target = new
                    term.show(lambda w, h: screens.proposals_screen(
                        self.proposals_view("redesigning…"), w, h))
                    message = self.redesign()
                else:
                    message = "Ms target stays between 1.10 and 2.00"
            elif key in ("d", "D"):
                new = round(self.detune + (0.05 if key == "D" else -0.05), 2)
                if 0.2 <= new <= 1.0:
                    self.detune = new
                else:
                    message = "detune factor stays between 0.20 and 1.00"
            elif key in ENTER_KEYS or key == "s":
                return True

    def next_unattended(self) -> bool:
        """Unattended: move to the next untried proposal, those without spec violations first,
        then by predicted overshoot (lowest first). False when none is left."""
        tried = {a.view.name for a in self.attempts}
        order = sorted(
            (i for i, r in enumerate(self.rows) if r.name not in tried),
            key=lambda i: (bool(self.rows[i].violations),
                           self.rows[i].predicted.get("overshoot", math.inf)
                           if math.isfinite(self.rows[i].predicted.get("overshoot", math.inf))
                           else math.inf),
        )
        if not order:
            return False
        self.selected = order[0]
        self.detune = 1.0
        return True

    # ---------------------------------------------------------------- stage 3: the step
    def candidate(self) -> Any:
        """The chosen proposal, detuned, with its predicted figures (recomputed if detuned)."""
        from autotune.core.design import predict
        from autotune.core.pid import PidGains
        from autotune.core.steptest import StepCandidate

        row = self.rows[self.selected]
        gains = PidGains(row.kp, row.ki, row.kd)
        predicted = {k: v for k, v in row.predicted.items() if isinstance(v, (int, float))}
        name = row.name
        if self.detune != 1.0:
            gains = gains.scaled(self.detune)
            name = f"{row.name}×{self.detune:.2f}"
            if self.model is not None:
                with contextlib.suppress(Exception):
                    predicted = {k: v for k, v in predict(self.model, gains,
                                                          self.design_spec(),
                                                          row.setpoint_weight).items()
                                 if isinstance(v, (int, float)) and not isinstance(v, bool)}
        return StepCandidate(name, gains, predicted)

    def step_settings(self) -> Any:
        from autotune.core.steptest import StepPlan, StepSettings
        from autotune.core.verdict import StepSpec

        cfg = self.cfg
        row = self.rows[self.selected]
        settle = row.predicted.get("settling_time")
        min_record = 1.5 * settle if isinstance(settle, (int, float)) and math.isfinite(
            settle) else 0.0
        band = {} if self.settings.settle_band is None else {
            "settle_band": self.settings.settle_band}
        plan = StepPlan(size=self.step_size(), hold_time=cfg.step.settle_time,
                        timeout=max(cfg.step.duration, min_record), min_record=min_record,
                        **band)
        return StepSettings(plan=plan, loop=self.loop_mode, output_limit=cfg.safety.output_limit,
                            setpoint_weight=row.setpoint_weight,
                            spec=StepSpec(cfg.design.max_overshoot, cfg.design.max_settling_time,
                                          0.0))

    def run_one_step(self) -> StepAttempt:
        from autotune.job.powered import PoweredRun, RunEnded
        from autotune.job.step import StepEnded, run_step

        k = len(self.attempts) + 1
        out_dir = self.settings.out_dir / f"step-{k}"
        cand = self.candidate()
        settings = self.step_settings()
        opts = self.run_options(out_dir, "demo-step")
        opts.yes = True  # the operator confirmed at the start screen and asked for this step
        run = PoweredRun(self.cfg, opts, header_extra={"proposal": cand.name},
                         on_update=self.term.snapshot, say=self.say)
        outcome = None
        self.term.on_abort = lambda key: run.request_stop(
            "aborted", f"abort key ({key}) pressed", EXIT_ABORTED)
        try:
            with run:
                run.loop_mode = settings.loop
                run.arm({"loop_mode": settings.loop, "step": {"proposal": cand.name}})
                try:
                    outcome = run_step(run, cand, settings)
                except StepEnded as exc:
                    outcome = exc.outcome
                    raise exc.ended from None
                raise RunEnded("completed", "step done", EXIT_OK)
        finally:
            self.term.on_abort = None
        run.end_session()
        reason = run.outcome.reason
        confirmed = None if run.outcome.stop is None else run.outcome.stop.confirmed
        if run.writer is not None:
            self.files.append((f"step {k} session", str(run.writer.path)))
        view = self.step_view(outcome, cand, reason, run.outcome.message, confirmed)
        attempt = StepAttempt(outcome, out_dir, view, confirmed, reason)
        self.attempts.append(attempt)
        return attempt

    def step_view(self, outcome: Any, cand: Any, reason: str, message: str,
                  confirmed: bool | None) -> StepView:
        g = cand.gains
        if outcome is None:
            return StepView(cand.name, g.kp, g.ki, g.kd, (), (), (), (),
                            message=f"stopped before the step: {message}")
        seg = next((s for s in outcome.segments if str(s.phase.value) == "step"), None)
        t0 = seg.t_start if seg is not None else (outcome.t[0] if outcome.t else 0.0)
        t1 = seg.t_end if seg is not None else (outcome.t[-1] if outcome.t else t0)
        lead = min(0.5, 0.25 * max(t1 - t0, 0.0))  # a little of the hold before the step
        keep = [i for i, x in enumerate(outcome.t) if t0 - lead <= x <= t1 + 1e-9]
        t = tuple(outcome.t[i] - t0 for i in keep)

        def pick(a: list[float]) -> tuple[float, ...]:
            return tuple(a[i] for i in keep)

        pred_t, pred_y = self.predicted_response(outcome, cand, t1 - t0)
        note = ""
        verdict = outcome.verdict
        if reason not in ("completed",):
            # a step cut short proves nothing: figures shown, no verdict, nothing to accept
            verdict = None
            note = f"stopped: {message}" + (" (device confirmed zero output)" if confirmed
                                            else " (zero output NOT confirmed: cut power)")
        return StepView(cand.name, g.kp, g.ki, g.kd, t, pick(outcome.pv), pick(outcome.sp),
                        pick(outcome.out), pred_t, pred_y, tuple(outcome.rows), verdict,
                        detune=0.7, message=note)

    def predicted_response(self, outcome: Any, cand: Any, t_end: float
                           ) -> tuple[tuple[float, ...], tuple[float, ...]]:
        """The model's response to the same step, from the step instant (s, PV units)."""
        if self.model is None or t_end <= 0:
            return (), ()
        from autotune.core.closedloop import simulate_closed_loop
        from autotune.core.lti import DelayedTF

        try:
            plant = self.model
            ts = outcome.pid.ts
            if outcome.loop == "host":
                plant = DelayedTF(plant.num, plant.den, plant.delay + ts)
            run = simulate_closed_loop(plant, outcome.pid, t_end, outcome.plan.size)
        except Exception:  # noqa: BLE001 (the overlay is a help, not a must)
            return (), ()
        base = outcome.start_value
        return tuple(float(x) for x in run.t), tuple(float(y) + base for y in run.y)

    # ---------------------------------------------------------------- stage 4: verdict
    def decide(self, attempt: StepAttempt) -> str:
        """The step-result screen: 'accept', 'detune', 'other', 'repeat' or ABORT."""
        term = self.term
        v = attempt.view.verdict
        term.drain()  # the keys of the step run were handled there (abort) or do not count
        term.show(lambda w, h: screens.step_screen(attempt.view, w, h), "step")
        if term.live is None:
            term.lines(plain.step_lines(attempt.view))
        if self.settings.yes or not term.keys_available:
            if v is not None and v.passed:
                return "accept"
            if len(self.attempts) >= self.settings.max_steps:
                return ABORT
            return "other"  # unattended: the next proposal in line (see next_unattended)
        if term.live is None:
            term.line("keys: a accept, d detune, o other proposal, r repeat; Space, Esc, q leave")
        while True:
            key = term.wait_key(("a", "d", "o", "r"))
            if key == ABORT:
                return ABORT
            if key == "a" and v is None:
                continue  # nothing measured to accept
            return {"a": "accept", "d": "detune", "o": "other", "r": "repeat"}[key]

    def accept(self, attempt: StepAttempt) -> JobResult:
        """Write the gains file and add the step to result.json."""
        from autotune import __version__
        from autotune.gainsfile import GainsRecord, code_block, write_gains_file
        from autotune.recorder import read_result, write_result

        o = attempt.outcome
        info = self.info
        origin = {
            "session": str(self.tune_outcome.session_path or ""),
            "step_session": str(attempt.out_dir / "session.jsonl"),
            "proposal": self.rows[self.selected].name,
            "detuned_by": self.detune,
            "device": getattr(info, "device_name", ""),
            "firmware": getattr(info, "firmware", ""),
            "tool_version": __version__,
        }
        measured = {k: v for k, v in (o.metrics.as_dict() if o.metrics else {}).items()
                    if isinstance(v, float) and math.isfinite(v)}
        predicted = {k: v for k, v in o.candidate.predicted.items()
                     if isinstance(v, (int, float)) and not isinstance(v, bool)
                     and math.isfinite(v)}
        rec = GainsRecord.from_settings(o.pid, loop_mode=o.loop, axis=self.cfg.connection.axis,
                                        output_limit=self.cfg.safety.output_limit, origin=origin,
                                        measured=measured, predicted=predicted)
        path = write_gains_file(self.settings.out_dir / "gains.toml", rec)
        self.files.append(("gains", str(path)))
        rpath = self.tune_outcome.result_path
        if rpath is not None:
            with contextlib.suppress(Exception):
                res = read_result(rpath)
                res["step"] = o.step_field()
                write_result(rpath, res)
        return JobResult(EXIT_OK, f"gains accepted: {o.candidate.name}", list(self.files), rec,
                         code_block(rec))

    # ---------------------------------------------------------------- the whole job
    def run(self) -> JobResult:
        """Start -> relay -> proposals -> step(s) -> accept; every exit leaves the motor
        stopped (each powered stage ran its stop path)."""
        try:
            code = self.run_relay()
        except UserError as exc:
            return JobResult(exc.exit_code, str(exc), list(self.files))
        o = self.tune_outcome
        if code != EXIT_OK or not self.result or not self.result.get("proposals"):
            why = o.message or o.reason
            if o.stop_confirmed:
                why += "; the device confirmed zero output"
            return JobResult(code if code != EXIT_OK else EXIT_FAILED,
                             f"relay ended: {why}", list(self.files))
        self.load_proposals()
        while True:
            if not self.choose():
                return JobResult(EXIT_ABORTED, "left at the proposals; nothing more was powered",
                                 list(self.files))
            while True:
                attempt = self.run_one_step()
                action = self.decide(attempt)
                if action == "accept":
                    return self.accept(attempt)
                if action == ABORT:
                    why = ("no step met the spec" if self.settings.yes
                           else "left at the step result")
                    return JobResult(EXIT_ABORTED if not self.settings.yes else EXIT_FAILED,
                                     f"{why}; no gains written", list(self.files))
                if action == "detune":
                    self.detune = round(self.detune * 0.7, 3)
                    continue
                if action == "repeat":
                    continue
                if self.settings.yes or not self.term.keys_available:
                    if not self.next_unattended():
                        return JobResult(EXIT_FAILED, "no proposal passed the step; no gains "
                                         "written", list(self.files))
                    continue
                break  # other: back to the proposals


def finish_view(result: JobResult) -> FinishView:
    """The finish screen of a job."""
    gains: tuple[tuple[str, str], ...] = ()
    if result.gains is not None:
        g = result.gains.gains
        gains = (("kp", f"{g.kp:.6g}"), ("ki", f"{g.ki:.6g} /s"), ("kd", f"{g.kd:.6g} s"),
                 ("loop period", f"{result.gains.period:.6g} s"))
    return FinishView(result.exit_code == EXIT_OK, result.message, tuple(result.files), gains,
                      result.code)


class _DictProposal:
    """A result.json proposal entry read like a design.Proposal (for ProposalRow.of)."""

    def __init__(self, d: dict[str, Any]) -> None:
        from autotune.core.pid import PidGains

        self.name = str(d.get("name", "?"))
        self.gains = PidGains(float(d.get("kp", 0.0)), float(d.get("ki", 0.0)),
                              float(d.get("kd", 0.0)))
        self.predicted = {k: float(v) for k, v in (d.get("predicted") or {}).items()
                          if isinstance(v, (int, float)) and not isinstance(v, bool)}
        self.violations = list(d.get("violations") or [])
        self.default = bool(d.get("default", False))
        b = d.get("setpoint_weight", 1.0)
        self.setpoint_weight = float(b) if isinstance(b, (int, float)) else 1.0


def run_job(cfg: Any, settings: JobSettings, console: Console | None = None,
            stdin: Any = None, term: Terminal | None = None) -> JobResult:
    """Run a bench job on the terminal (or in plain lines), print the finish screen and
    return how it ended (`exit_code`, one-line `message`)."""
    term = term or Terminal(console, stdin)
    job = BenchJob(cfg, settings, term)
    with term:
        try:
            result = job.run()
        except KeyboardInterrupt:
            result = JobResult(EXIT_ABORTED, "interrupted", list(job.files))
    view = finish_view(result)
    if term.captured is not None:
        term.captured["finish"] = lambda w, h: screens.finish_screen(view, w)
    if term.rich:
        last = job.attempts[-1].view if job.attempts else None
        if last is not None and result.exit_code == EXIT_OK:
            term.console.print(screens.step_screen(last, *term.size()))
        term.console.print(screens.finish_screen(view, term.size()[0]))
    else:
        term.lines(plain.finish_lines(view))
    return result


__all__ = ["ABORT", "BenchJob", "JobResult", "JobSettings", "KeyRouter", "Terminal",
           "finish_view", "run_job"]
