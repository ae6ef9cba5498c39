"""The one orchestration of the tuning job, for every front end.

    connect (handshake: nothing powered) -> start screen and the operator's confirmation
    -> arm (limits loaded and read back) -> prechecks -> relay -> analysis -> proposals
    -> confirmation step(s) -> accept (gains files, optionally stored on the board)

`tune`, `demo` and the full screen run all of it; `step` starts at the confirmation step with the
gains it was given. The job talks to the operator only through autotune.job.operator.Operator,
and to the board only through one PoweredRun (one connection, one session file, one stop path
that runs on every exit).

Between stages: unattended (`--yes`) the stages follow each other without a drop in the output:
the relay ends at its balanced bias, the analysis runs while that bias holds, and the PID takes
over with its integral preset to it (a loaded axis does not fall). Whenever the operator is
asked something the motor is stopped first and the operator is told so ("the motor is
unpowered"); the next stage re-arms from where the PV is, after the same deliberate
confirmation as the first start.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import sys
import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import scipy

from autotune import __version__
from autotune.core.closedloop import simulate_closed_loop
from autotune.core.conditions import condition_of_result
from autotune.core.design import (
    Condition,
    DesignSpec,
    Proposal,
    design_limits,
    design_proposals,
    detune_design,
    spec_from_config,
    spec_text,
)
from autotune.core.lti import DelayedTF
from autotune.core.progress import Phase, RunSnapshot
from autotune.core.steptest import (
    StepCandidate,
    StepOutcome,
    check_setpoints,
    model_from_dict,
    predict_step,
    settings_from_config,
)
from autotune.core.verdict import NOT_JUDGED
from autotune.core.verdict import spec_from_config as step_spec
from autotune.errors import (
    EXIT_ABORTED,
    EXIT_FAILED,
    EXIT_OK,
    EXIT_USAGE,
    UserError,
)
from autotune.gainsfile import code_block, record_from_outcome, write_gains_file
from autotune.job import signals
from autotune.job.operator import (
    Decision,
    GainsMenu,
    JobSummary,
    MenuAnswer,
    Operator,
    StartInfo,
    StepReport,
    model_words,
)
from autotune.job.powered import PoweredRun, RunEnded, RunOptions, plain_alarm
from autotune.job.requests import BoardRequest, GainsChoice, JobRequest
from autotune.job.step import StepEnded, run_step
from autotune.job.tune import TuneRun, choose_loop
from autotune.recorder import (
    check_out_dir,
    check_target,
    export_csv,
    read_session,
    write_result,
)
from protocol.budget import check_loop_budget
from protocol.messages import StoreGains

HOLD_SWITCH_INTERVAL = 0.0005  # s, interpreter switch interval while computing under power
HOLD_RESULT_WAIT = 30.0  # s of wall clock an analysis cut short by a stop may still take

RECOVERABLE = ("aborted", "limit:", "fault:pv_window", "fault:pv_rate", "fault:output_limit")
"""End reasons of a step after which the operator may go on (the motor confirmed stopped)."""


@dataclass
class JobOutcome:
    """How a job ended: exit code, a reason and one line, the result dict (None when the run
    stopped before anything was measured), the files written, the step outcomes in order."""

    exit_code: int
    reason: str
    message: str
    result: dict[str, Any] | None = None
    session_path: Path | None = None
    result_path: Path | None = None
    gains_path: Path | None = None
    stop_confirmed: bool | None = None
    steps: list[StepOutcome] = field(default_factory=list)
    stages: TuneRun | None = None
    files: list[tuple[str, str]] = field(default_factory=list)


class Quiet:
    """An operator with nobody to ask (tests, benches, scripts): shows nothing, answers
    nothing; `say` and `update` go to the callables given."""

    can_ask = False

    def __init__(self, say: Callable[[str], None] | None = None,
                 update: Callable[[RunSnapshot], None] | None = None) -> None:
        self._say = say
        self._update = update

    def show_start(self, info: StartInfo) -> None:
        pass

    def confirm_power(self, action: str) -> bool:
        return False

    def update(self, snap: RunSnapshot) -> None:
        if self._update is not None:
            self._update(snap)

    def say(self, line: str) -> None:
        if self._say is not None:
            self._say(line)

    def alarm(self, text: str) -> None:
        plain_alarm(text)  # an alarm must reach somebody even with nobody to ask

    def watch_abort(self, stop: Callable[[str], None] | None) -> None:
        pass

    def choose_gains(self, menu: GainsMenu) -> MenuAnswer:
        return MenuAnswer(None)

    def show_gains(self, menu: GainsMenu) -> None:
        pass

    def show_step(self, report: StepReport) -> None:
        pass

    def after_step(self, report: StepReport, offer: Sequence[Decision]) -> Decision:
        return Decision.LEAVE

    def finish(self, summary: JobSummary) -> None:
        pass


class _Leave(Exception):  # noqa: N818 (control flow: the operator ends the job)
    def __init__(self, message: str, exit_code: int = EXIT_OK) -> None:
        super().__init__(message)
        self.message = message
        self.exit_code = exit_code


class TuningJob:
    """One job (see the module docstring). `run()` returns a JobOutcome and never leaves the
    motor powered; analyse=False skips the model fit and design (relay figures only);
    connection: an open connection to the board to use and leave open (a plan's loops share
    one, autotune.job.plan); None opens the request's port."""

    def __init__(self, request: JobRequest, operator: Operator, *, analyse: bool = True,
                 connection: Any = None) -> None:
        self.req = request
        self.connection = connection
        self.cfg = request.cfg
        self.op = operator
        self.analyse = analyse
        self.run_: PoweredRun | None = None
        self.stages: TuneRun | None = None
        self.result: dict[str, Any] | None = None
        self.proposals: tuple[Mapping[str, Any], ...] = tuple(request.proposals)
        self.model_dict: Mapping[str, Any] | None = request.model
        self.ms_target = float(self.cfg.design.ms_target)
        self.steps: list[StepOutcome] = []
        self.reports: list[StepReport] = []
        self.accepted: StepOutcome | None = None
        self.gains_record: Any = None
        self.gains_path: Path | None = None
        self.files: list[tuple[str, str]] = []
        self.exit_code = EXIT_FAILED
        self.reason = "unknown"
        self.message = ""
        self.notes: list[str] = []
        self.result_path: Path | None = None
        self.bias = float(self.cfg.relay.bias)  # output units the loop holds at its start value

    # ================================================================== entry point
    def run(self) -> JobOutcome:
        warm_up()
        req = self.req
        # before anything is asked or connected: where the files go can take them
        check_out_dir(req.out_dir, ("session.jsonl", "result.json", "gains.toml", "gains.h"))
        check_target(req.gains_path)
        opts = RunOptions(port=req.board.port, yes=req.yes, out_dir=req.out_dir,
                          plant=req.board.plant, speed=req.board.speed, faults=req.board.faults,
                          seed=req.board.seed, verb=req.verb, keys=False, cautions_shown=True,
                          confirm=self._confirm_start, alarm=self.op.alarm,
                          connection=self.connection)
        header: dict[str, Any] = {"job": {"verb": req.verb, "relay": req.relay,
                                          "confirm_step": req.confirm_step}}
        if req.gains is not None:
            g = req.gains.gains
            header["step_request"] = {"proposal": req.gains.name, "kp": g.kp, "ki": g.ki,
                                      "kd": g.kd, "source": str(req.result_source or "")}
        run = PoweredRun(self.cfg, opts, header_extra=header, on_update=self.op.update,
                         say=self.op.say)
        self.run_ = run
        try:
            try:
                with run:
                    self._powered(run)
            except UserError as exc:
                self._set("error", str(exc), exc.exit_code)
                stop = run.outcome.stop
                if stop is not None and not stop.confirmed:
                    raise UserError(f"{exc}; {run.alarm}", exit_code=run.outcome.exit_code) \
                        from exc
                raise
            except signals.Interrupted:
                self._set("aborted", "interrupted by a signal", EXIT_ABORTED)
                raise  # the command line says which signal and what was kept
            except KeyboardInterrupt:
                self._set("aborted", "interrupted", EXIT_ABORTED)
            self._settle(run)
        finally:
            self._write_files(run)
            self._finish()
        return JobOutcome(self.exit_code, self.reason, self.message, self.result,
                          run.writer.path if run.writer is not None else None,
                          self.result_path, self.gains_path,
                          None if run.outcome.stop is None else run.outcome.stop.confirmed,
                          list(self.steps), self.stages, list(self.files))

    # ================================================================== connect + start
    def _confirm_start(self, info: Any) -> bool:
        """After the handshake, before anything is powered: the start screen, then --yes or the
        operator's deliberate confirmation."""
        start = self._start_info(info)
        ok, budget = check_loop_budget(float(info.tick), float(self.cfg.connection.baudrate),
                                       start.loop_mode)
        if not ok:
            raise UserError(budget, exit_code=EXIT_USAGE)
        self.op.show_start(start)
        self.op.say(budget)
        if self.req.yes:
            self.op.say("--yes given: going ahead without asking.")
            return True
        if not self.op.can_ask:
            raise UserError("refusing to power the motor without confirmation: stdin is not a "
                            "terminal; run it from a terminal, or pass --yes once the cautions "
                            "above are met", exit_code=EXIT_USAGE)
        with signals.diverted(_interrupt):  # a signal at the prompt ends the job
            return self.op.confirm_power(start.action)

    def _start_info(self, info: Any) -> StartInfo:
        cfg, req = self.cfg, self.req
        s, r = cfg.safety, cfg.relay
        limits = (
            ("output limit", f"±{s.output_limit:g} output units"),
            ("PV window", f"±{s.pv_window:g} PV units around the start value"),
            ("PV rate", f"{s.pv_rate_limit:g} PV units/s" if s.pv_rate_limit else "off"),
            ("powered time", f"{s.max_duration:g} s"),
            ("sample gap", f"{s.max_sample_gap:g} s"),
            ("watchdog", f"{s.watchdog:g} s"),
        )
        if req.relay:
            plan: tuple[tuple[str, str], ...] = (
                ("target amplitude", f"{r.target_amplitude:g} PV units"),
                ("start amplitude", f"{cfg.start_amplitude:g} output units"),
                ("max cycles", f"{r.max_cycles}"),
                ("max time", f"{r.max_time:g} s"),
            )
            action = "start the prechecks and the relay experiment (powers the motor)"
        else:
            g = req.gains
            assert g is not None
            plan = (("gains", f"{g.name}: kp {g.gains.kp:.4g}, ki {g.gains.ki:.4g} /s, "
                              f"kd {g.gains.kd:.4g} s"),)
            action = f"run the confirmation step with {g.name} (powers the motor)"
        loop = self._loop_mode(info) if info is not None else str(cfg.connection.loop)
        facts = () if info is None else (("tick", f"{info.tick * 1000:g} ms"), (
            "largest output", f"±{info.max_output:g} output units"))
        return StartInfo(device=getattr(info, "device_name", "") or "unnamed board",
                         port=str(getattr(self.run_, "url", "") or req.board.port),
                         axis=cfg.connection.axis, loop_mode=loop, limits=limits, plan=plan,
                         simulated=req.board.simulated, out_dir=str(req.out_dir),
                         action=action, firmware=getattr(info, "firmware", "") or "",
                         facts=facts, stages=req.stages())

    def _loop_mode(self, info: Any) -> str:
        cfg = self.cfg
        if self.req.relay:
            return choose_loop(cfg.connection.loop, info.has_device_relay, info.has_host_loop,
                               cfg.connection.sign)
        loop = cfg.connection.loop
        if loop == "auto":
            return "device" if info.has_device_pid and cfg.connection.sign == 1 else "host"
        if loop == "device" and not info.has_device_pid:
            raise UserError("the board does not offer a device PID: use --loop host",
                            exit_code=EXIT_USAGE)
        if loop == "host" and not info.has_host_loop:
            raise UserError("the board does not offer host-loop control: use --loop device",
                            exit_code=EXIT_USAGE)
        return loop

    # ================================================================== the powered part
    def _powered(self, run: PoweredRun) -> None:
        run.loop_mode = self._loop_mode(run.info)
        run.arm({"loop_mode": run.loop_mode})
        run.event("loop_mode", run.loop_mode)
        self._watch(run)
        try:
            if self.req.relay:
                choice = self._identify(run)
            else:
                assert self.req.gains is not None
                choice = self.req.gains
            self._attempts(run, choice)
        except _Leave as leave:
            self._set("left", leave.message, leave.exit_code)
        finally:
            self.op.watch_abort(None)

    def _watch(self, run: PoweredRun) -> None:
        self.op.watch_abort(lambda key: run.request_stop(
            "aborted", f"abort key ({key}) pressed", EXIT_ABORTED))

    def _set(self, reason: str, message: str, exit_code: int) -> None:
        self.reason, self.message, self.exit_code = reason, message, exit_code

    # ------------------------------------------------------------------ identification
    def _identify(self, run: PoweredRun) -> GainsChoice:
        """Prechecks, relay, analysis, proposals; the gains to try first. Raises RunEnded when
        the job ends here (the relay did not converge, no proposals, no step wanted)."""
        stages = TuneRun(self.cfg, analyse=self.analyse)
        self.stages = stages
        stages.prechecks(run)
        end = stages.relay(run)
        self.bias = end.bias
        if not (end.reason == "converged" and self.analyse and self.req.confirm_step):
            # nothing follows under power: the stop path first, the analysis after it
            # (_write_files)
            raise RunEnded(end.reason, end.message, end.exit_code, end.t)
        if self.req.yes:
            # the step follows without a drop: the relay's balanced bias holds meanwhile
            control = stages.hold(run, end)
            run.set_phase(Phase.ANALYSIS, "analysing the recorded cycles; the loop holds at "
                          f"the relay centre from the output {end.bias:.4g}")
            self.result = self._hold_while(run, lambda: stages.analyse(run, end.reason,
                                                                       end.message), control)
        else:
            self._halt(run, "the relay is done")  # the operator will be asked
            run.set_phase(Phase.ANALYSIS, "analysing the recorded cycles (motor unpowered)")
            self.result = stages.analyse(run, end.reason, end.message)
        self._write_result()  # kept whatever happens next
        self.proposals = tuple(p for p in self.result.get("proposals") or ()
                               if isinstance(p, Mapping))
        self.model_dict = self.result.get("model") if isinstance(self.result.get("model"),
                                                                 Mapping) else None
        if not self.proposals:
            raise RunEnded("converged", f"{end.message}; no gains could be proposed (see the "
                           "notes in result.json)", EXIT_FAILED, end.t)
        run.set_phase(Phase.PROPOSALS, f"{len(self.proposals)} proposals")
        if self.req.yes:
            self.op.show_gains(self._menu(self._default_index() or 0))
            return self._unattended_first()
        i = self._default_index()
        return self._choose(run, 0 if i is None else i, "" if i is not None else
                            "no default: no design is safe on the model (see the notes)")

    def _hold_while(self, run: PoweredRun, work: Callable[[], Any],
                    control: Callable[[Any], float] | None = None) -> Any:
        """Run `work` (pure computation) in a worker thread while every sample is still read,
        recorded and checked here (and, host loop, answered with `control(sample)`); its
        result."""
        # the computation holds the interpreter lock for long stretches: a short switch
        # interval hands it to the sample loop and the heartbeat within a millisecond
        old = sys.getswitchinterval()
        sys.setswitchinterval(min(old, HOLD_SWITCH_INTERVAL))
        pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="analysis")
        fut = pool.submit(work)
        try:
            while not fut.done():
                rec = run.next_sample(publish=control is None)
                if control is not None:
                    run.set_output(control(rec))
                    run.publish()
            return fut.result()
        except RunEnded:
            # the stop went out at once (request_stop); keep what is being computed
            with contextlib.suppress(Exception):
                self.result = fut.result(timeout=HOLD_RESULT_WAIT)
            raise
        finally:
            pool.shutdown(wait=False)
            sys.setswitchinterval(old)

    # ------------------------------------------------------------------ choosing gains
    def _default_index(self) -> int | None:
        """The design's default proposal (None: no design is safe on the model)."""
        return next((i for i, p in enumerate(self.proposals) if p.get("default")), None)

    def _unattended_first(self) -> GainsChoice:
        """--yes: the default proposal; refused when there is none or it is not runnable."""
        i = self._default_index()
        if i is None:
            notes = [n for n in (self.result or {}).get("notes") or () if isinstance(n, str)]
            why = notes[-1] if notes else "no design is safe on the identified model"
            raise RunEnded("step:no_default", f"no default proposal: {why}; no step was run",
                           EXIT_FAILED)
        prop = self.proposals[i]
        choice = GainsChoice.of_proposal(prop, self.cfg.step.deriv_filter_n)
        if not choice.runnable and not self.req.force:
            raise RunEnded("step:not_runnable", f"the default proposal {choice.name} is not "
                           f"runnable ({choice.why_not}); no step was run (--force overrides)",
                           EXIT_FAILED)
        return choice

    def _menu(self, selected: int, message: str = "") -> GainsMenu:
        res = self.result or {}
        model = res.get("model") if isinstance(res.get("model"), Mapping) else (
            self.model_dict or {})
        return GainsMenu(
            proposals=self.proposals, selected=selected,
            ku=res.get("ultimate_gain"), tu=res.get("ultimate_period"),
            model=model_words(model),
            spec=spec_text(self._design_spec()), ms_target=self.ms_target, message=message,
            redesign=self._redesign if self._plant() is not None else None)

    def _choose(self, run: PoweredRun, selected: int, message: str = "") -> GainsChoice:
        """The gains menu until the operator picks runnable gains and confirms; _Leave when
        they leave. The motor is unpowered meanwhile."""
        while True:
            with self._waiting():
                ans = self.op.choose_gains(self._menu(selected, message))
            if ans.proposals:  # redesigned on the screen: result.json follows at once
                self.proposals, self.ms_target = tuple(ans.proposals), ans.ms_target
                if self.result is not None:
                    self.result["proposals"] = [dict(p) for p in self.proposals]
                    self.result["design_ms_target"] = self.ms_target
                    self._write_result()
            if ans.index is None:
                if not self.reports:
                    raise _Leave(self._leave_text())
                aborted = self.reports[-1].reason == "aborted"
                raise _Leave("left at the gains menu; no gains written",
                             EXIT_ABORTED if aborted else EXIT_FAILED)
            selected = ans.index
            choice = GainsChoice.of_proposal(self.proposals[selected],
                                             self.cfg.step.deriv_filter_n)
            if not choice.runnable and not self.req.force:
                message = (f"{choice.name} is not runnable: {choice.why_not}; choose another "
                           "(or start again with --force)")
                continue
            if self._confirm(choice):
                return choice
            message = "not confirmed: nothing was powered"

    def _confirm(self, choice: GainsChoice, what: str = "run the confirmation step with") -> bool:
        """The deliberate confirmation before a step powers the motor."""
        pred = choice.predicted
        extra = []
        for key, unit in (("overshoot", "%"), ("settling_time", "s"), ("ms", "")):
            v = pred.get(key)
            if isinstance(v, int | float) and math.isfinite(v):
                extra.append(f"{key.replace('_', ' ')} {v:.3g}{(' ' + unit) if unit else ''}")
        warn = "" if choice.runnable else f" ({choice.why_not.upper()}: forced)"
        text = (f"{what} {choice.name}{warn}: kp {choice.gains.kp:.4g}, ki {choice.gains.ki:.4g}"
                f" /s, kd {choice.gains.kd:.4g} s" + (f"; predicted {', '.join(extra)}"
                                                     if extra else "")
                + " (powers the motor)")
        with self._waiting():
            return self.op.confirm_power(text)

    def _leave_text(self) -> str:
        src = self.result_path or (self.req.out_dir / "result.json")
        return ("left before the confirmation step; try the gains later with `autotune step "
                f"--from-result {src}`") if self.req.relay else "left; nothing more was powered"

    def _redesign(self, ms_target: float) -> tuple[tuple[Mapping[str, Any], ...], str]:
        """Every proposal again for another Ms target, on the fitted model and the measured
        points."""
        conds = self._conditions()
        if not conds:
            return self.proposals, "no fitted model: the Ms target cannot change the proposals"
        try:
            res = design_proposals(conds, replace(self._design_spec(), ms_target=ms_target))
        except (ValueError, ArithmeticError) as exc:
            return self.proposals, f"the design failed for Ms ≤ {ms_target:.2f}: {exc}"
        note = "" if res.default else f"; {res.note}"
        return (tuple(p.as_dict() for p in res.proposals),
                f"proposals designed for Ms ≤ {ms_target:.2f}{note}")

    def _design_spec(self) -> DesignSpec:
        cfg = self.cfg
        run = self.run_
        tick = float(run.info.tick) if run is not None and run.info is not None else None
        return replace(spec_from_config(design_limits(dataclasses.asdict(cfg.design),
                                                      dataclasses.asdict(cfg.spec)),
                                        cfg.safety.output_limit, cfg.relay.target_amplitude,
                                        tick),
                       ms_target=self.ms_target, step_size=self._step_size(),
                       dead_zone=self._dead_zone())

    def _plant(self) -> DelayedTF | None:
        m = self.model_dict
        if not m:
            return None
        plant = model_from_dict(dict(m))
        if plant is None and all(k in m for k in ("num", "den", "delay")):
            with contextlib.suppress(TypeError, ValueError):
                plant = DelayedTF(tuple(m["num"]), tuple(m["den"]), float(m["delay"]))
        return plant

    def _dead_zone(self) -> float:
        """The actuator's dead zone the identification took out (output units; 0: none)."""
        dz = (self.result or {}).get("dead_zone")
        return float(dz) if isinstance(dz, int | float) and dz > 0 else 0.0

    def _conditions(self) -> list[Condition]:
        """The design's view of the identified loop (model, ultimate point, measured points);
        empty without a model."""
        plant = self._plant()
        if plant is None:
            return []
        res = dict(self.result or {})
        res["model"] = {"num": list(plant.num), "den": list(plant.den), "delay": plant.delay}
        try:
            return [condition_of_result("session", res)]
        except (ValueError, TypeError, KeyError):
            return [Condition("session", plant)]

    def _detuned(self, choice: GainsChoice) -> GainsChoice | None:
        """A gentler design than `choice` (autotune.core.design.detune_design: the robust
        optimum at the next lower Ms target, or without the derivative), with its predicted
        figures; None when there is no model or nothing gentler."""
        conds = self._conditions()
        if not conds:
            return None
        g = choice.gains
        current = Proposal.from_dict({"name": choice.name, "kp": g.kp, "ki": g.ki, "kd": g.kd,
                                      "predicted": dict(choice.predicted),
                                      "setpoint_weight": choice.setpoint_weight})
        try:
            p = detune_design(conds, current, self._design_spec())
        except (ValueError, ArithmeticError):
            return None
        if p is None:
            return None
        new = GainsChoice.of_proposal(p.as_dict(), choice.deriv_filter_n)
        return new if new.runnable else None

    # ------------------------------------------------------------------ the steps
    def _step_size(self) -> float:
        cfg = self.cfg
        for v in (cfg.step.size, cfg.design.step_size, cfg.relay.target_amplitude):
            if v is not None:
                return float(v)
        return 1.0  # pragma: no cover (target_amplitude always has a value)

    def _attempts(self, run: PoweredRun, choice: GainsChoice) -> None:
        """Confirmation steps until the operator accepts or leaves (or, unattended, until one
        meets the spec or cfg.step.retries gentler designs missed it)."""
        tries = 0
        while True:
            tries += 1
            report, ended = self._one_step(run, choice, tries)
            outcome = report.outcome
            if ended is not None and not ended.reason.startswith(RECOVERABLE):
                raise ended
            if self.req.yes:
                self.op.show_step(report)
                if ended is not None:
                    raise ended
                v = outcome.verdict if outcome is not None else None
                if v is not None and v.passed:
                    self._accept(run, outcome, choice)
                    return
                why = v.reason if v is not None else "no figures"
                if v is not None and v.status == NOT_JUDGED:
                    # gentler gains cannot help what the step could not show
                    raise RunEnded("step:not_judged", f"the step with {choice.name} could not "
                                   f"be judged ({why}); no gains written: give the step more "
                                   "room (safety.pv_window, step.size) or a quieter PV",
                                   EXIT_FAILED)
                nxt = self._detuned(choice) if tries <= self.cfg.step.retries else None
                if nxt is None:
                    raise RunEnded("step:not_met", f"the step with {choice.name} misses the "
                                   f"spec ({why}); no gains written", EXIT_FAILED)
                run.say(f"the step with {choice.name} misses the spec ({why}); trying the "
                        f"gentler {nxt.name}")
                choice = nxt
                continue
            self._halt(run, "the step is done" if ended is None else ended.message)
            choice = self._decide(run, report, choice)
            if choice is None:
                return

    def _decide(self, run: PoweredRun, report: StepReport, choice: GainsChoice
                ) -> GainsChoice | None:
        """The step-result menu (motor unpowered): the next gains to run (confirmed), or None
        once accepted; _Leave when the operator leaves."""
        while True:
            detuned = self._detuned(choice)
            offer = [d for d, ok in ((Decision.ACCEPT, report.can_accept),
                                     (Decision.DETUNE, detuned is not None),
                                     (Decision.OTHER, bool(self.proposals)),
                                     (Decision.REPEAT, True), (Decision.LEAVE, True)) if ok]
            report = replace(report, detune_hint="" if detuned is None else
                             f"{detuned.name}: kp {detuned.gains.kp:.4g}, ki "
                             f"{detuned.gains.ki:.4g} /s, kd {detuned.gains.kd:.4g} s")
            with self._waiting():
                decision = self.op.after_step(report, offer)
            if decision is Decision.ACCEPT and report.can_accept:
                self._accept(run, report.outcome, choice)
                return None
            if decision is Decision.LEAVE:
                raise _Leave("left at the step result; no gains written",
                             EXIT_ABORTED if report.reason == "aborted" else EXIT_FAILED)
            if decision is Decision.OTHER:
                idx = next((i for i, p in enumerate(self.proposals)
                            if p.get("name") == choice.name), self._default_index() or 0)
                return self._choose(run, idx)
            nxt = detuned if decision is Decision.DETUNE and detuned is not None else choice
            verb = ("run the gentler design" if nxt is detuned else "repeat the step with")
            if self._confirm(nxt, verb):
                return nxt

    def _halt(self, run: PoweredRun, why: str) -> None:
        """Stop the motor before the operator is asked anything, and say so."""
        run.set_phase(Phase.WAITING, f"{why}; the motor is unpowered: a loaded axis will move")
        run.halt(why)
        self.op.say("the motor is unpowered: a loaded axis will move")

    def _step_direction(self, run: PoweredRun) -> float:
        """The setpoint step (PV units): the configured size, taken downwards when the PV
        stands where a step up would leave the PV window loaded in the board and a step down
        fits (the axis need not come back to where the run started first)."""
        size = self._step_size()
        lim = run.limits_readback
        if lim is None or run.last_sample is None:
            return size
        pv = float(run.last_sample.pv)
        over = step_spec(self.cfg).max_overshoot or 0.0
        up = check_setpoints(pv, size, lim["pv_low"], lim["pv_high"], over)
        down = check_setpoints(pv, -size, lim["pv_low"], lim["pv_high"], over)
        if up is not None and down is None:
            run.say(f"stepping by {-size:+g} PV units: from {pv:.4g} a step of {size:+g} "
                    "would leave the PV window")
            return -size
        return size

    def _one_step(self, run: PoweredRun, choice: GainsChoice, attempt: int
                  ) -> tuple[StepReport, RunEnded | None]:
        """One confirmation step (re-arming first when the motor was stopped)."""
        if not run.armed:
            run.rearm()
            self._watch(run)
        cfg = self.cfg
        ts = float(run.info.tick)
        pred = dict(choice.predicted)
        cand = StepCandidate(choice.name, choice.gains, pred)
        res = self.result or {}
        tu = res.get("ultimate_period") if isinstance(res.get("ultimate_period"), float) \
            else None
        elapsed = 0.0
        if run.last_sample is not None and run.t_start is not None:
            elapsed = max(0.0, run.last_sample.t - run.t_start)
        settings, note = settings_from_config(
            cfg, run.loop_mode, size=self._step_direction(run), load_offset=cfg.step.load_offset,
            deriv_filter_n=choice.deriv_filter_n, setpoint_weight=choice.setpoint_weight,
            tracking_time=choice.tracking_time, candidate=cand, ts=ts, tu=tu,
            rest=self.stages.rest if self.stages is not None else None,
            # the PID takes over at the output the relay balanced (a loaded axis holds)
            bias=self.bias, model=self._plant(), elapsed=elapsed,
            fixed_size=cfg.step.size is not None, dead_zone=self._dead_zone())
        settings = replace(settings, ts=ts)
        plan = settings.plan
        if note:
            run.say(note)
        if not pred:
            cand = StepCandidate(choice.name, choice.gains,
                                 self._predict(choice, settings, run.loop_mode))
        g = choice.gains
        run.say(f"step {plan.size:+.4g} PV units with {choice.name}: kp {g.kp:.4g}, ki {g.ki:.4g}"
                f" /s, kd {g.kd:.4g} s, b {choice.setpoint_weight:.3g} ({run.loop_mode} loop)")
        ended: RunEnded | None = None
        outcome: StepOutcome | None
        try:
            outcome = run_step(run, cand, settings)
        except StepEnded as exc:
            outcome = exc.outcome
            assert isinstance(exc.ended, RunEnded)
            ended = exc.ended
        if outcome is not None:
            self.steps.append(outcome)
            if outcome.rest_output is not None:
                self.bias = float(outcome.rest_output)  # what held the PV at rest
        pred_t, pred_y = self._predicted_response(outcome)
        judged = ended is None and outcome is not None and outcome.verdict is not None
        report = StepReport(
            outcome=outcome, name=choice.name, kp=g.kp, ki=g.ki, kd=g.kd,
            reason="completed" if ended is None else ended.reason,
            message="" if ended is None else ended.message, stop_confirmed=None,
            pred_t=pred_t, pred_y=pred_y, can_accept=judged, attempt=attempt)
        self.reports.append(report)
        if self.result is not None or not self.req.relay:
            self._write_result()
        return report, ended

    def _predict(self, choice: GainsChoice, settings: Any, loop: str) -> dict[str, Any]:
        """Predicted figures for gains the design did not predict (hand-given), from the
        model of a tune result when there is one."""
        plant = self._plant()
        if plant is None:
            return {}
        try:
            pid = settings.pid_settings(choice.gains, settings.ts)
            return predict_step(plant, pid, settings.plan.size, settings.plan.timeout,
                                extra_ticks=1 if loop == "host" else 0,
                                dead_zone=self._dead_zone())
        except (ValueError, ArithmeticError):
            return {}

    def _predicted_response(self, outcome: StepOutcome | None
                            ) -> tuple[tuple[float, ...], tuple[float, ...]]:
        """The model's response to the step that ran (s from the step, PV units)."""
        plant = self._plant()
        if plant is None or outcome is None or not outcome.t:
            return (), ()
        seg = next((s for s in outcome.segments if str(s.phase.value) == "step"), None)
        t_end = (seg.t_end - seg.t_start) if seg is not None else 0.0
        if t_end <= 0:
            return (), ()
        try:
            if outcome.loop == "host":
                plant = DelayedTF(plant.num, plant.den, plant.delay + outcome.pid.ts)
            pid = replace(outcome.pid, bias=0.0)  # in deviation from the operating point
            sim = simulate_closed_loop(plant, pid, t_end, outcome.plan.size,
                                       dead_zone=self._dead_zone(),
                                       operating_output=float(outcome.pid.bias))
        except (ValueError, ArithmeticError):
            return (), ()
        base = outcome.start_value
        return (tuple(float(x) for x in sim.t), tuple(float(y) + base for y in sim.y))

    # ------------------------------------------------------------------ accept
    def _accept(self, run: PoweredRun, outcome: StepOutcome, choice: GainsChoice) -> None:
        """Write the gains file (and its code block), store the gains on the board if asked."""
        info = run.info
        device = {"name": info.device_name, "firmware": info.firmware,
                  "axis": self.cfg.connection.axis, "max_output": info.max_output}
        session = str(run.writer.path) if run.writer is not None else None
        rec = record_from_outcome(outcome, session, device, __version__,
                                  tuning_limit=self.cfg.safety.output_limit)
        path, code = write_gains_file(self.req.gains_path, rec)
        self.gains_record, self.gains_path, self.accepted = rec, path, outcome
        self.files += [("gains", str(path)), ("code (C)", str(code))]
        run.event("accepted", {"proposal": choice.name, "gains_file": str(path),
                               "code_file": str(code)})
        self.op.say(f"gains written to {path}, the per-tick code to {code}")
        if self.req.store:
            self._store(run, choice)
        self._set("accepted", f"gains accepted: {choice.name}", EXIT_OK)

    def _store(self, run: PoweredRun, choice: GainsChoice) -> None:
        if not run.info.has_store_gains:
            self.op.say("the board cannot store gains (no store-gains capability); not stored")
            self.notes.append("gains not stored: the board has no store-gains capability")
            return
        g = choice.gains
        run.request(StoreGains(run.axis, g.kp, g.ki, g.kd))
        run.event("gains_stored", {"kp": g.kp, "ki": g.ki, "kd": g.kd})
        self.op.say("gains stored on the board")

    # ================================================================== ending
    @contextlib.contextmanager
    def _waiting(self) -> Iterator[None]:
        """While the operator is asked (nothing powered): abort keys answer the question
        instead of stopping a run, the samples go on being recorded, and a signal ends the
        job at once (exit 3, what was measured kept) instead of waiting for an answer."""
        self.op.watch_abort(None)
        run = self.run_
        idle = run.idle() if run is not None and not run.armed else contextlib.nullcontext()
        with signals.diverted(_interrupt), idle:
            yield

    def _settle(self, run: PoweredRun) -> None:
        """The job's exit code and reason from how the powered run ended."""
        out = run.outcome
        if self.reason in ("accepted", "left", "aborted"):
            pass
        elif out.reason in ("completed", "converged") and out.exit_code == EXIT_OK:
            self._set(out.reason, out.message, EXIT_OK)
        else:
            self._set(out.reason, out.message, out.exit_code)
        if out.stop is not None and not out.stop.confirmed:
            # the stop path chose: EXIT_LINK when the link is lost, else EXIT_UNSAFE
            self._set(out.reason, out.message, out.exit_code)
        elif out.stop is not None and self.exit_code != EXIT_OK:
            self.message = f"{self.message}; the device confirmed zero output"

    def _write_result(self) -> None:
        res = self._result_dict()
        if res is not None:
            self.result_path = write_result(self.req.out_dir / "result.json", res)

    def _result_dict(self) -> dict[str, Any] | None:
        if self.req.relay:
            if self.result is None:
                return None
            res = dict(self.result)
        else:
            res = {"verb": self.req.verb, "source": str(self.req.result_source or ""),
                   "end_reason": self.reason}
        if self.steps or not self.req.relay:
            res["step"] = self.steps[-1].step_field() if self.steps else None
            res["step_attempts"] = [o.step_field() for o in self.steps]
            res["step_end_reasons"] = [r.reason for r in self.reports]
        res["gains_file"] = None if self.gains_path is None else str(self.gains_path)
        if self.reason != "unknown":
            res["job_end"] = {"reason": self.reason, "message": self.message,
                              "exit_code": self.exit_code}
        if self.notes:
            res["notes"] = list(res.get("notes") or []) + self.notes
        return res

    def _write_files(self, run: PoweredRun) -> None:
        """The session's end record, result.json and the optional CSV; kept on every exit.
        A relay cut short (abort, signal, limit) still leaves its plain figures."""
        st = self.stages
        if self.result is None and st is not None and st.experiment is not None and \
                st.experiment.cycles:
            with contextlib.suppress(Exception):
                out = run.outcome
                self.result = st.analyse(run, out.reason, out.message)
        cycles = len(self.stages.experiment.cycles) if (
            self.stages is not None and self.stages.experiment is not None) else 0
        with contextlib.suppress(Exception):
            run.end_session(cycles=cycles, job_reason=self.reason)
        if run.writer is not None:
            self.files.insert(0, ("session", str(run.writer.path)))
            if self.req.csv:
                csv = export_csv(read_session(run.writer.path),
                                 run.writer.path.with_suffix(".csv"))
                self.files.append(("samples (CSV)", str(csv)))
        self._write_result()
        if self.result_path is not None:
            self.files.insert(1, ("result", str(self.result_path)))

    def _finish(self) -> None:
        self.op.finish(JobSummary(
            exit_code=self.exit_code, message=self.message or self.reason,
            files=tuple(self.files), gains=self.gains_record,
            code=code_block(self.gains_record) if self.gains_record is not None else "",
            last_step=self.reports[-1] if self.reports else None, notes=tuple(self.notes)))


