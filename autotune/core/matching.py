"""Per-loop gains that make several closed loops alike (pure; no I/O).

The loops of a group that must answer a common setpoint alike (the two wheels of a drive base)
each have their own identified model (a `design.Condition`) and their own DesignSpec. Where
one common set of gains does not make them alike, each loop gets its own gains chosen so that
the predicted rise times (10 % to 90 % of a setpoint step, seconds, as `design.predict` gives
them) agree:

- the reference is the loop whose own default design (`design.design_proposals` on that loop
  alone) rises slowest; its gains stay as they are, its rise time is T_ref (s);
- every faster loop is slowed down along a one-parameter family of its own designs: the
  robust optimum (`robust.robust_pi_set` / `robust_pid_set`, the structure of its own default)
  at an Ms target m between MS_FLOOR and the loop's own target. A lower m gives a slower loop,
  and Ms never exceeds m, hence never the loop's target. m is found by bisection so that the
  predicted rise time equals T_ref within `target` (a fraction; default 2 %, inside the 5 %
  tolerance for margin). The setpoint weight b stays that of the loop's own default, so the
  family changes the gains only;
- every prediction is `design.evaluate` on that loop's condition with its own spec: the same
  simulation and metrics as every other proposal (no second step-response routine here).

When even the gentlest member (m = MS_FLOOR) still rises faster than T_ref, or a loop has no
safe design of its own, the loops cannot be made alike this way; the result says so in its
reason and keeps each loop's own default.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from autotune.core import design, robust
from autotune.core.design import Condition, DesignSpec, Proposal

RISE_MATCH = 0.05
"""Predicted rise times within this fraction of each other make two closed loops alike (a
drive base drives straight when its wheels answer a common setpoint alike; common practice, no
source)."""

RISE_TARGET = 0.02
"""The agreement the search aims at (fraction of T_ref), inside RISE_MATCH for margin."""

MS_FLOOR = 1.1
"""The lowest Ms target of the slowing family (common practice, no source): below it a robust
design is so gentle that a loop this much faster than the other is better retuned by hand."""

BISECTION_STEPS = 14
"""At most this many family members per loop (the Ms interval halves each step)."""


def rise_spread(times: Sequence[float]) -> float:
    """(largest - smallest) / smallest of the rise times (s); nan when one is not finite."""
    if not times or not all(math.isfinite(t) and t > 0 for t in times):
        return math.nan
    return (max(times) - min(times)) / min(times)


@dataclass(frozen=True)
class MatchedLoop:
    """One loop's gains in a match.

    name: the loop (its condition's name); proposal: the gains with their predicted figures
    on the loop's own condition (`design.evaluate`; None: the loop has no safe design of its
    own); ms_design: the Ms target the gains were designed for (the loop's own target for its
    own default); reference: the slowest loop, whose own default sets T_ref; matched: its
    predicted rise time is within the tolerance of T_ref; note: one sentence on how the gains
    were found."""

    name: str
    proposal: Proposal | None
    ms_design: float
    reference: bool
    matched: bool
    note: str

    @property
    def rise_time(self) -> float:
        """Predicted rise time (s, 10 % to 90 %); nan without a proposal or when not reached."""
        return _rise(self.proposal)

    @property
    def overshoot(self) -> float:
        """Predicted overshoot (percent of the step)."""
        return math.nan if self.proposal is None else float(self.proposal.predicted["overshoot"])

    @property
    def ms(self) -> float:
        """Predicted Ms = max |1/(1 + L)| on the loop's model (dimensionless)."""
        return math.nan if self.proposal is None else float(self.proposal.predicted["ms"])

    def as_dict(self, spec: DesignSpec | None = None) -> dict[str, object]:
        """The summary entry: proposal name, kp (output units per PV unit), ki (per s), kd
        (s), setpoint_weight, rise_time (s), overshoot (%), ms, ms_target (the loop's own),
        ms_design, reference, matched, meets_target, note."""
        p = self.proposal
        d: dict[str, object] = {"proposal": None if p is None else p.name,
                                "rise_time": self.rise_time, "overshoot": self.overshoot,
                                "ms": self.ms, "ms_design": self.ms_design,
                                "reference": self.reference, "matched": self.matched,
                                "note": self.note}
        if p is not None:
            d.update(kp=p.gains.kp, ki=p.gains.ki, kd=p.gains.kd,
                     setpoint_weight=p.setpoint_weight, meets_target=p.meets_target)
        if spec is not None:
            d["ms_target"] = spec.ms_target
        return d


