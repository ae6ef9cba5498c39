"""From a recorded tune run to the identified loop: the one path of the live run and of
`autotune analyze`.

Three steps, each a pure function:
1. `RunRecord`: what the run recorded, in the shape the session file holds it (samples from
   the rest through the end of the relay, the precheck reports as recorded, the relay settings
   as finally used, the board's declared PV resolution). The live run builds it from memory,
   `autotune analyze` from the session file; nothing else differs.
2. `analysis_inputs(record)`: every decision about the analysis in one place: PV noise (the
   rest check's, else estimated), PV resolution (the board's, else the rest's, else the
   direction pulse's), the convergence tolerance and cycles, the operating point for the
   static gain, a dead zone measured by the breakaway ramps.
3. `identify(inputs)`: the dead zone from the swing at the relay amplitudes
   (autotune.core.deadzone; refined by a model fit with the dead zone as a parameter, within
   that estimate's uncertainty) and taken out of the output, the relay analysis
   (autotune.core.analysis) on what the plant saw, the static gain (or the velocity gain of an
   integrating loop) and the normalised dead time, each with its uncertainty, warnings in
   plain words; `result_fields` turns it into the result.json fields.

Units: seconds, PV units, output units; the PV is sign-normalised (positive output raises it).
No numerical warning escapes: floating-point warnings are silenced here and every failure is
an AnalysisError with a message of our own.
"""

from __future__ import annotations

import math
import warnings as _warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import scipy  # its subpackages load on first use (scipy's lazy loader)

from autotune.core import prechecks as pre
from autotune.core.analysis import (
    DELAYS_NOTE,
    AnalysisError,
    RelayAnalysis,
    analyse_relay,
    df_estimate,
    relay_cycles,
)
from autotune.core.deadzone import (
    NEGLIGIBLE_FRACTION,
    DeadZoneEstimate,
    dead_zone,
    estimate_dead_zone,
    holding_dead_zone,
    stages_from_cycles,
)
from autotune.core.model import MODE_KINDS, refit_residual, sampled_response
from autotune.core.robust import MeasuredPoint

ANALYSED_PHASES = ("precheck:rest", "precheck:direction", "precheck:breakaway", "relay")
JOINT_SIGMAS = 3.0  # the joint fit searches the dead zone within this many standard errors
FIT_DEAD_ZONE_GAIN = 0.75
"""With no estimate that shows a dead zone, a dead zone found by the model fit alone is taken
only when it brings the fit's misfit beyond the PV noise (sqrt(rms residual^2 - noise^2)) to
at most this fraction of the misfit without it, and the fit without it misses by more than
the noise (FIT_MISS_FLOOR). Over seeds 1-6 (tests/bench/bench_identify.py cases): a dead
zone the swing's scatter hides gives 0.03-0.70, unmodelled dynamics (a mode at 2 or 3 x the
ultimate frequency) and clean loops 0.96-1.00 (common practice, no source)."""
FIT_MISS_FLOOR = 1.1  # the plain fit's rms residual over the PV noise that counts as a miss


@dataclass(frozen=True)
class RelaySettingsRecord:
    """The relay settings as finally used: centre (PV units, sign-normalised), bias, amplitude
    (output units), hysteresis (PV units), asymmetry (-1..1)."""

    centre: float
    bias: float
    amplitude: float
    hysteresis: float
    asymmetry: float = 0.0


@dataclass(frozen=True)
class RunRecord:
    """What a tune run recorded, for the analysis.

    t, y, u: samples (s; PV sign-normalised, PV units; applied output, output units) from the
    rest precheck through the end of the relay; phase: each sample's phase name; state: the
    relay state per sample (+1/-1, NaN outside the relay) or None; settings: the relay as
    finally used; tick (s) and output_limit (output units) or None; relay: the config's
    [relay] table; rest, direction, breakaway: the precheck reports as recorded (PV in raw
    units; None when not run); pv_resolution: the board's declared PV step (PV units, 0 when
    it declares none); sign: the loop sign; t_first_motion: start of the direction pulse (s);
    t_powered_end: end of the last motion of the identification (s; the relay's end, or the
    ramps' when they ran after it); end_reason: how the relay ended.
    """

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    phase: np.ndarray
    settings: RelaySettingsRecord
    state: np.ndarray | None = None
    tick: float | None = None
    output_limit: float | None = None
    relay: Mapping[str, Any] = field(default_factory=dict)
    rest: Mapping[str, Any] | None = None
    direction: Mapping[str, Any] | None = None
    breakaway: Mapping[str, Any] | None = None
    pv_resolution: float = 0.0
    sign: int = 1
    t_first_motion: float | None = None
    t_powered_end: float | None = None
    end_reason: str | None = None


