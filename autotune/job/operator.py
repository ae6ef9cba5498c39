"""What the job tells the operator and asks of them: plain values, one protocol.

The job (autotune.job.job) never draws or reads a key itself. It hands an `Operator` immutable
facts (StartInfo, GainsMenu, StepReport, JobSummary, RunSnapshot) and asks three kinds of
question: which gains to try, what to do after a step, and the deliberate confirmation before
the motor is powered. The terminal front end (autotune.ui.app) implements it for the full
screen and for plain lines; with `--yes` the job asks nothing.

Confirmation rule: `confirm_power` is the only way to energise a motor. It is asked before every
powered stage (the first start, a repeat, a detuned or another proposal) and answered by one
deliberate act (the Y key on the screen, `yes` typed in line mode); Enter and single letters
elsewhere never answer it.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any, Protocol

from autotune.core.progress import RunSnapshot


class Decision(StrEnum):
    """What the operator wants after a confirmation step (the motor is unpowered meanwhile)."""

    ACCEPT = "accept"  # write the gains file (only offered when the step was judged)
    DETUNE = "detune"  # a gentler design of the same kind, shown before it runs
    OTHER = "other"  # back to the gains menu
    REPEAT = "repeat"  # the same gains again
    LEAVE = "leave"  # end the job; nothing more is powered


@dataclass(frozen=True)
class StartInfo:
    """What is about to be powered: the board from its handshake and the limits in force.

    device: board name as the board reports it; firmware: its firmware version ("" when it
    gives none); port: the port opened (for a simulated board, its pseudo-terminal);
    limits/plan/facts: (label, value with unit) pairs in display order (facts: more of the
    handshake, e.g. tick and largest output); action: what the confirmation starts, in words;
    stages: the phases the job runs in order (autotune.core.progress.Phase values) with the
    most device seconds each takes (None: unknown).
    """

    device: str
    port: str
    axis: int
    loop_mode: str
    limits: tuple[tuple[str, str], ...]
    plan: tuple[tuple[str, str], ...]
    simulated: bool
    out_dir: str
    action: str
    firmware: str = ""
    facts: tuple[tuple[str, str], ...] = ()
    stages: tuple[tuple[str, float | None], ...] = ()


@dataclass(frozen=True)
class GainsMenu:
    """The proposals to choose from (result.json proposal dicts, in display order).

    selected: index of the one the job suggests (the default, or the one just tried);
    ku (output units per PV unit), tu (s), model (in words), spec (in words): context lines;
    ms_target: the robust design's bound; redesign(ms_target) -> (proposals, message) designs
    again for another bound (None when there is no model to design on); message: one line.
    """

    proposals: tuple[Mapping[str, Any], ...]
    selected: int = 0
    ku: float | None = None
    tu: float | None = None
    model: str = ""
    spec: str = ""
    ms_target: float = 1.4
    message: str = ""
    redesign: Callable[[float], tuple[tuple[Mapping[str, Any], ...], str]] | None = None


@dataclass(frozen=True)
class MenuAnswer:
    """The operator's pick in a GainsMenu: `index` into `proposals` (None: leave)."""

    index: int | None
    proposals: tuple[Mapping[str, Any], ...] = ()
    ms_target: float = 1.4


@dataclass(frozen=True)
class StepReport:
    """One confirmation step as run, for the step-result screen.

    outcome: autotune.core.steptest.StepOutcome (None when the step never started);
    name/gains: what ran (kp, ki /s, kd s); reason/message: how the powered part ended
    ("completed", "aborted", "limit:pv_window", ...); stop_confirmed: the board reported zero
    output after it; pred_t/pred_y: the model's response to the same step (s from the step, PV
    units), empty when unknown; detune_hint: what the detune key would run, in words ("" when
    there is nothing gentler); can_accept: the step was judged (a verdict exists).
    """

    outcome: Any
    name: str
    kp: float
    ki: float
    kd: float
    reason: str
    message: str
    stop_confirmed: bool | None
    pred_t: tuple[float, ...] = ()
    pred_y: tuple[float, ...] = ()
    detune_hint: str = ""
    can_accept: bool = False
    attempt: int = 1


@dataclass(frozen=True)
class JobSummary:
    """How the job ended: exit code, one line, the files written, the accepted gains."""

    exit_code: int
    message: str
    files: tuple[tuple[str, str], ...] = ()
    gains: Any = None  # autotune.gainsfile.GainsRecord when accepted
    code: str = ""  # the per-tick code block of the accepted gains
    last_step: StepReport | None = None
    notes: tuple[str, ...] = field(default_factory=tuple)


class Operator(Protocol):
    """The front end of a job (see the module docstring). `can_ask`: someone can answer
    (a terminal); without it the job powers nothing unless --yes was given."""

    can_ask: bool

    def show_start(self, info: StartInfo) -> None:
        """The start screen: the board, the limits and the cautions."""

    def confirm_power(self, action: str) -> bool:
        """The deliberate confirmation before `action` powers the motor: True to go ahead."""

    def update(self, snap: RunSnapshot) -> None:
        """A new snapshot of the powered run (thread: the job's)."""

    def say(self, line: str) -> None:
        """One line for the operator."""

    def alarm(self, text: str) -> None:
        """An unmistakable message (the motor may still be powered: cut the power)."""

    def watch_abort(self, stop: Callable[[str], None] | None) -> None:
        """From now on an abort key calls `stop(key name)` (None: no powered stage)."""

    def show_gains(self, menu: GainsMenu) -> None:
        """The proposals, shown without a question (unattended runs)."""

    def choose_gains(self, menu: GainsMenu) -> MenuAnswer:
        """The gains menu: which proposal to try (the confirmation is asked afterwards)."""

    def show_step(self, report: StepReport) -> None:
        """A step result, shown without a question (unattended runs)."""

    def after_step(self, report: StepReport, offer: Sequence[Decision]) -> Decision:
        """The step-result screen: one of `offer`."""

    def finish(self, summary: JobSummary) -> None:
        """The finish screen."""


MODEL_WORDS = {"fopdt": "first order + dead time", "sopdt": "second order + dead time",
               "sopdt_zero": "second order with a zero + dead time",
               "integrator_lag": "integrator + lag + dead time", "lag_n": "lag chain + dead time"}
PARAM_WORDS = {"gain": ("K", "PV/out"), "velocity_gain": ("Kv", "PV/out/s"),
               "time_constant": ("T", "s"), "t1": ("T1", "s"), "t2": ("T2", "s"),
               "delay": ("L", "s"), "zero_time": ("Tz", "s"), "order": ("n", "")}


def model_words(model: Mapping[str, Any] | None) -> str:
    """A fitted model (result.json `model`) in words with units, e.g. "integrator + lag +
    dead time: Kv 0.36 PV/out/s, T 0.055 s, L 0.054 s" ("" when there is none)."""
    if not model or not model.get("kind"):
        return ""
    kind = str(model["kind"])
    params = []
    for key, v in (model.get("params") or {}).items():
        if isinstance(v, int | float) and not isinstance(v, bool):
            name, unit = PARAM_WORDS.get(key, (key, ""))
            params.append(f"{name} {v:.3g}" + (f" {unit}" if unit else ""))
    return f"{MODEL_WORDS.get(kind, kind.replace('_', ' '))}: {', '.join(params)}"