def warm_up() -> None:
    """Load the numerical libraries the analysis and the predictions use in a background
    thread: the first line shows at once, and nothing loads them later while the motor is
    powered."""
    def load() -> None:
        with contextlib.suppress(Exception):
            for name in ("linalg", "optimize", "signal", "special"):
                getattr(scipy, name)

    threading.Thread(target=load, name="warm-up", daemon=True).start()


def _interrupt(name: str) -> bool:
    """A signal while the operator is asked: the job ends (autotune.job.signals)."""
    raise signals.Interrupted(name)


def tune_request(cfg: Any, options: RunOptions) -> JobRequest:
    """The request of an unattended identification without a confirmation step (tests,
    benches, scripts): the board of `options` (port, plant, speed, faults, seed), files to
    options.out_dir."""
    board = BoardRequest(options.port, options.plant, options.speed, options.faults,
                         options.seed)
    out = Path(options.out_dir) if options.out_dir is not None else Path("autotune-sessions")
    return JobRequest(cfg=cfg, board=board, out_dir=out, verb="tune", yes=True,
                      confirm_step=False)


def run_tune(cfg: Any, options: RunOptions, *, on_update: Callable[[RunSnapshot], None] |
             None = None, say: Callable[[str], None] | None = None, analyse: bool = True,
             csv: bool = False) -> JobOutcome:
    """Run `tune_request(cfg, options)` with nobody to ask (see Quiet)."""
    req = replace(tune_request(cfg, options), csv=csv)
    return TuningJob(req, Quiet(say, on_update), analyse=analyse).run()