@dataclass(frozen=True)
class AnalysisInputs:
    """What `identify` works on (see `analysis_inputs` for how each is decided)."""

    t: np.ndarray
    y: np.ndarray
    u: np.ndarray
    state: np.ndarray | None
    settings: RelaySettingsRecord
    ts: float | None
    noise_std: float | None
    resolution: float | None
    output_limit: float | None
    converge_tol: float
    min_cycles: int
    operating_point: tuple[float, float] | None
    measured_dead_zone: tuple[float, float] | None
    t_first_motion: float | None
    t_relay_end: float
    t_powered_end: float
    at_rest: bool | None = None
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class Identification:
    """The identified loop.

    analysis: the relay analysis on what the plant saw (output minus the dead zone);
    dead_zone: the dead-zone estimate (None: fewer than two relay amplitudes and no ramps);
    dead_zone_used: what was taken out of the output (output units); static_gain (PV units
    per output unit; None for an integrating loop) and velocity_gain (PV units per output unit
    per second; None for a self-regulating loop), normalized_dead_time (0..1, None without an
    asymmetric relay), with their relative uncertainties; points: the measured frequency
    response (and the static gain as a point at w = 0) for a design checked against them;
    ku_df, tu_df: the plain describing-function figures of the relay as it ran (no dead-zone
    correction); powered_time (s) from the first motion to the end of the identification's
    motion, and in ultimate periods; warnings: actionable lines; reliable: the model
    reproduces what was measured.
    """

    analysis: RelayAnalysis
    inputs: AnalysisInputs
    dead_zone: DeadZoneEstimate | None
    dead_zone_used: float
    dead_zone_method: str
    static_gain: float | None
    static_gain_uncertainty: float | None
    velocity_gain: float | None
    velocity_gain_uncertainty: float | None
    normalized_dead_time: float | None
    normalized_dead_time_uncertainty: float | None
    points: tuple[MeasuredPoint, ...]
    ku_df: float
    tu_df: float
    powered_time: float | None
    powered_time_tu: float | None
    relay_time_tu: float | None
    warnings: tuple[str, ...]
    reliable: bool


# ---------------------------------------------------------------------------- inputs
def _num(d: Mapping[str, Any] | None, key: str) -> float | None:
    if not isinstance(d, Mapping):
        return None
    v = d.get(key)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        return None
    return float(v)


