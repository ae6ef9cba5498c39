"""What each screen other than the live run is drawn from: plain, immutable values.

The live run is drawn from `autotune.core.progress.RunSnapshot`; the start, proposals, step-result and
finish screens from the views here. They hold only what is shown, so a renderer is a pure function
of one of them. Units: seconds, PV units, output units; gains in parallel form (output units per PV
unit, ki per second, kd in seconds).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

from autotune.cautions import CAUTION_ITEMS
from autotune.core.progress import Phase

CAUTIONS: tuple[str, ...] = tuple(item[0].upper() + item[1:] + "." for item in CAUTION_ITEMS)

# Unit names the screens and lines use: the tool knows the loop only in PV units and output
# units, so every figure says which of the two (or seconds) it is in.
PV_UNIT = "PV"  # PV units
OUT_UNIT = "out"  # output units
UNITS_NOTE = "[PV] PV units, [out] output units"
KP_UNIT = "out/PV"
KI_UNIT = "out/PV/s"
KD_UNIT = "out·s/PV"

# The sentence every screen and the plain lines keep, whatever the size.
CUT_OFF = "the physical cut-off is the real stop"


@dataclass(frozen=True)
class StartView:
    """The start screen: what will move, under which limits, and the cautions."""

    device: str  # board name as its handshake reports it
    port: str
    axis: int
    loop_mode: str  # "device" or "host"
    limits: tuple[tuple[str, str], ...]  # (label, value with unit), in display order
    plan: tuple[tuple[str, str], ...] = ()  # (label, value) of the relay plan, e.g. target amplitude
    simulated: bool = False
    out_dir: str = ""
    cautions: tuple[str, ...] = CAUTIONS
    firmware: str = ""  # firmware version from the handshake ("" when the board gives none)
    board: tuple[tuple[str, str], ...] = ()  # more handshake facts: (label, value with unit)
    road: tuple[Phase, ...] = ()  # the stages the job runs, in order
    plan_title: str = "relay plan"
    unattended: bool = False  # --yes: nothing is asked, the start needs no key


class GainsLike(Protocol):
    kp: float
    ki: float
    kd: float


class ProposalLike(Protocol):
    """What the proposals screen reads from a design proposal (autotune.core.design.Proposal)."""

    name: str
    gains: GainsLike
    predicted: Mapping[str, float]
    violations: Sequence[str]
    default: bool


@dataclass(frozen=True)
class ProposalRow:
    """One proposal as shown: gains (parallel form) and predicted figures on the fitted model."""

    name: str
    kp: float
    ki: float
    kd: float
    predicted: Mapping[str, float] = field(default_factory=dict)
    violations: tuple[str, ...] = ()
    default: bool = False
    setpoint_weight: float = 1.0  # b: the proportional term acts on b sp - pv

    @classmethod
    def of(cls, proposal: ProposalLike) -> ProposalRow:
        """The row of a design proposal."""
        g = proposal.gains
        return cls(
            name=proposal.name,
            kp=float(g.kp),
            ki=float(g.ki),
            kd=float(g.kd),
            predicted=dict(proposal.predicted),
            violations=tuple(proposal.violations),
            default=bool(proposal.default),
            setpoint_weight=float(getattr(proposal, "setpoint_weight", 1.0)),
        )

    @classmethod
    def of_dict(cls, d: Mapping[str, Any]) -> ProposalRow:
        """The row of a result.json proposal entry (non-numeric figures left out)."""
        pred = d.get("predicted") if isinstance(d.get("predicted"), Mapping) else {}
        b = d.get("setpoint_weight", 1.0)
        flags = [str(v) for v in d.get("violations") or ()]
        if d.get("runnable") is False or pred.get("stable") is False:
            flags.insert(0, "not runnable: " + str(d.get("not_runnable_reason")
                                                   or "closed loop unstable on the model"))
        return cls(
            name=str(d.get("name", "?")),
            kp=float(d.get("kp", 0.0)), ki=float(d.get("ki", 0.0)), kd=float(d.get("kd", 0.0)),
            predicted={k: float(v) for k, v in pred.items()
                       if isinstance(v, int | float) and not isinstance(v, bool)},
            violations=tuple(flags),
            default=bool(d.get("default", False)),
            setpoint_weight=float(b) if isinstance(b, int | float) else 1.0,
        )


@dataclass(frozen=True)
class ProposalsView:
    """The proposals screen: every design, the one under the cursor, and the two knobs."""

    rows: tuple[ProposalRow, ...]
    selected: int = 0
    ms_target: float = 1.4
    ku: float | None = None  # output units per PV unit
    tu: float | None = None  # s
    model: str = ""  # fitted model in words
    spec: str = ""  # the user's spec in words, e.g. "overshoot <= 10 %"
    message: str = ""
    can_step: bool = True


@dataclass(frozen=True)
class StepView:
    """The step-result screen: the recorded response, the prediction, figures and verdict.

    `rows` are `autotune.core.verdict.FigureRow`s and `verdict` an `autotune.core.verdict.Verdict` (or
    None when the step was stopped before figures could be taken).
    """

    name: str  # proposal name
    kp: float
    ki: float
    kd: float
    t: tuple[float, ...]  # s, device time from the step instant
    pv: tuple[float, ...]
    sp: tuple[float, ...]
    out: tuple[float, ...]
    pred_t: tuple[float, ...] = ()
    pred_y: tuple[float, ...] = ()
    rows: tuple[Any, ...] = ()
    verdict: Any = None
    detune_hint: str = ""  # what the detune key would run ("" : nothing gentler)
    keys: tuple[tuple[str, str], ...] = ()  # (key cap, what it does) offered now
    message: str = ""


@dataclass(frozen=True)
class ConfirmView:
    """The confirmation before the motor is powered: what will run, in words."""

    action: str
    cautions: tuple[str, ...] = CAUTIONS


@dataclass(frozen=True)
class FinishView:
    """The finish screen: what happened and where the files are."""

    ok: bool
    message: str
    files: tuple[tuple[str, str], ...] = ()  # (what, path)
    gains: tuple[tuple[str, str], ...] = ()  # (label, value) of the accepted gains
    code: str = ""  # a short code-ready block of per-tick values
    code_title: str = "per-tick code for your loop"


@dataclass(frozen=True)
class LiveContext:
    """What the live screen needs beside the snapshot, kept by the front end across snapshots.

    road: the stages of the job in order (the live road shows only these); t0: device time of
    the job's first sample, s (the time axis counts from it); phase_t0: device time the current
    phase began, s; expected: how long the current phase takes at most, s (None: unknown);
    stage: 1-based position of the current phase on the road (0: not on it); log: the newest
    lines the job said, oldest first.
    """

    road: tuple[Phase, ...] = ()
    t0: float | None = None
    phase_t0: float | None = None
    expected: float | None = None
    stage: int = 0
    log: tuple[str, ...] = ()
    reached: Phase | None = None  # the last stage on the road the job has entered

    def elapsed(self, t_now: float | None) -> float | None:
        """Seconds since the current phase began (device time), None when unknown."""
        if t_now is None or self.phase_t0 is None:
            return None
        return max(0.0, t_now - self.phase_t0)