@dataclass(frozen=True)
class MatchResult:
    """Per-loop gains for a group of loops: each loop's gains (`loops`, in the order given),
    the reference loop's name and rise time T_ref (s), the spread of the predicted rise times
    ((largest - smallest) / smallest, `rise_spread`), whether they agree within the tolerance
    (`matched`), and one sentence on the outcome (`reason`)."""

    loops: tuple[MatchedLoop, ...]
    reference: str | None
    rise_time: float
    spread: float
    tolerance: float
    matched: bool
    reason: str


def _rise(p: Proposal | None) -> float:
    return math.nan if p is None else float(p.predicted["rise_time"])


def _slow_enough(t: float, t_ref: float, target: float) -> bool:
    """The member rises at least as slowly as T_ref (1 - target); not reached (nan) counts."""
    return math.isnan(t) or t >= t_ref * (1.0 - target)


def family_member(cond: Condition, spec: DesignSpec, ms: float, pid: bool,
                  setpoint_weight: float) -> Proposal | None:
    """The robust optimum at Ms target `ms` on `cond` (its model and measured points), PID or
    PI, evaluated on `cond` against the loop's own `spec` with setpoint weight b =
    `setpoint_weight`; None when no stable design reaches `ms`. Named like
    "robust-pid-ms1.27"."""
    plants, points = [cond.model], list(cond.points)
    try:
        rpi = robust.robust_pi_set(plants, points, ms, spec.ts)
        best = robust.robust_pid_set(plants, points, ms, spec.n, spec.ts, pi=rpi) if pid \
            else rpi
    except ValueError:
        return None
    kind = "pid" if best.gains.kd > 0.0 else "pi"
    return design.evaluate([cond], f"robust-{kind}-ms{ms:.3g}", best.gains, spec,
                           setpoint_weight=setpoint_weight,
                           source=f"max ki subject to Ms <= {ms:.3g} on the model, slowed to "
                                  "match the other loops' rise time")


def _slow_down(cond: Condition, spec: DesignSpec, own: Proposal, t_ref: float, target: float,
               ms_floor: float) -> tuple[Proposal, float, str] | str:
    """The member of `cond`'s family whose rise time is T_ref within `target`: (proposal, its
    Ms target, note), or the reason (str) there is none."""
    pid = own.gains.kd > 0.0
    b = own.setpoint_weight
    hi = min(spec.ms_target, max(float(own.predicted["ms"]), ms_floor))
    lo = ms_floor
    gentlest = family_member(cond, spec, lo, pid, b)
    if gentlest is None:
        return f"no stable design of {cond.name} reaches Ms {lo:g}"
    t_lo = _rise(gentlest)
    if not _slow_enough(t_lo, t_ref, target):
        return (f"{cond.name} rises in {t_lo:.3g} s even at Ms {lo:g}, faster than the "
                f"reference's {t_ref:.3g} s: its gains cannot be slowed enough to match")
    best: tuple[Proposal, float] = (gentlest, lo)
    best_err = math.inf if math.isnan(t_lo) else abs(t_lo / t_ref - 1.0)
    for _ in range(BISECTION_STEPS):
        if best_err <= target:
            break
        mid = 0.5 * (lo + hi)
        p = family_member(cond, spec, mid, pid, b)
        t = _rise(p)
        if p is not None and math.isfinite(t) and abs(t / t_ref - 1.0) < best_err:
            best, best_err = (p, mid), abs(t / t_ref - 1.0)
        if p is None or _slow_enough(t, t_ref, 0.0):
            lo = mid  # too slow (or none): a higher Ms target is faster
        else:
            hi = mid
    p, ms = best
    return p, ms, (f"slowed to the reference's rise time: the robust design at Ms {ms:.3g} "
                   f"(own target {spec.ms_target:g})")