def analysis_inputs(record: RunRecord) -> AnalysisInputs:
    """Decide the analysis inputs from a run record (the one place for these decisions).

    - samples: the rest, direction pulse, breakaway (when before the relay) and relay phases,
      up to the relay's last sample: a record from rest lets the fit use every sample;
    - PV noise: the rest check's figure, else (no rest check) estimated by the analysis;
    - PV resolution: `prechecks.pv_resolution` of the board's declared step, the rest's and
      the direction pulse's; none known: the smallest step in the record;
    - operating point (PV, output) for the static gain: the rest check's mean PV and output,
      unless the PV drifted at rest (the loop was not at an operating point);
    - dead zone measured by the breakaway ramps: (value, spread) when they ran (a spread of 0:
      a figure given by hand, taken as it is);
    - convergence: the [relay] table's converge_tol and min_cycles.
    """
    t = np.asarray(record.t, dtype=float)
    phase = np.asarray(record.phase, dtype=object)
    keep = np.isin(phase, ANALYSED_PHASES) & np.isfinite(t) & np.isfinite(record.y) & \
        np.isfinite(record.u)
    relay = np.flatnonzero(keep & (phase == "relay"))
    if relay.size == 0:
        raise AnalysisError("no relay samples in the record")
    keep &= np.arange(t.size) <= relay[-1]
    # a breakaway test after the relay is not part of the relay record
    state = None
    if record.state is not None:
        state = np.asarray(record.state, dtype=float)[keep]
        state = np.where(np.isfinite(state), state, 0.0)
    sign = -1.0 if record.sign < 0 else 1.0
    rest = record.rest
    noise = _num(rest, "noise_std")
    res_rest = _num(rest, "resolution") or 0.0
    res_pulse = _num(record.direction, "resolution") or 0.0
    res = pre.pv_resolution(record.pv_resolution or 0.0, res_rest, res_pulse) or None
    op = None
    mean, out_mean = _num(rest, "mean"), _num(rest, "output_mean")
    drift, drift_se = _num(rest, "drift"), _num(rest, "drift_stderr")
    drifting = drift is not None and drift_se is not None and abs(drift) > 3.0 * drift_se
    notes: list[str] = []
    if mean is not None and out_mean is not None:
        if drifting:
            notes.append("the PV drifted at rest: no static gain from the mean output")
        else:
            op = (sign * mean, out_mean)
    measured = None
    bk = record.breakaway
    if isinstance(bk, Mapping) and _num(bk, "deadband") is not None:
        value = float(_num(bk, "deadband") or 0.0)
        spread = _num(bk, "spread")
        if spread is None:  # measured without a spread (first motion only): a quarter of it;
            # a figure given by hand (no "method") counts as exact
            spread = 0.25 * value if "method" in bk else 0.0
        measured = (value, spread)
    r = record.relay or {}
    tol = _num(r, "converge_tol") or 0.02
    min_cycles = int(_num(r, "min_cycles") or 2)
    tt = t[keep]
    # the record opens on the rest check, which saw the PV still at the first output: the
    # plant starts at rest (no significant drift; the output held until the pulse)
    at_rest = None
    if keep.any() and phase[np.flatnonzero(keep)[0]] == "precheck:rest" and \
            mean is not None and not drifting:
        at_rest = True
    t_relay_end = float(t[relay[-1]])
    t_end = record.t_powered_end if record.t_powered_end is not None else t_relay_end
    return AnalysisInputs(
        t=tt, y=np.asarray(record.y, dtype=float)[keep], u=np.asarray(record.u,
                                                                    dtype=float)[keep],
        state=state, settings=record.settings, ts=record.tick, noise_std=noise,
        resolution=res, output_limit=record.output_limit, converge_tol=tol,
        min_cycles=min_cycles, operating_point=op, measured_dead_zone=measured,
        t_first_motion=record.t_first_motion, t_relay_end=t_relay_end,
        t_powered_end=max(t_end, t_relay_end), at_rest=at_rest, notes=tuple(notes))


# ---------------------------------------------------------------------------- identify
def _analyse(inp: AnalysisInputs, width: float, modes: bool = True) -> RelayAnalysis:
    s = inp.settings
    eff = replace(s, amplitude=max(s.amplitude - width, 1e-9)) if width > 0 else s
    return analyse_relay(inp.t, inp.y, dead_zone(inp.u, width), eff, noise_std=inp.noise_std,
                         ts=inp.ts, output_limit=inp.output_limit, state=inp.state,
                         converge_tol=inp.converge_tol, min_cycles=inp.min_cycles,
                         resolution=inp.resolution, operating_point=inp.operating_point,
                         modes=modes, at_rest=inp.at_rest)


def _stage_estimate(inp: AnalysisInputs, an: RelayAnalysis,
                    width: float) -> DeadZoneEstimate | None:
    """The dead zone from the amplitude stages, measured against the model fitted with
    `width` taken out (the model carries the stages' transients and frequencies)."""
    cycles = relay_cycles(inp.t, inp.y, inp.u, centre=an.centre, state=inp.state)
    stages = stages_from_cycles(inp.t, cycles)
    if len(stages) < 2:
        return None
    tf = an.model.tf
    ts = an.ts
    if an.model.reliable and an.fit_from == 0:
        def simulate(ue: np.ndarray) -> np.ndarray:
            return sampled_response(tf, ue - ue[0], ts)

        return estimate_dead_zone(inp.t, inp.y, inp.u, stages, ts, simulate=simulate)
    if an.model.reliable:
        return estimate_dead_zone(inp.t, inp.y, inp.u, stages, ts,
                                  gain_at=lambda w: abs(complex(tf.freq_response(w))))
    return estimate_dead_zone(inp.t, inp.y, inp.u, stages, ts)


