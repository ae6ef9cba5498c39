"""Gain design: proposals from Ku, Tu and the fitted model, each with its predicted behaviour.

Pure functions. Gains are output units per PV unit, `ki` per second, `kd` in seconds (parallel
form); the model is a `DelayedTF` with positive gain (the runner applies the loop sign).
Tuning tables live in `autotune.core.rules`, the robust optimum and the loop analysis in
`autotune.core.robust`, the sampled closed-loop simulation in `autotune.core.closedloop`.

Default proposal (documented choice): "robust-pid", unless the derivative buys less than 10 %
more integral gain than "robust-pi" (derivative does not help), or the PID's high-frequency
gain kp (1 + N) times the PV noise exceeds 2 % of the output limit (noise would reach the
actuator); then "robust-pi". The thresholds are common practice, no source.

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
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from autotune.core import robust, rules
from autotune.core.closedloop import simulate_closed_loop
from autotune.core.lti import DelayedTF
from autotune.core.metrics import step_metrics
from autotune.core.pid import PidGains, PidSettings, per_tick, to_standard


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
    PV noise standard deviation (PV units) for the default choice.
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


DEFAULT_OVERSHOOT_TARGET = 10.0  # %, for the choice of b without a spec (common practice, no source)


@dataclass(frozen=True)
class Proposal:
    """One set of gains with its predicted behaviour on the model.

    predicted keys: ms, gain_margin, phase_margin_deg, stable, overshoot (%), rise_time,
    settling_time (s), iae_load (PV units s, unit load step at the plant input; inf without
    integral action), peak_output (output units, for the configured step), time_saturated
    (s), ts (s, loop period used), ts_assumed (True when the spec gave no loop period and
    ts = Tu/200 stood in), t_end, t_end_load (s, lengths of the predicted setpoint and load
    steps; nan figures: not reached within them, or unstable), setpoint_weight (the b the
    setpoint-step figures were computed with). setpoint_weight: b of these gains, 0..1.
    """

    name: str
    gains: PidGains
    predicted: dict[str, float | bool]
    violations: list[str] = field(default_factory=list)
    default: bool = False
    source: str = ""
    setpoint_weight: float = 1.0

    def as_dict(self, n: float = 10.0) -> dict[str, object]:
        """The result.json entry: name, kp, ki, kd, setpoint_weight (b), predicted, plus the
        other gain forms."""
        g = self.gains
        d: dict[str, object] = {"name": self.name, "kp": g.kp, "ki": g.ki, "kd": g.kd,
                                "setpoint_weight": self.setpoint_weight,
                                "predicted": dict(self.predicted),
                                "violations": list(self.violations), "default": self.default,
                                "source": self.source}
        if g.kp != 0:
            kc, ti, td = to_standard(g)
            d["standard"] = {"kc": kc, "ti": None if math.isinf(ti) else ti, "td": td}
        ts = self.predicted.get("ts")
        if isinstance(ts, float) and ts > 0 and not self.predicted.get("ts_assumed", False):
            d["per_tick"] = per_tick(g, ts, n)
        return d


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


def choose_setpoint_weight(model: DelayedTF, gains: PidGains, spec: DesignSpec,
                           target: float | None = None) -> float:
    """Setpoint weight b (0..1) for `gains` on `model`: the largest b in B_GRID whose
    predicted setpoint-step overshoot (%) is at most `target` (None: `overshoot_target(spec)`);
    when no b meets it, the b of the smallest overshoot (the peak is the maximum of functions
    affine in b, so the overshoot is convex in b). b = 1 without integral action or proportional
    gain, and for a loop unstable on the model. Linear loop: at most two simulations (b = 1,
    then b = 0; see the module docstring); a loop that saturates with the chosen b is checked
    again tick by tick and b halved towards 0 while it overshoots (at most three more)."""
    target = overshoot_target(spec) if target is None else float(target)
    if gains.ki == 0.0 or gains.kp == 0.0:
        return 1.0
    ts = loop_period(model, spec)
    if not robust.is_stable(model, gains, spec.n, ts):
        return 1.0
    t_end, _ = _spans(model, gains, ts)
    lim = spec.output_limit
    size = spec.step_size

    def settings(b: float) -> PidSettings:
        return PidSettings(gains, ts, spec.n, b, spec.tracking_time, -lim, lim)

    y1 = simulate_closed_loop(model, settings(1.0), t_end, size, method="linear").y / size
    if not np.all(np.isfinite(y1)):
        return 1.0
    if max(0.0, float(np.max(y1)) - 1.0) * 100.0 <= target:
        b = 1.0
    else:
        y0 = simulate_closed_loop(model, settings(0.0), t_end, size, method="linear").y / size
        peaks = np.max(y0[None, :] + B_GRID[:, None] * (y1 - y0)[None, :], axis=1)
        os_grid = np.maximum(0.0, peaks - 1.0) * 100.0
        ok = np.nonzero(os_grid <= target)[0]
        b = float(B_GRID[ok[-1]] if ok.size else B_GRID[int(np.argmin(os_grid))])
    if math.isfinite(lim):
        # saturation makes the loop nonlinear: check the chosen b on the tick-by-tick path
        for _ in range(3):
            run = simulate_closed_loop(model, settings(b), t_end, size)
            if not np.any(np.abs(run.u) >= lim * (1 - 1e-9)):
                break
            os_ = max(0.0, float(np.max(run.y)) / size - 1.0) * 100.0
            if os_ <= target or b == 0.0:
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
    run = simulate_closed_loop(model, settings, t_end, spec.step_size)
    if stable and np.all(np.isfinite(run.y)):
        m = step_metrics(run.t, run.y, 0.0, spec.step_size, run.u, u_lim)
        if math.isnan(m.settling_time) and t_end < t_cap:
            t_end = t_cap
            run = simulate_closed_loop(model, settings, t_end, spec.step_size)
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
            "setpoint_weight": b}


def violations(pred: dict[str, float | bool], spec: DesignSpec) -> list[str]:
    """Spec violations and saturation of one prediction, as short messages."""
    out: list[str] = []
    if not pred["stable"]:
        return ["closed loop unstable on the model"]
    os_ = float(pred["overshoot"])
    st = float(pred["settling_time"])
    if spec.max_overshoot is not None and os_ > spec.max_overshoot:
        out.append(f"overshoot {os_:.1f}% above the limit {spec.max_overshoot:g}%")
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


def choose_default(pi: PidGains, pid: PidGains, spec: DesignSpec) -> str:
    """"robust-pid" or "robust-pi" by the rule in the module docstring."""
    if pid.ki < 1.10 * pi.ki:
        return "robust-pi"
    noisy = pid.kp * (1.0 + spec.n) * spec.pv_noise > 0.02 * spec.output_limit
    if math.isfinite(spec.output_limit) and spec.pv_noise > 0 and noisy:
        return "robust-pi"
    return "robust-pid"


def propose(ku: float | None, tu: float | None, model: DelayedTF,
            spec: DesignSpec | None = None) -> list[Proposal]:
    """All proposals, robust ones first; exactly one has `default=True`.

    ku (output units per PV unit) and tu (s) feed the ultimate-point rules (skipped when None);
    the model feeds SIMC and AMIGO (when `rules.recognise` reads it: FOPDT, SOPDT,
    integrator+lag+dead time, higher orders by the half rule), the robust optimum and every
    prediction. Without a robust optimum (no stable PI meets the Ms target, e.g. an unstable
    model) the default falls back to the rule with the largest ki within the target.
    Each proposal's setpoint weight b is spec.setpoint_weight when given, else chosen by
    `choose_setpoint_weight`; its predicted figures are computed with that b.
    """
    spec = DesignSpec() if spec is None else spec
    src = f"max ki subject to Ms <= {spec.ms_target:g} (Astrom-Panagopoulos-Hagglund 1998)"
    designs: list[tuple[str, PidGains, str]] = []
    default: str | None = None
    try:
        rpi = robust.robust_pi(model, spec.ms_target, spec.ts)
        rpid = robust.robust_pid(model, spec.ms_target, spec.n, spec.ts, pi=rpi)
        default = choose_default(rpi.gains, rpid.gains, spec)
        designs = [("robust-pid", rpid.gains, src), ("robust-pi", rpi.gains, src)]
    except ValueError:
        pass  # e.g. an open-loop unstable model: the rules are still offered
    designs += _rule_designs(ku, tu, model, spec)
    weights = [choose_setpoint_weight(model, g, spec) if spec.setpoint_weight is None
               else float(spec.setpoint_weight) for _, g, _ in designs]
    preds = [predict(model, g, spec, b) for (_, g, _), b in zip(designs, weights, strict=True)]
    if default is None and designs:
        # fallback: the largest ki among stable proposals within the Ms target, else the
        # stable proposal with the lowest Ms (common practice, no source)
        ok = [i for i, p in enumerate(preds) if p["stable"]]
        within = [i for i in ok if float(preds[i]["ms"]) <= spec.ms_target + 0.05]
        pick = (max(within, key=lambda i: designs[i][1].ki) if within else
                min(ok, key=lambda i: float(preds[i]["ms"])) if ok else 0)
        default = designs[pick][0]
    return [Proposal(name, g, pred, violations(pred, spec), name == default, source, b)
            for (name, g, source), pred, b in zip(designs, preds, weights, strict=True)]