def match_rise_times(conditions: Sequence[Condition], specs: Sequence[DesignSpec] | DesignSpec,
                     tolerance: float = RISE_MATCH, target: float = RISE_TARGET,
                     ms_floor: float = MS_FLOOR) -> MatchResult:
    """Per-loop gains whose predicted rise times (s) agree within `tolerance` (a fraction).

    conditions: one per loop (its name, model, measured points); specs: each loop's
    DesignSpec (or one for all): its Ms target, loop period, step size (PV units), output
    limit (output units). The method is in the module docstring; `target` is the agreement
    aimed at (fraction), `ms_floor` the gentlest Ms target of the slowing family. A loop
    whose own default is already within `target` of T_ref keeps it."""
    conds = list(conditions)
    spec_list = [specs] * len(conds) if isinstance(specs, DesignSpec) else list(specs)
    if len(spec_list) != len(conds):
        raise ValueError("one DesignSpec per condition")
    own: list[Proposal | None] = []
    for c, s in zip(conds, spec_list, strict=True):
        res = design.design_proposals([c], s)
        own.append(res.get(res.default) if res.default else None)
    missing = [c.name for c, p in zip(conds, own, strict=True) if p is None]
    if missing or not conds:
        loops = tuple(MatchedLoop(c.name, p, s.ms_target, False, False,
                                  "no safe design of its own" if p is None else "own default")
                      for c, p, s in zip(conds, own, spec_list, strict=True))
        return MatchResult(loops, None, math.nan, math.nan, tolerance, False,
                           f"no safe design of its own on {', '.join(missing)}: the loops "
                           "cannot be matched" if missing else "no loops")
    times = [_rise(p) for p in own]
    if not all(math.isfinite(t) for t in times):
        slow = [c.name for c, t in zip(conds, times, strict=True) if not math.isfinite(t)]
        loops = tuple(MatchedLoop(c.name, p, s.ms_target, False, False, "own default")
                      for c, p, s in zip(conds, own, spec_list, strict=True))
        return MatchResult(loops, None, math.nan, math.nan, tolerance, False,
                           f"the predicted step of {', '.join(slow)} does not reach 90 % of "
                           "the setpoint: no rise time to match")
    k_ref = max(range(len(conds)), key=lambda k: times[k])
    t_ref = times[k_ref]
    loops_out: list[MatchedLoop] = []
    failures: list[str] = []
    for k, (c, p, s) in enumerate(zip(conds, own, spec_list, strict=True)):
        assert p is not None
        if k == k_ref or abs(times[k] / t_ref - 1.0) <= target:
            note = "reference: its own default, the slowest" if k == k_ref else \
                "its own default already rises like the reference"
            loops_out.append(MatchedLoop(c.name, p, s.ms_target, k == k_ref, True, note))
            continue
        found = _slow_down(c, s, p, t_ref, target, ms_floor)
        if isinstance(found, str):
            failures.append(found)
            loops_out.append(MatchedLoop(c.name, p, s.ms_target, False, False,
                                         f"own default kept: {found}"))
        else:
            q, ms, note = found
            ok = abs(_rise(q) / t_ref - 1.0) <= tolerance
            loops_out.append(MatchedLoop(c.name, q, ms, False, ok, note))
    spread = rise_spread([lp.rise_time for lp in loops_out])
    ok = spread <= tolerance and not failures and all(
        lp.proposal is not None and lp.proposal.meets_target for lp in loops_out)
    if ok:
        reason = (f"per-loop gains matched to {conds[k_ref].name}'s rise time {t_ref:.3g} s: "
                  f"the predicted rise times agree within {spread * 100:.1f} % (at most "
                  f"{tolerance * 100:g} %), every loop within its Ms target")
    elif failures:
        reason = "the loops cannot be made alike: " + "; ".join(failures)
    else:
        reason = (f"the closest per-loop gains leave the predicted rise times "
                  f"{spread * 100:.1f} % apart (more than {tolerance * 100:g} %)")
    return MatchResult(tuple(loops_out), conds[k_ref].name, t_ref, spread, tolerance, ok,
                       reason)