def _holding_estimate(inp: AnalysisInputs) -> DeadZoneEstimate | None:
    """`deadzone.holding_dead_zone` on the record's amplitude stages (asymmetric relay and an
    operating point needed)."""
    if not inp.settings.asymmetry or inp.operating_point is None:
        return None
    ts = inp.ts if inp.ts else float(np.median(np.diff(inp.t)))
    cycles = relay_cycles(inp.t, inp.y, inp.u, centre=inp.settings.centre, state=inp.state)
    return holding_dead_zone(inp.u, stages_from_cycles(inp.t, cycles), inp.operating_point[1],
                             ts)


def _joint_dead_zone(inp: AnalysisInputs, an: RelayAnalysis, lo: float, hi: float) -> float:
    """The dead zone in [lo, hi] (output units) that lets a low-order model explain the whole
    record best: the least-squares residual of the best plausible integrating and the best
    plausible self-regulating plain candidate, each refitted (warm-started) as the dead zone
    moves and minimised over it; the lower one wins. The window comes from the estimates
    (stage swing, mean output, ramps), so that a model's misfit cannot pass for a dead zone.
    For an integrating loop under an asymmetric relay the residual is sharp: only the right
    dead zone gives the mean output that holds the PV still."""
    if not hi > lo:
        return lo
    plain = [c for k, c in an.model.candidates.items() if k not in MODE_KINDS and
             getattr(an.model.checks.get(k), "plausible", True)]
    fits = []
    for integrating in (True, False):
        group = [c for c in plain if c.tf.is_integrating == integrating]
        if group:
            fits.append(min(group, key=lambda c: c.aic))
    best = (math.inf, lo)
    for start in fits:
        state = {"fit": start}

        def rss(width: float, state: dict[str, Any] = state, start: Any = start) -> float:
            # from the candidate as first fitted and from the last refit: the better end (a
            # chain of refits alone can wander off into a local minimum far from the truth)
            ue = dead_zone(inp.u, width)
            ends = [refit_residual(f, inp.t, inp.y, ue, ts=an.ts, fit_from=an.fit_from,
                                   input_offset=an.fit_from > 0)
                    for f in ({id(start): start, id(state["fit"]): state["fit"]}.values())]
            r, new = min(ends, key=lambda e: e[0])
            state["fit"] = new
            return r

        grid = np.linspace(lo, hi, 7)
        vals = [rss(float(x)) for x in grid]
        k = int(np.argmin(vals))
        a, b = grid[max(k - 1, 0)], grid[min(k + 1, grid.size - 1)]
        res = scipy.optimize.minimize_scalar(rss, bounds=(float(a), float(b)), method="bounded",
                                       options={"xatol": 1e-4 * max(hi, 1e-12),
                                                "maxiter": 20})
        if float(res.fun) < best[0]:
            best = (float(res.fun), float(res.x))
    return best[1]


def identify(inp: AnalysisInputs) -> Identification:
    """Identify the loop from the analysis inputs (see the module docstring).

    Raises AnalysisError (an actionable message) when the record cannot be analysed.
    """
    with np.errstate(all="ignore"), _warnings.catch_warnings():
        _warnings.simplefilter("ignore")
        try:
            return _identify(inp)
        except AnalysisError:
            raise
        except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
            raise AnalysisError(f"the record could not be analysed ({type(exc).__name__}): "
                                "check that the relay oscillated steadily and run it again"
                                ) from exc


