"""Gain design: proposals from Ku, Tu and the fitted model, each with its predicted behaviour.

Pure functions. Gains are output units per PV unit, `ki` per second, `kd` in seconds (parallel
form); the model is a `DelayedTF` with positive gain (the runner applies the loop sign).
Tuning tables live in `autotune.core.rules`, the robust optimum and the loop analysis in
`autotune.core.robust`, the sampled closed-loop simulation in `autotune.core.closedloop`.

Conditions. A design works on one or several `Condition`s of the same loop (sessions recorded
under different loads, floors or wear): each has its fitted model, its ultimate point and its
measured frequency-response points (`robust.MeasuredPoint`). The robust optimum maximises the
integral gain subject to Ms at most the target on every condition's model and at every measured
point, with margin for the point's uncertainty (`robust.robust_pid_set`); every other proposal
is evaluated on every condition. One condition is the single-session case.

Default proposal (documented choice). A proposal is *runnable* when the closed loop is stable
on every model and no measured point comes within its uncertainty of -1; *safe* when it is
runnable and its Ms is within the target (+MS_TOLERANCE) on every model and at every measured
point; *qualified* when it is safe and meets the spec (overshoot, settling time) on every model.
The default is the first qualified proposal in the order: the preferred robust design, the
other robust design, then the rules by decreasing ki. The preferred robust design is
"robust-pid", unless the derivative buys less than 10 % more integral gain than "robust-pi"
(derivative does not help), or the PID's high-frequency gain kp (1 + N) times the PV noise
exceeds 2 % of the output limit (noise would reach the actuator), or a model fails its
validation (PI depends less on the model); then "robust-pi". The thresholds are common practice,
no source. When no proposal is qualified, the most robust safe one (least Ms) is the default and
the result says so; when none is safe there is no default, and the result says what to do.

Detune is a new design, not a factor: `detune_design` re-designs at the next lower Ms target of
DETUNE_MS_TARGETS, or without the derivative, with its predicted figures.

Setpoint weight b (two-degree-of-freedom PID: the proportional term acts on b sp - pv; Åström
and Hägglund, "Advanced PID Control", ISA 2006, from memory): b shapes the setpoint response
only; Ms, the margins and the load response do not depend on it. Each proposal gets the
largest b in [0, 1] (on a 0.01 grid) whose predicted overshoot, on the model with the discrete
PID at the loop period, is at most a target: spec.max_overshoot, else DEFAULT_OVERSHOOT_TARGET
(10 %, common practice, no source). Proposals without integral action keep b = 1 (with P only,
b would move the final value). The loop being linear in b while the output stays inside its
limits, the step responses for b = 0 and b = 1 give the response for every b as
y_b = y_0 + b (y_1 - y_0); a saturating loop is checked again tick by tick with the chosen b.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from autotune.core import robust, rules
from autotune.core.closedloop import simulate_closed_loop
from autotune.core.lti import DelayedTF
from autotune.core.metrics import step_metrics
from autotune.core.pid import PidGains, PidSettings, per_tick, to_standard
from autotune.core.robust import MeasuredPoint


@dataclass(frozen=True)
class DesignSpec:
    """What the user asks for.

    ms_target: robust-design bound on max |S|; phase_margin_deg: for the Åström–Hägglund
    ultimate-point design; simc_tau_c: SIMC closed-loop time constant (s; None = the model's
    dead time); max_overshoot (%), max_settling_time (s): spec limits to flag (None = none);
    step_size: setpoint step for the prediction (PV units); output_limit: actuator limit
    (output units, symmetric); ts: loop period (s; None = continuous design and predictions
    at Tu/200); n: derivative filter N; setpoint_weight: b for every proposal (None: chosen
    per proposal, see the module docstring); tracking_time: Tt (None = clamping); pv_noise:
    PV noise standard deviation (PV units) for the default choice; dead_zone: the actuator's
    identified dead zone (output units): the predicted setpoint step goes through it.
    """

    ms_target: float = 1.4
    phase_margin_deg: float = 45.0
    simc_tau_c: float | None = None
    max_overshoot: float | None = None
    max_settling_time: float | None = None
    step_size: float = 1.0
    output_limit: float = math.inf
    ts: float | None = None
    n: float = 10.0
    setpoint_weight: float | None = None
    tracking_time: float | None = None
    pv_noise: float = 0.0
    dead_zone: float = 0.0


def spec_from_config(design_cfg: Mapping[str, Any], output_limit: float | None,
                     target_amplitude: float | None, ts: float | None, **extra: Any
                     ) -> DesignSpec:
    """DesignSpec from the config's [design] table (ms_target, max_overshoot (%),
    max_settling_time (s), step_size (PV units; None = the relay's target amplitude)), the
    output limit (output units), the loop period ts (s) and any further DesignSpec fields
    (`extra`, e.g. n, setpoint_weight); None leaves a field at its default."""
    kw: dict[str, Any] = {
        "ms_target": design_cfg.get("ms_target"),
        "max_overshoot": design_cfg.get("max_overshoot"),
        "max_settling_time": design_cfg.get("max_settling_time"),
        "step_size": design_cfg.get("step_size") or target_amplitude,
        "output_limit": output_limit,
        "ts": ts, **extra,
    }
    optional = ("max_overshoot", "max_settling_time", "ts", "setpoint_weight", "tracking_time")
    return DesignSpec(**{k: v for k, v in kw.items() if v is not None or k in optional})


def design_limits(design_cfg: Mapping[str, Any], spec_cfg: Mapping[str, Any] | None
                  ) -> dict[str, Any]:
    """The design limits of a config's [design] table (as a dict), with the overshoot the
    confirmation step's [spec] allows (max_overshoot, percent) binding when the design table
    sets none or more: the default proposal must be one the step can pass."""
    out = dict(design_cfg)
    cap = (spec_cfg or {}).get("max_overshoot")
    if isinstance(cap, int | float) and not isinstance(cap, bool):
        own = out.get("max_overshoot")
        out["max_overshoot"] = float(cap) if own is None else min(float(own), float(cap))
    return out


DEFAULT_OVERSHOOT_TARGET = 10.0  # %, for the choice of b without a spec (common practice, no source)


MS_TOLERANCE = 0.05  # Ms above the target by at most this still counts as within it


@dataclass(frozen=True)
class Condition:
    """One recorded condition of the loop (a session): what the design knows of the plant.

    name: a label (the session file or a short name); model: the fitted DelayedTF (positive
    gain, continuous plant, the hold not included); ku (output units per PV unit), tu (s): the
    refined ultimate point (None: unknown; the ultimate-point rules then skip it); points: the
    measured frequency-response points (w rad/s, the static gain at w = 0); model_valid: False
    when the model fails to reproduce what was measured (the designs are then constrained on
    the points as always, PI is preferred and the predicted figures are marked unreliable).
    alternative: True for another candidate model of the same session as the condition before
    it (`conditions.condition_set_of_identification`: where no model reproduces the record the
    designs must hold on each candidate); it does not count as a session of its own.
    """

    name: str
    model: DelayedTF
    ku: float | None = None
    tu: float | None = None
    points: tuple[MeasuredPoint, ...] = ()
    model_valid: bool = True
    alternative: bool = False


@dataclass(frozen=True)
class Proposal:
    """One set of gains with its predicted behaviour on the model(s).

    predicted keys: ms, ms_points (worst-case Ms at the measured points over their
    uncertainty; nan without points), gain_margin, phase_margin_deg, stable, overshoot (%),
    rise_time, settling_time (s), iae_load (PV units s, unit load step at the plant input; inf
    without integral action), peak_output (output units, for the configured step),
    time_saturated (s), ts (s, loop period used), ts_assumed (True when the spec gave no loop
    period and ts = Tu/200 stood in), t_end, t_end_load (s, lengths of the predicted setpoint
    and load steps; nan figures: not reached within them, or unstable), setpoint_weight (the b
    the setpoint-step figures were computed with), reliable (False when the model failed its
    validation). Over several conditions `predicted` holds the worst case over them (largest
    Ms, overshoot, times and IAE, smallest margins, stable only if stable on every one) and
    `per_condition` each condition's own figures. setpoint_weight: b of these gains, 0..1.
    runnable: False when the loop is unstable on a model or a measured point comes within its
    uncertainty of -1 (`not_runnable` says why; front ends refuse it without --force).
    """

    name: str
    gains: PidGains
    predicted: dict[str, float | bool]
    violations: list[str] = field(default_factory=list)
    default: bool = False
    source: str = ""
    setpoint_weight: float = 1.0
    runnable: bool = True
    not_runnable: str = ""
    per_condition: tuple[ConditionFigures, ...] = ()

    @property
    def meets_target(self) -> bool:
        """Safe: runnable, Ms within the target on every condition (see the module docstring)."""
        return self.runnable and all(c.meets_target for c in self.per_condition)

    @property
    def meets_spec(self) -> bool:
        """Overshoot and settling time within the spec on every condition."""
        return all(c.meets_spec for c in self.per_condition)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Proposal:
        """A proposal back from its result.json entry (`as_dict`); the per-session part is not
        read back (evaluate the gains again for it)."""
        pred = {k: (math.nan if v is None else v) for k, v in
                dict(d.get("predicted") or {}).items()
                if v is None or isinstance(v, bool | int | float)}
        return cls(str(d.get("name", "")), PidGains(float(d["kp"]), float(d.get("ki", 0.0)),
                                                    float(d.get("kd", 0.0))),
                   pred, list(d.get("violations") or []), bool(d.get("default", False)),
                   str(d.get("source", "")), float(d.get("setpoint_weight", 1.0)),
                   bool(d.get("runnable", True)), str(d.get("not_runnable_reason") or ""))

    def as_dict(self, n: float = 10.0) -> dict[str, object]:
        """The result.json entry: name, kp, ki, kd, setpoint_weight (b), predicted, runnable
        (with not_runnable_reason), reliable, plus the other gain forms; over several
        conditions `per_session`, each condition's figures."""
        g = self.gains
        d: dict[str, object] = {"name": self.name, "kp": g.kp, "ki": g.ki, "kd": g.kd,
                                "setpoint_weight": self.setpoint_weight,
                                "predicted": dict(self.predicted),
                                "violations": list(self.violations), "default": self.default,
                                "source": self.source, "runnable": self.runnable,
                                "not_runnable_reason": self.not_runnable or None,
                                "reliable": bool(self.predicted.get("reliable", True))}
        if self.per_condition:
            d["meets_target"] = self.meets_target
        if len(self.per_condition) > 1:
            d["per_session"] = [c.as_dict() for c in self.per_condition]
        if g.kp != 0:
            kc, ti, td = to_standard(g)
            d["standard"] = {"kc": kc, "ti": None if math.isinf(ti) else ti, "td": td}
        ts = self.predicted.get("ts")
        if isinstance(ts, float) and ts > 0 and not self.predicted.get("ts_assumed", False):
            d["per_tick"] = per_tick(g, ts, n)
        return d


@dataclass(frozen=True)
class ConditionFigures:
    """A proposal on one condition: its predicted figures (keys as `Proposal.predicted`), the
    spec violations there, whether it keeps the Ms target (meets_target, with `target` the
    sentence when it does not) and the spec (overshoot, settling time)."""

    name: str
    predicted: dict[str, float | bool]
    violations: list[str]
    meets_target: bool
    meets_spec: bool
    target: str = ""

    def as_dict(self) -> dict[str, object]:
        return {"session": self.name, "predicted": dict(self.predicted),
                "violations": list(self.violations), "meets_target": self.meets_target,
                "meets_spec": self.meets_spec, "target": self.target or None}


def loop_period(model: DelayedTF, spec: DesignSpec) -> float:
    """The loop period of the predictions: spec.ts, else Tu/200 of the model."""
    if spec.ts is not None:
        return spec.ts
    return 2.0 * math.pi / robust.reference_frequency(model) / 200.0


def _spans(model: DelayedTF, gains: PidGains, ts: float) -> tuple[float, float]:
    """(t_end, t_cap) in s: the first span of a predicted step and the longest one.

    The first span covers most loops; a loop not settled in it is simulated again over the
    longest span (60 Tu, at most 20000 ticks: the tick-by-tick path that saturation needs
    costs about 10 us a tick)."""
    tu = 2.0 * math.pi / robust.reference_frequency(model, ts)
    ti = math.inf if gains.ki == 0 else abs(gains.kp / gains.ki)
    t_cap = min(60.0 * tu, 20000 * ts)
    return min(max(12.0 * tu, 4.0 * ti), t_cap), t_cap


def _weight(spec: DesignSpec, setpoint_weight: float | None) -> float:
    if setpoint_weight is not None:
        return float(setpoint_weight)
    return 1.0 if spec.setpoint_weight is None else float(spec.setpoint_weight)


def overshoot_target(spec: DesignSpec) -> float:
    """The overshoot (%) the setpoint weight is chosen for: spec.max_overshoot, else
    DEFAULT_OVERSHOOT_TARGET."""
    return DEFAULT_OVERSHOOT_TARGET if spec.max_overshoot is None else float(spec.max_overshoot)


B_GRID = np.round(np.linspace(0.0, 1.0, 101), 2)  # candidate setpoint weights, 0.01 apart


def choose_setpoint_weight(model: DelayedTF | Sequence[DelayedTF], gains: PidGains,
                           spec: DesignSpec, target: float | None = None) -> float:
    """Setpoint weight b (0..1) for `gains` on `model` (or on every one of several models):
    the largest b in B_GRID whose predicted setpoint-step overshoot (%) is at most `target`
    (None: `overshoot_target(spec)`) on every model; when no b meets it, the b of the smallest
    worst overshoot (the peak is the maximum of functions affine in b, so the overshoot is
    convex in b). b = 1 without integral action or proportional gain; models on which the loop
    is unstable are left out (b = 1 when it is unstable on all). Linear loop: at most two
    simulations a model (b = 1, then b = 0; see the module docstring); a loop that saturates
    with the chosen b is checked again tick by tick and b halved towards 0 while it overshoots
    (at most three more)."""
    target = overshoot_target(spec) if target is None else float(target)
    if gains.ki == 0.0 or gains.kp == 0.0:
        return 1.0
    models = (model,) if isinstance(model, DelayedTF) else tuple(model)
    lim = spec.output_limit
    size = spec.step_size

    def settings(ts: float, b: float) -> PidSettings:
        return PidSettings(gains, ts, spec.n, b, spec.tracking_time, -lim, lim)

    loops: list[tuple[DelayedTF, float, float, np.ndarray]] = []  # model, ts, t_end, y(b=1)
    for m in models:
        ts = loop_period(m, spec)
        if not robust.is_stable(m, gains, spec.n, ts):
            continue
        t_end, _ = _spans(m, gains, ts)
        y1 = simulate_closed_loop(m, settings(ts, 1.0), t_end, size, method="linear").y / size
        if np.all(np.isfinite(y1)):
            loops.append((m, ts, t_end, y1))
    if not loops:
        return 1.0
    if all(max(0.0, float(np.max(y1)) - 1.0) * 100.0 <= target for *_, y1 in loops):
        b = 1.0
    else:
        os_grid = np.zeros(B_GRID.size)
        for m, ts, t_end, y1 in loops:
            y0 = simulate_closed_loop(m, settings(ts, 0.0), t_end, size, method="linear").y / size
            peaks = np.max(y0[None, :] + B_GRID[:, None] * (y1 - y0)[None, :], axis=1)
            os_grid = np.maximum(os_grid, np.maximum(0.0, peaks - 1.0) * 100.0)
        ok = np.nonzero(os_grid <= target)[0]
        b = float(B_GRID[ok[-1]] if ok.size else B_GRID[int(np.argmin(os_grid))])
    if math.isfinite(lim):
        # saturation makes the loop nonlinear: check the chosen b on the tick-by-tick path
        for _ in range(3):
            worst = -math.inf
            for m, ts, t_end, _ in loops:
                run = simulate_closed_loop(m, settings(ts, b), t_end, size)
                if np.any(np.abs(run.u) >= lim * (1 - 1e-9)):
                    worst = max(worst, max(0.0, float(np.max(run.y)) / size - 1.0) * 100.0)
            if worst == -math.inf or worst <= target or b == 0.0:
                break
            b = round(0.5 * b, 2)
    return b


def predict(model: DelayedTF, gains: PidGains, spec: DesignSpec,
            setpoint_weight: float | None = None) -> dict[str, float | bool]:
    """Predicted figures of `gains` on `model` with the discrete PID at the loop period and its
    ZOH (see `autotune.core.robust` for the loop, `autotune.core.closedloop` for the simulation).
    setpoint_weight: b of the setpoint step (None: spec.setpoint_weight, else 1); only the
    setpoint-step figures depend on it."""
    ts = loop_period(model, spec)
    b = _weight(spec, setpoint_weight)
    mg = robust.loop_margins(model, gains, spec.n, ts)
    stable = robust.is_stable(model, gains, spec.n, ts)
    t_end, t_cap = _spans(model, gains, ts)
    lim = spec.output_limit
    settings = PidSettings(gains, ts, spec.n, b, spec.tracking_time, -lim, lim)
    u_lim = lim if math.isfinite(lim) else None
    dz = spec.dead_zone
    run = simulate_closed_loop(model, settings, t_end, spec.step_size, dead_zone=dz)
    if stable and np.all(np.isfinite(run.y)):
        m = step_metrics(run.t, run.y, 0.0, spec.step_size, run.u, u_lim)
        if math.isnan(m.settling_time) and t_end < t_cap:
            t_end = t_cap
            run = simulate_closed_loop(model, settings, t_end, spec.step_size, dead_zone=dz)
            m = step_metrics(run.t, run.y, 0.0, spec.step_size, run.u, u_lim)
        overshoot, rise, settle = m.overshoot, m.rise_time, m.settling_time
        peak, tsat = m.peak_output, m.time_saturated
    else:
        overshoot = rise = settle = math.nan
        peak = float(np.nanmax(np.abs(run.u))) if np.any(np.isfinite(run.u)) else math.inf
        tsat = math.nan
    iae = math.nan
    if stable and gains.ki == 0.0:
        iae = math.inf  # no integral action: a load step leaves an offset, the IAE grows without end
    elif stable:
        load = simulate_closed_loop(model, PidSettings(gains, ts, spec.n, b),
                                    t_cap, 0.0, load_step=1.0)  # linear: cheap at any length
        iae = float(np.sum(0.5 * (np.abs(load.y[1:]) + np.abs(load.y[:-1])) * ts))
    return {"ms": mg.ms, "gain_margin": mg.gain_margin, "phase_margin_deg": mg.phase_margin_deg,
            "stable": stable, "overshoot": overshoot, "rise_time": rise, "settling_time": settle,
            "iae_load": iae, "peak_output": peak, "time_saturated": tsat, "ts": ts,
            "t_end": float(run.t[-1]), "t_end_load": t_cap, "ts_assumed": spec.ts is None,
            "setpoint_weight": b, "step_size": spec.step_size}


def violations(pred: dict[str, float | bool], spec: DesignSpec) -> list[str]:
    """Spec violations and saturation of one prediction, as short messages."""
    out: list[str] = []
    if not pred["stable"]:
        return ["closed loop unstable on the model"]
    os_ = float(pred["overshoot"])
    st = float(pred["settling_time"])
    if spec.max_overshoot is not None and os_ > spec.max_overshoot:
        out.append(f"overshoot {os_:.1f} % above the limit {spec.max_overshoot:g} %")
    if spec.max_settling_time is not None and (math.isnan(st) or st > spec.max_settling_time):
        if math.isnan(st):
            out.append(f"not settled within {float(pred['t_end']):.3g} s "
                       f"(limit {spec.max_settling_time:g} s)")
        else:
            out.append(f"settling time {st:.3g} s above the limit {spec.max_settling_time:g} s")
    tsat = float(pred["time_saturated"])
    if math.isfinite(spec.output_limit) and tsat > 0:
        out.append(f"output saturates at {spec.output_limit:g} for {tsat:.3g} s of the step")
    return out


def _rule_designs(ku: float | None, tu: float | None, model: DelayedTF, spec: DesignSpec
                  ) -> list[tuple[str, PidGains, str]]:
    out: list[tuple[str, PidGains, str]] = []
    if ku is not None and tu is not None and ku > 0 and tu > 0:
        table: list[tuple[str, Callable[[float, float], PidGains], str]] = [
            ("zn-p", rules.zn_p, "Ziegler-Nichols 1942"),
            ("zn-pi", rules.zn_pi, "Ziegler-Nichols 1942"),
            ("zn-pid", rules.zn_pid, "Ziegler-Nichols 1942"),
            ("tl-pi", rules.tl_pi, "Tyreus-Luyben 1992"),
            ("tl-pid", rules.tl_pid, "Tyreus-Luyben 1992"),
        ]
        out += [(name, fn(ku, tu), src) for name, fn, src in table]
        out.append(("ah-pm", rules.ah_phase_margin(ku, tu, spec.phase_margin_deg),
                    f"Astrom-Hagglund 1984, phase margin {spec.phase_margin_deg:g} deg"))
    m = rules.recognise(model)
    if m is not None:
        out.append(("simc-pi", rules.simc_pi(m, spec.simc_tau_c), "SIMC, Skogestad 2003"))
        pid = rules.simc_pid(m, spec.simc_tau_c)
        if pid is not None:
            out.append(("simc-pid", pid, "SIMC, Skogestad 2003"))
        out.append(("amigo-pi", rules.amigo_pi(m), "AMIGO, Astrom-Hagglund 2004"))
        out.append(("amigo-pid", rules.amigo_pid(m), "AMIGO, Astrom-Hagglund 2004"))
    return out


def choose_default(pi: PidGains, pid: PidGains, spec: DesignSpec, model_valid: bool = True
                   ) -> str:
    """"robust-pid" or "robust-pi" by the rule in the module docstring."""
    if not model_valid or pid.ki < 1.10 * pi.ki:
        return "robust-pi"
    noisy = pid.kp * (1.0 + spec.n) * spec.pv_noise > 0.02 * spec.output_limit
    if math.isfinite(spec.output_limit) and spec.pv_noise > 0 and noisy:
        return "robust-pi"
    return "robust-pid"


# ---------------------------------------------------------------- figures over conditions


_WORST_MAX = ("ms", "overshoot", "rise_time", "settling_time", "iae_load", "peak_output",
              "time_saturated", "t_end", "t_end_load")


def worst_case(preds: Sequence[dict[str, float | bool]]) -> dict[str, float | bool]:
    """One prediction from several conditions' predictions (same keys): the largest Ms,
    overshoot, times, IAE and peak output (nan, "not reached", wins), the smallest margins,
    the largest ms_points among the conditions that have points, stable and reliable only
    when so on every condition; ts, ts_assumed and setpoint_weight from the first."""
    if len(preds) == 1:
        return dict(preds[0])
    out = dict(preds[0])
    for key in _WORST_MAX:
        vals = [float(p[key]) for p in preds]
        out[key] = math.nan if any(math.isnan(v) for v in vals) else max(vals)
    for key in ("gain_margin", "phase_margin_deg"):
        vals = [float(p[key]) for p in preds if not math.isnan(float(p[key]))]
        out[key] = min(vals) if vals else math.nan
    pts = [float(p["ms_points"]) for p in preds if not math.isnan(float(p["ms_points"]))]
    out["ms_points"] = max(pts) if pts else math.nan
    out["stable"] = all(bool(p["stable"]) for p in preds)
    out["reliable"] = all(bool(p.get("reliable", True)) for p in preds)
    return out


def _target_failure(pred: dict[str, float | bool], spec: DesignSpec) -> str:
    """Why a prediction breaks the Ms target ("" when it keeps it)."""
    if not pred["stable"]:
        return "closed loop unstable on the model"
    limit = spec.ms_target + MS_TOLERANCE
    ms, at_points = float(pred["ms"]), float(pred["ms_points"])
    if ms > limit:
        return f"Ms {ms:.2f} above the target {spec.ms_target:g}"
    if not math.isnan(at_points) and at_points > limit:
        return (f"Ms {at_points:.2f} at the measured points (with their uncertainty) above the "
                f"target {spec.ms_target:g}")
    return ""


def _meets_spec(pred: dict[str, float | bool], spec: DesignSpec) -> bool:
    """Stable, overshoot and settling time within the spec (saturation is flagged, not judged)."""
    if not pred["stable"]:
        return False
    os_, st = float(pred["overshoot"]), float(pred["settling_time"])
    if spec.max_overshoot is not None and not os_ <= spec.max_overshoot:
        return False
    return spec.max_settling_time is None or st <= spec.max_settling_time


def _not_runnable(cond: Condition, pred: dict[str, float | bool], gains: PidGains,
                  spec: DesignSpec, several: bool) -> str:
    """Why `gains` must not run on this condition ("" when they may): unstable on the model,
    or a measured point within its uncertainty of -1 (of the points that say anything:
    `robust.informative`)."""
    where = f" of {cond.name}" if several else ""
    if not pred["stable"]:
        return f"closed loop unstable on the model{where}"
    ts = loop_period(cond.model, spec)
    for pt in robust.informative(cond.points):
        if robust.point_clearance(pt, gains, spec.n, ts) <= 0.0:
            return (f"at the measured point {pt.w:.3g} rad/s{where} the loop comes within the "
                    "point's uncertainty of -1: it may be unstable")
    return ""


def evaluate(conditions: Sequence[Condition], name: str, gains: PidGains,
             spec: DesignSpec, setpoint_weight: float | None = None, source: str = ""
             ) -> Proposal:
    """`gains` predicted on every condition: a Proposal (default False) with the worst case in
    `predicted`, each condition in `per_condition`, the violations (prefixed with the
    condition's name over several), runnable and its reason. setpoint_weight: b (None:
    spec.setpoint_weight, else chosen on every model by `choose_setpoint_weight`)."""
    conds = tuple(conditions)
    several = len(conds) > 1
    if setpoint_weight is not None:
        b = float(setpoint_weight)
    elif spec.setpoint_weight is not None:
        b = float(spec.setpoint_weight)
    else:
        b = choose_setpoint_weight([c.model for c in conds], gains, spec)
    figures: list[ConditionFigures] = []
    flags: list[str] = []
    reasons: list[str] = []
    for c in conds:
        pred = predict(c.model, gains, spec, b)
        pred["ms_points"] = robust.points_sensitivity(c.points, gains, spec.n,
                                                      loop_period(c.model, spec))
        pred["reliable"] = c.model_valid
        viol = violations(pred, spec)
        miss = _target_failure(pred, spec)
        figures.append(ConditionFigures(c.name, pred, viol, not miss, _meets_spec(pred, spec),
                                        miss))
        flags += [f"{c.name}: {v}" for v in viol] if several else viol
        why = _not_runnable(c, pred, gains, spec, several)
        if why:
            reasons.append(why)
    pred = worst_case([f.predicted for f in figures])
    return Proposal(name, gains, pred, flags, False, source, b, not reasons, "; ".join(reasons),
                    tuple(figures))


# ---------------------------------------------------------------- proposals


@dataclass(frozen=True)
class DesignResult:
    """Every proposal for a set of conditions, the default's name (None where no design is
    safe), one sentence on the choice (or on what to do) and warnings (e.g. a model that fails
    its validation: the predicted figures are unreliable)."""

    proposals: list[Proposal]
    default: str | None
    note: str
    warnings: tuple[str, ...] = ()

    def get(self, name: str) -> Proposal | None:
        return next((p for p in self.proposals if p.name == name), None)


def _robust_source(spec: DesignSpec, conds: Sequence[Condition]) -> str:
    n_pts = sum(len(c.points) for c in conds)
    where = ("every session's model" if len(conds) > 1 else "the model") + \
        (f" and {n_pts} measured point{'s' if n_pts != 1 else ''}" if n_pts else "")
    return (f"max ki subject to Ms <= {spec.ms_target:g} on {where} "
            "(Astrom-Panagopoulos-Hagglund 1998)")


def spec_text(spec: DesignSpec) -> str:
    """The design limits in words ("" when there are none)."""
    parts = []
    if spec.max_overshoot is not None:
        parts.append(f"overshoot at most {spec.max_overshoot:g} %")
    if spec.max_settling_time is not None:
        parts.append(f"settled within {spec.max_settling_time:g} s")
    return ", ".join(parts)


def pick_default(proposals: Sequence[Proposal], spec: DesignSpec, preferred: Sequence[str],
                 several: bool = False) -> tuple[str | None, str]:
    """(default name or None, the sentence saying why, or what to do) by the rule in the module
    docstring; `preferred`: the robust designs' names in order of preference."""
    on = "every session's model" if several else "the model"
    order = [p for name in preferred for p in proposals if p.name == name]
    order += sorted((p for p in proposals if p.name not in preferred), key=lambda p: -p.gains.ki)
    safe = [p for p in order if p.meets_target]
    qualified = [p for p in safe if p.meets_spec]
    limits = spec_text(spec)
    if qualified:
        p = qualified[0]
        meets = f" and meets the spec ({limits})" if limits else ""
        return p.name, f"{p.name} keeps Ms within {spec.ms_target:g} on {on}{meets}"
    if safe:
        p = min(safe, key=lambda q: max(float(q.predicted["ms"]),
                                        0.0 if math.isnan(float(q.predicted["ms_points"]))
                                        else float(q.predicted["ms_points"])))
        return p.name, (f"no proposal meets the spec on {on} ({limits}): {p.name}, the most "
                        f"robust one (Ms {float(p.predicted['ms']):.2f}), is offered instead")
    if several:
        return None, (f"no proposal keeps Ms within {spec.ms_target:g} on every session: the "
                      "conditions differ too much for one set of gains; design for each "
                      "session on its own (autotune analyze SESSION)")
    return None, (f"no proposal is stable with Ms within {spec.ms_target:g} on the model and "
                  "at the measured points: do not run these gains; check the mechanism "
                  "(backlash, a loose coupling, a resonance) and the loop's sign, then tune "
                  "again with a larger relay amplitude")


def design_proposals(conditions: Sequence[Condition], spec: DesignSpec | None = None
                     ) -> DesignResult:
    """All proposals for one or several conditions of the same loop, robust ones first.

    The robust optimum (PI and PID) maximises ki subject to Ms <= spec.ms_target on every
    condition's model and at every measured point (`robust.robust_pid_set`); the rules are
    designed from the condition with the lowest Ku (the most sensitive loop; over one
    condition, that one; common practice, no source) and, like the robust designs, evaluated
    on every condition (`evaluate`). The default follows the module docstring. Without a
    robust optimum (no stable PI meets the target, e.g. an unstable model) the rules are still
    offered. Each proposal's setpoint weight b is spec.setpoint_weight when given, else the
    largest b within the overshoot target on every model.
    """
    spec = DesignSpec() if spec is None else spec
    conds = tuple(conditions)
    if not conds:
        raise ValueError("a design needs at least one condition")
    several = sum(not c.alternative for c in conds) > 1
    valid = all(c.model_valid for c in conds)
    plants = [c.model for c in conds]
    points = [pt for c in conds for pt in c.points]
    designs: list[tuple[str, PidGains, str]] = []
    preferred: list[str] = []
    try:
        rpi = robust.robust_pi_set(plants, points, spec.ms_target, spec.ts)
        rpid = robust.robust_pid_set(plants, points, spec.ms_target, spec.n, spec.ts, pi=rpi)
        first = choose_default(rpi.gains, rpid.gains, spec, valid)
        preferred = [first, "robust-pid" if first == "robust-pi" else "robust-pi"]
        src = _robust_source(spec, conds)
        designs = [("robust-pid", rpid.gains, src), ("robust-pi", rpi.gains, src)]
    except ValueError:
        pass  # e.g. an open-loop unstable model: the rules are still offered
    with_ku = [c for c in conds if c.ku is not None and c.ku > 0]
    ref = min(with_ku, key=lambda c: float(c.ku or 0.0)) if with_ku else conds[0]
    for name, g, src in _rule_designs(ref.ku, ref.tu, ref.model, spec):
        designs.append((name, g, f"{src}, from {ref.name} (lowest Ku)" if several else src))
    proposals = [evaluate(conds, name, g, spec, source=src) for name, g, src in designs]
    default, note = pick_default(proposals, spec, preferred, several)
    proposals = [replace(p, default=p.name == default) for p in proposals]
    warnings = tuple(
        f"the model of {c.name} does not reproduce the measured response: its predicted "
        "figures are unreliable (the designs are held to the measured points, PI preferred)"
        if several else
        "the model does not reproduce the measured response: the predicted figures are "
        "unreliable (the designs are held to the measured points, PI preferred)"
        for c in conds if not c.model_valid and not c.alternative)
    if any(c.alternative for c in conds):
        warnings += ("no model reproduces the record, so every proposal is designed and "
                     "judged on the chosen model and on each other candidate fitted to it "
                     f"({', '.join(c.name for c in conds if c.alternative)}): the gains hold "
                     "on whichever is closest to the loop, at the price of a slower response",)
    return DesignResult(proposals, default, note, warnings)


def propose(ku: float | None, tu: float | None, model: DelayedTF,
            spec: DesignSpec | None = None, points: Sequence[MeasuredPoint] = (),
            model_valid: bool = True) -> list[Proposal]:
    """All proposals for one condition (`design_proposals`), robust ones first; at most one
    has `default=True` (none where no design is safe).

    ku (output units per PV unit) and tu (s) feed the ultimate-point rules (skipped when None);
    the model feeds SIMC and AMIGO (when `rules.recognise` reads it: FOPDT, SOPDT,
    integrator+lag+dead time, higher orders by the half rule), the robust optimum and every
    prediction; points: measured frequency-response points the designs are held to;
    model_valid: whether the model reproduces them (see `Condition`).
    """
    cond = Condition("model", model, ku, tu, tuple(points), model_valid)
    return design_proposals([cond], spec).proposals


# ---------------------------------------------------------------- detune


DETUNE_MS_TARGETS = (1.4, 1.25, 1.15)  # the Ms ladder of a detune (common practice, no source)


def detune_design(conditions: Sequence[Condition], current: Proposal, spec: DesignSpec,
                  *, remove_derivative: bool = False) -> Proposal | None:
    """A gentler design than `current` on the same conditions, with its predicted figures.

    Not a factor on the gains: the robust optimum again (`robust.robust_pid_set` or
    `robust_pi_set`, on every model and measured point) at the next Ms target of
    DETUNE_MS_TARGETS below `current`'s worst Ms (models and points), with the same structure
    (PID when current has a derivative). remove_derivative: a PI instead, at the ladder target
    at or just below current's Ms. When current already sits at the lowest target, the
    derivative is removed; a PI at the lowest target has nothing gentler (None). None also when
    no stable design reaches the target. The proposal is named like "robust-pi-ms1.25".
    """
    conds = tuple(conditions)
    at_points = float(current.predicted.get("ms_points", math.nan))
    ms_model = float(current.predicted.get("ms", math.inf))
    ms_now = max(math.inf if math.isnan(ms_model) else ms_model,
                 0.0 if math.isnan(at_points) else at_points)
    if not current.predicted.get("stable", True):
        ms_now = math.inf
    pid = current.gains.kd > 0.0 and not remove_derivative
    lower = [t for t in DETUNE_MS_TARGETS if t < ms_now - 0.02]
    if remove_derivative and current.gains.kd > 0.0:
        target = next((t for t in DETUNE_MS_TARGETS if t <= ms_now + 0.02),
                      DETUNE_MS_TARGETS[-1])
    elif lower:
        target = lower[0]
    elif current.gains.kd > 0.0:
        pid, target = False, DETUNE_MS_TARGETS[-1]
    else:
        return None
    gentler = replace(spec, ms_target=target)
    plants = [c.model for c in conds]
    points = [pt for c in conds for pt in c.points]
    try:
        rpi = robust.robust_pi_set(plants, points, target, spec.ts)
        best = robust.robust_pid_set(plants, points, target, spec.n, spec.ts, pi=rpi) if pid \
            else rpi
    except ValueError:
        return None
    kind = "pid" if best.gains.kd > 0.0 else "pi"
    return evaluate(conds, f"robust-{kind}-ms{target:g}", best.gains, gentler,
                    source=_robust_source(gentler, conds) + ", detuned")


# ---------------------------------------------------------------- given gains


def gains_verdict(p: Proposal, spec: DesignSpec) -> tuple[bool, str]:
    """(meets the target and the spec, one sentence) for gains evaluated by `evaluate`."""
    several = len(p.per_condition) > 1
    if not p.runnable:
        return False, f"do not run these gains: {p.not_runnable}"
    broken = [f for f in p.per_condition if not f.meets_target]
    if broken:
        where = "; ".join(f"{f.name}: {f.target}" if several else f.target for f in broken)
        return False, (f"these gains break the design target ({where}): design again for "
                       "this condition (autotune analyze) or detune")
    missed = [f for f in p.per_condition if not f.meets_spec]
    if missed:
        names = ", ".join(f.name for f in missed)
        on = f" on {names}" if several else ""
        return False, (f"these gains keep Ms within {spec.ms_target:g} but miss the spec "
                       f"({spec_text(spec)}){on}")
    meets = f" and meet the spec ({spec_text(spec)})" if spec_text(spec) else ""
    on = " on every session" if several else ""
    return True, f"these gains keep Ms within {spec.ms_target:g}{meets}{on}"