def _identify(inp: AnalysisInputs) -> Identification:
    warns: list[str] = list(inp.notes)
    measured = inp.measured_dead_zone
    width = measured[0] if measured is not None else 0.0
    method = "breakaway ramps" if measured is not None and width > 0 else "none"
    if measured is not None and measured[1] == 0.0 and width > 0:
        method = "given"
    # an integrating loop under an asymmetric relay: the mean output at every amplitude says
    # the dead zone directly (it must hold the PV still)
    hold = _holding_estimate(inp)  # it suggests; the model comparison decides
    if hold is not None and hold.significant and measured is None:
        width = hold.value
    # first without the mode candidates: an unmeasured dead zone also spoils the fit
    an = _analyse(inp, width, modes=False)
    est = _stage_estimate(inp, an, width)
    d_final = inp.settings.amplitude
    # the search window of the joint fit: every estimate that shows a dead zone, with
    # JOINT_SIGMAS of its uncertainty (the ramps' spread, the stage swing's standard error)
    windows = []
    # a dead zone given without a spread (`autotune analyze --deadband U`) is taken as it is
    given = measured is not None and measured[1] == 0.0
    if given:
        est = None
    if est is not None and est.significant:
        windows.append((est.raw, est.sigma))
    if hold is not None and hold.significant and not given:
        windows.append((hold.raw, hold.sigma))
    if measured is not None and measured[0] > 0 and not given:
        windows.append((measured[0], max(measured[1], 0.01 * measured[0])))
    if windows:
        # each estimate with JOINT_SIGMAS of its uncertainty, and a tenth of itself at least
        half = [max(JOINT_SIGMAS * s, 0.1 * v) for v, s in windows]
        lo = max(0.0, min(v - h for (v, _), h in zip(windows, half, strict=True)))
        hi = max(v + h for (v, _), h in zip(windows, half, strict=True))
        if est is not None and est.stages:
            hi = min(hi, 0.95 * min(est.stages))
        width = _joint_dead_zone(inp, an, lo, hi)
        if width <= NEGLIGIBLE_FRACTION * d_final:  # it would move Ku by less than 1 %
            width = 0.0
        from_relay = (est is not None and est.significant) or (hold is not None and
                                                                hold.significant)
        from_ramps = measured is not None and measured[0] > 0
        method = ("relay amplitudes and breakaway ramps" if from_relay and from_ramps else
                  "breakaway ramps" if from_ramps else "relay amplitudes")
        an = _analyse(inp, width, modes=False)
        # the model with the dead zone out carries the stages better: measure once more
        again = _stage_estimate(inp, an, width)
        sigma = min(s for _, s in windows)
        if again is not None:
            sigma = min(sigma, again.sigma)
            est = again
        sigma = max(sigma, 0.5 * min(abs(v - width) for v, _ in windows))
        est = (replace(est, value=width, significant=width > 0, sigma=sigma)
               if est is not None else DeadZoneEstimate(width, width, sigma, width > 0, (),
                                                        method))
        if from_relay and from_ramps and abs(windows[0][0] - measured[0]) > \
                JOINT_SIGMAS * math.hypot(windows[0][1], windows[-1][1]):
            warns.append(f"the breakaway ramps found a dead zone of {measured[0]:.3g} but the "
                         f"swing at the relay amplitudes says {windows[0][0]:.3g}: friction "
                         "that differs at rest and in motion, or backlash; the figure that "
                         f"explains the whole record best ({width:.3g}) was used")
    if (measured is None and est is not None and len(set(est.stages)) >= 2
            and (hold is None or not hold.significant)):
        # the swing at two amplitudes may scatter too much to show the dead zone (or to place
        # it): the whole record, through the change of amplitude, may still tell it; taken
        # only when the fit says so plainly (FIT_DEAD_ZONE_GAIN)
        floor = max(inp.noise_std, (inp.resolution or 0.0) / math.sqrt(12.0))

        def misfit(residual: float) -> float:  # beyond the PV noise (PV units)
            return math.sqrt(max(residual ** 2 - floor ** 2, 0.0))

        found = width
        if an.model.residual > FIT_MISS_FLOOR * floor:
            found = _joint_dead_zone(inp, an, 0.0, 0.95 * min(est.stages))
        if abs(found - width) > NEGLIGIBLE_FRACTION * d_final:
            trial = _analyse(inp, found, modes=False)
            if misfit(trial.model.residual) <= FIT_DEAD_ZONE_GAIN * misfit(an.model.residual):
                swing = (est.detail or {}).get("measured", est.raw)
                sigma = max(0.1 * found, 0.5 * abs(found - width))
                note = (f"{est.note}; the swing alone ({swing:.3g}) could not place it"
                        if width > 0 else
                        f"{est.note}; the swing alone could not show it")
                width, an, method = found, trial, "model fit through the relay amplitudes"
                est = replace(est, value=found, significant=True, sigma=sigma, note=note)
    if not an.model.reliable:
        an = _analyse(inp, width, modes=True)
    if width > 0:
        share = width / max(d_final, 1e-300)
        sigma = est.sigma if est is not None else (measured[1] if measured else 0.0)
        inflation = d_final / max(d_final - width, 1e-300) - 1.0
        warns.append(f"a dead zone of {width:.3g} +/- {sigma:.2g} (output units, "
                     f"{100 * share:.0f}% of the relay amplitude; {method}) was taken out: "
                     f"the plain figures would put Ku {100 * inflation:.0f}% high; the gains "
                     "proposed act on the loop behind it, so expect a slower response to "
                     "small errors")
    warns.extend(an.warnings)
    # ---- plain figures of the relay as it ran (no dead-zone correction)
    ku_df, tu_df = df_estimate(an.cycles, amplitude_d=an.amplitude_d + width,
                               hysteresis=an.hysteresis)
    # ---- static gain / velocity gain / normalised dead time
    tf = an.model.tf
    unc = an.uncertainty
    k = kv = k_unc = kv_unc = None
    integrating = tf.is_integrating
    candidates = an.model.candidates
    checks = an.model.checks
    if integrating:
        kv = float(tf.velocity_gain) if tf.integrators == 1 else None
        others = [c.tf.velocity_gain for kind, c in candidates.items()
                  if c.tf.integrators == 1 and kind != an.model.kind and
                  getattr(checks.get(kind), "passed", False)]
        if kv is not None:
            kv_unc = max([abs(o / kv - 1) for o in others] + [unc["ultimate_gain"]])
    else:
        k = float(tf.static_gain)
        others = [c.tf.static_gain for kind, c in candidates.items()
                  if not c.tf.is_integrating and kind != an.model.kind and
                  getattr(checks.get(kind), "passed", False)]
        spread = [abs(o / k - 1) for o in others if math.isfinite(o)]
        k_unc = max(spread + [2.0 * unc["ultimate_gain"]])
        dc = an.dc
        if dc is not None and dc.gain is not None and math.isfinite(dc.sigma):
            k_unc = min(k_unc, max(abs(dc.gain / k - 1), dc.sigma / abs(k)))
            k_unc = max(k_unc, 1e-3)
    tau = tau_unc = None
    if an.tau is not None:
        tau, tau_unc = an.tau
    elif not integrating and "delay" in an.model.params:
        lags = sum(v for key, v in an.model.params.items()
                   if key in ("time_constant", "t1", "t2"))
        if an.model.kind == "lag_n":
            lags = an.model.params["time_constant"] * an.model.params.get("order", 1.0)
        lag = an.model.params["delay"]
        if lag + lags > 0:
            tau, tau_unc = lag / (lag + lags), 0.1
    # ---- the measured points for a design checked against them
    points = [MeasuredPoint(p.w, p.g, p.uncertainty, p.harmonic) for p in an.fourier]
    if an.dc is not None and an.dc.gain is not None and not integrating:
        points.insert(0, MeasuredPoint(0.0, complex(an.dc.gain, 0.0),
                                       an.dc.sigma / max(abs(an.dc.gain), 1e-300), 0))
    # ---- time with the motor powered
    pt = pt_tu = relay_tu = None
    if inp.t_first_motion is not None:
        pt = inp.t_powered_end - inp.t_first_motion
        pt_tu = pt / an.tu if an.tu > 0 else None
        relay_tu = (inp.t_relay_end - inp.t_first_motion) / an.tu if an.tu > 0 else None
    return Identification(
        analysis=an, inputs=inp, dead_zone=est, dead_zone_used=width,
        dead_zone_method=method, static_gain=k, static_gain_uncertainty=k_unc,
        velocity_gain=kv, velocity_gain_uncertainty=kv_unc, normalized_dead_time=tau,
        normalized_dead_time_uncertainty=tau_unc, points=tuple(points), ku_df=ku_df,
        tu_df=tu_df, powered_time=pt, powered_time_tu=pt_tu, relay_time_tu=relay_tu,
        warnings=tuple(dict.fromkeys(warns)), reliable=an.model.reliable)


# ---------------------------------------------------------------------------- result
def result_fields(ident: Identification) -> dict[str, Any]:
    """The result.json fields the identification owns (contract names; extra fields welcome)."""
    an = ident.analysis
    m = an.model
    dz = ident.dead_zone
    unc = dict(an.uncertainty)
    unc["static_gain"] = ident.static_gain_uncertainty
    unc["velocity_gain"] = ident.velocity_gain_uncertainty
    unc["normalized_dead_time"] = ident.normalized_dead_time_uncertainty
    dz_sigma = dz.sigma if dz is not None else None
    if dz_sigma is None and ident.inputs.measured_dead_zone is not None:
        dz_sigma = ident.inputs.measured_dead_zone[1]
    unc["dead_zone"] = dz_sigma
    unc["ultimate_gain_df"] = an.uncertainty["ultimate_gain_df"]
    s = ident.inputs.settings
    return {
        "ultimate_gain": an.ku,
        "ultimate_period": an.tu,
        "ultimate_gain_df": ident.ku_df,
        "ultimate_period_df": ident.tu_df,
        "ultimate_gain_with_hold": an.ku_with_hold,
        "ultimate_period_with_hold": an.tu_with_hold,
        "static_gain": ident.static_gain,
        "velocity_gain": ident.velocity_gain,
        "normalized_dead_time": ident.normalized_dead_time,
        "dead_zone": ident.dead_zone_used,
        "powered_time": ident.powered_time,
        "powered_time_tu": ident.powered_time_tu,
        "uncertainty": unc,
        "model": {"kind": m.kind, "params": dict(m.params), "residual": m.residual,
                  "num": list(m.tf.num), "den": list(m.tf.den), "delay": m.tf.delay,
                  "reliable": m.reliable,
                  "checks": {k: c.as_dict() for k, c in m.checks.items()},
                  "candidates": {k: {"params": dict(c.params), "residual": c.residual,
                                     "aic": c.aic} for k, c in m.candidates.items()}},
        "predictions_reliable": ident.reliable,
        "cycles_used": an.cycles_used,
        "cycles_to_converge": an.cycles_to_converge,
        "converged": an.converged,
        "relay": {"amplitude": s.amplitude, "hysteresis": an.hysteresis, "bias": an.bias,
                  "asymmetry": s.asymmetry, "centre": s.centre,
                  "effective_amplitude": an.amplitude_d},
        "oscillation": {"amplitude": an.amplitude, "period": an.tu_df,
                        "noise_std": an.noise_std, "tick": an.ts, "resolution": an.resolution},
        "fourier": [p.as_dict() for p in an.fourier],
        "points": [p.as_dict() for p in ident.points],
        "identification": {
            "dead_zone": {"value": ident.dead_zone_used, "method": ident.dead_zone_method,
                          "uncertainty": dz_sigma,
                          "estimate": dz.as_dict() if dz is not None else None,
                          "ramps": (None if ident.inputs.measured_dead_zone is None else
                                    {"value": ident.inputs.measured_dead_zone[0],
                                     "spread": ident.inputs.measured_dead_zone[1]})},
            "static_gain_measured": an.dc.as_dict() if an.dc is not None else None,
            "integrating": m.tf.is_integrating,
            "likely_cause": an.likely_cause,
            "relay_time_tu": ident.relay_time_tu,
        },
        "delays_included": an.delays_included,
        "delays_note": DELAYS_NOTE,
        "estimates": list(an.estimates),
        "warnings": list(ident.warnings),
    }
