"""Recorded conditions of one loop: which sessions belong together, what changed between them,
and what the design knows of each (pure: plain values in, plain values out).

A robot's loop meets several plants over its life (loads, floors, wear). Each relay session
gives the loop's figures (`LoopFigures`: Ku output units per PV unit, Tu s, static gain PV units
per output unit, dead time s, dead zone output units, the model's kind) with their
uncertainties, and a `design.Condition` (model, ultimate point, measured frequency-response
points). `loop_mismatch` refuses sessions of different loops; `compare_figures` lists the
change of every figure from the first session, whether it exceeds the uncertainty, and says in
one sentence what it means for gains tuned on the first.

Uncertainties are absolute, in the figure's units, taken as one standard deviation; a change
counts as real when it exceeds twice the combined uncertainty of the two sessions (about 95 %
for a normal error; common practice, no source). None: unknown, the change is not judged.
"""

from __future__ import annotations

import cmath
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from types import SimpleNamespace
from typing import Any

import numpy as np

from autotune.core.design import Condition
from autotune.core.lti import DelayedTF
from autotune.core.robust import MeasuredPoint

# ---------------------------------------------------------------- which loop


@dataclass(frozen=True)
class LoopIdentity:
    """What makes two sessions the same loop: the board's axis, the PV and output units (None:
    not recorded) and the device tick (s; None: not recorded)."""

    axis: int = 0
    pv_units: str | None = None
    output_units: str | None = None
    tick: float | None = None


def loop_mismatch(names: Sequence[str], loops: Sequence[LoopIdentity]) -> str | None:
    """A sentence saying why the sessions are not one loop (the first one that differs from the
    first session), or None when they are. Units are compared where both sessions record them;
    ticks must agree within 1e-9 s."""
    ref_name, ref = names[0], loops[0]
    for name, lp in zip(names[1:], loops[1:], strict=True):
        why = None
        if lp.axis != ref.axis:
            why = f"axis {lp.axis} against axis {ref.axis}"
        elif lp.pv_units and ref.pv_units and lp.pv_units != ref.pv_units:
            why = f"PV in {lp.pv_units} against {ref.pv_units}"
        elif lp.output_units and ref.output_units and lp.output_units != ref.output_units:
            why = f"output in {lp.output_units} against {ref.output_units}"
        elif lp.tick is not None and ref.tick is not None and abs(lp.tick - ref.tick) > 1e-9:
            why = f"a {lp.tick:g} s tick against {ref.tick:g} s"
        if why:
            return (f"{name} is not the same loop as {ref_name} ({why}): compare and design "
                    "only sessions of one loop, at one tick")
    return None


# ---------------------------------------------------------------- what each session shows


@dataclass(frozen=True)
class LoopFigures:
    """One session's figures. ku (output units per PV unit), tu (s), static_gain (PV units per
    output unit; None for an integrating loop or when unknown), dead_time (s), dead_zone (output
    units; None: not measured), model (the fitted model's kind); uncertainty: absolute, per
    figure name (None or missing: unknown). converged: the relay converged and the analysis
    stands (else `reason` says why, and the session is listed but not designed on)."""

    name: str
    converged: bool
    reason: str = ""
    ku: float | None = None
    tu: float | None = None
    static_gain: float | None = None
    dead_time: float | None = None
    dead_zone: float | None = None
    model: str | None = None
    uncertainty: dict[str, float | None] = field(default_factory=dict)


FIGURES: tuple[tuple[str, str], ...] = (
    ("ku", "Ku"), ("tu", "Tu (s)"), ("static_gain", "static gain"), ("dead_time", "dead time (s)"),
    ("dead_zone", "dead zone"),
)

POINT_UNCERTAINTY_FLOOR = 0.02  # relative: no measured point is trusted better than 2 %
# (cycle-to-cycle variation, quantisation; common practice, no source)


def measured_points(fourier: Sequence[Any], static_gain: float | None = None,
                    static_uncertainty: float | None = None) -> tuple[MeasuredPoint, ...]:
    """Measured points from the relay's harmonics (objects with `w` rad/s, `g` complex and
    `snr`, as autotune.core.harmonics.FourierPoint) and the static gain when known.

    A harmonic's relative uncertainty is 2/snr (twice the noise's share of the PV component,
    the snr being |Y_k| over the noise on the coefficient), at least POINT_UNCERTAINTY_FLOOR;
    the static gain's is static_uncertainty (relative), at least the floor.
    """
    pts = [MeasuredPoint(float(p.w), complex(p.g),
                         max(POINT_UNCERTAINTY_FLOOR, 2.0 / max(float(p.snr), 1e-12)))
           for p in fourier]
    if static_gain is not None and math.isfinite(static_gain) and static_gain != 0.0:
        pts.append(MeasuredPoint(0.0, complex(static_gain),
                                 max(POINT_UNCERTAINTY_FLOOR, static_uncertainty or 0.0)))
    return tuple(pts)


def model_fits_points(model: DelayedTF, points: Sequence[MeasuredPoint]) -> bool:
    """Whether the model reproduces every measured point within its uncertainty:
    |G_model(j w) - g| <= u |g| (at w = 0, against the model's static gain)."""
    for p in points:
        gm = complex(model.static_gain) if p.w == 0.0 else complex(model.freq_response(p.w))
        if not np.isfinite(gm) or abs(gm - p.g) > p.uncertainty * abs(p.g):
            return False
    return True


def condition_of_analysis(name: str, analysis: Any) -> Condition:
    """The design's view of one analysed session (an autotune.core.analysis.RelayAnalysis):
    its model, refined ultimate point, measured points (`measured_points`) and whether the
    model reproduces them (`model_fits_points`)."""
    model = analysis.model.tf
    points = measured_points(analysis.fourier)
    return Condition(name, model, float(analysis.ku), float(analysis.tu), points,
                     model_fits_points(model, points))


def condition_of_identification(name: str, ident: Any) -> Condition:
    """The design's view of one identified loop (an autotune.core.identify.Identification):
    its model, refined ultimate point, the measured points it holds (the harmonics and the
    static gain; their one-sigma uncertainty doubled as a bound, at least
    POINT_UNCERTAINTY_FLOOR) and whether the model reproduces what was measured."""
    an = ident.analysis
    points = tuple(MeasuredPoint(p.w, p.g, max(POINT_UNCERTAINTY_FLOOR, 2.0 * p.uncertainty),
                                 p.harmonic) for p in ident.points)
    return Condition(name, an.model.tf, float(an.ku), float(an.tu), points,
                     bool(ident.reliable))


def condition_set_of_identification(name: str, ident: Any) -> tuple[Condition, ...]:
    """The conditions a design of one identified loop must hold on: its chosen model
    (`condition_of_identification`) and, when that model fails to reproduce what was measured
    (`ident.reliable` False), every other candidate model fitted to the same record with finite
    coefficients and a positive gain, as alternatives (`Condition.alternative`) sharing the
    measured points and ultimate point. A record no single model explains (a nonlinearity, a
    dead zone the swing did not show) may be closest to any of them: gains robust on all of
    them are robust on the loop where the chosen one alone is not."""
    first = condition_of_identification(name, ident)
    if ident.reliable:
        return (first,)
    out = [first]
    model = ident.analysis.model
    for kind, cand in getattr(model, "candidates", {}).items():
        tf = cand.tf
        if kind == model.kind:  # the chosen one, already first
            continue
        if not all(math.isfinite(c) for c in (*tf.num, *tf.den, tf.delay)):
            continue
        if not _positive_gain(tf):
            continue
        out.append(replace(first, name=f"{name} ({kind})", model=tf, alternative=True))
    return tuple(out)


def _positive_gain(tf: DelayedTF) -> bool:
    """The low-frequency gain is positive (the sign convention every design assumes): the
    lowest-order non-zero coefficients of numerator and denominator agree in sign."""
    num = next((c for c in reversed(tf.num) if c != 0.0), 0.0)
    den = next((c for c in reversed(tf.den) if c != 0.0), 0.0)
    return num * den > 0.0


def condition_of_result(name: str, result: Mapping[str, Any]) -> Condition:
    """The design's view of a result.json (a `tune` or `analyze` result): `model` (num, den,
    delay), `ultimate_gain`, `ultimate_period` and the `fourier` points (w rad/s, magnitude,
    phase_deg, snr). Raises ValueError when the result holds no model."""
    m = result.get("model")
    if not isinstance(m, Mapping) or "num" not in m or "den" not in m:
        raise ValueError("the result holds no fitted model")
    model = DelayedTF(tuple(m["num"]), tuple(m["den"]), float(m.get("delay") or 0.0))
    fourier = [SimpleNamespace(w=float(p["w"]),
                               g=float(p["magnitude"]) * cmath.exp(1j * math.radians(
                                   float(p["phase_deg"]))), snr=float(p["snr"]))
               for p in result.get("fourier") or []]
    points = measured_points(fourier)
    ku, tu = result.get("ultimate_gain"), result.get("ultimate_period")
    return Condition(name, model, None if ku is None else float(ku),
                     None if tu is None else float(tu), points,
                     model_fits_points(model, points))


def figures_of_analysis(name: str, analysis: Any, dead_zone: float | None = None
                        ) -> LoopFigures:
    """LoopFigures of an analysed session (RelayAnalysis): Ku and Tu with their uncertainty,
    the model's static gain and dead time, the dead zone the session measured (None: none
    measured).

    The relay experiment without bias fixes the static gain only through the model, so its
    uncertainty is left unknown here. The dead time's uncertainty is one tick plus the
    period's (s; common practice, no source): the dead time is read off the same phase lag
    that sets Tu, at a resolution of one sample.
    """
    model = analysis.model.tf
    ku, tu = float(analysis.ku), float(analysis.tu)
    unc = analysis.uncertainty
    k0 = None if model.is_integrating else float(model.static_gain)
    return LoopFigures(
        name, bool(analysis.converged),
        "" if analysis.converged else "the relay oscillation had not converged",
        ku, tu, k0, float(model.delay), dead_zone, str(analysis.model.kind),
        {"ku": unc.get("ultimate_gain", math.nan) * ku,
         "tu": unc.get("ultimate_period", math.nan) * tu,
         "static_gain": None,
         "dead_time": float(analysis.ts) + unc.get("ultimate_period", math.nan) * tu,
         "dead_zone": None})


def figures_of_identification(name: str, ident: Any) -> LoopFigures:
    """LoopFigures of an identified loop (autotune.core.identify.Identification): as
    `figures_of_analysis`, with the static gain measured by the asymmetric relay (and its
    uncertainty) where there is one, and the dead zone taken out of the output with its
    uncertainty."""
    dz = ident.dead_zone_used if ident.dead_zone_used > 0 else None
    figs = figures_of_analysis(name, ident.analysis, dead_zone=dz)
    unc = dict(figs.uncertainty)
    k0 = figs.static_gain
    if ident.static_gain is not None:
        k0 = float(ident.static_gain)
        rel = ident.static_gain_uncertainty
        unc["static_gain"] = None if rel is None else abs(rel * k0)
    if dz is not None and ident.dead_zone is not None:
        unc["dead_zone"] = ident.dead_zone.sigma
    return replace(figs, static_gain=k0, uncertainty=unc)


# ---------------------------------------------------------------- comparison


@dataclass(frozen=True)
class Change:
    """One figure of one session against the reference session: relative change (x/x_ref - 1;
    None where the reference is 0 or a value is missing), absolute difference, and whether it
    exceeds twice the combined uncertainty (None: an uncertainty is unknown)."""

    figure: str
    value: float | None
    relative: float | None
    difference: float | None
    exceeds: bool | None


@dataclass(frozen=True)
class Comparison:
    """Sessions against the first converged one (`reference`, an index into `figures`):
    changes[i] holds session i's Change per figure (empty for the reference and for sessions
    not converged); model_changed[i]: its model kind differs; sentence: what it means."""

    figures: tuple[LoopFigures, ...]
    reference: int | None
    changes: tuple[tuple[Change, ...], ...]
    model_changed: tuple[bool, ...]
    sentence: str


EXCEEDS_FACTOR = 2.0  # a change is real beyond this many combined standard uncertainties


def _change(name: str, ref: LoopFigures, cur: LoopFigures) -> Change:
    x0, x1 = getattr(ref, name), getattr(cur, name)
    if x0 is None or x1 is None:
        return Change(name, x1, None, None, None)
    diff = float(x1) - float(x0)
    rel = diff / abs(x0) if x0 != 0 else None
    u0, u1 = ref.uncertainty.get(name), cur.uncertainty.get(name)
    if u0 is None or u1 is None or not (math.isfinite(u0) and math.isfinite(u1)):
        exceeds = None
    else:
        exceeds = abs(diff) > EXCEEDS_FACTOR * math.hypot(u0, u1)
    return Change(name, float(x1), rel, diff, exceeds)


def _pct(rel: float) -> str:
    return f"{abs(rel) * 100:.0f} %"


def _what_changed(ref: LoopFigures, cur: LoopFigures, changes: Sequence[Change]
                  ) -> tuple[list[str], bool, bool]:
    """(phrases for the real changes, riskier for gains tuned on ref, gentler)."""
    by = {c.figure: c for c in changes}
    phrases: list[str] = []
    riskier = gentler = False
    ku = by["ku"]
    if ku.exceeds and ku.value and ref.ku:
        loop = ref.ku / ku.value - 1.0  # the loop's gain at its ultimate frequency is 1/Ku
        phrases.append(f"the loop's gain {'rose' if loop > 0 else 'fell'} by {_pct(loop)}")
        riskier |= loop > 0
        gentler |= loop < 0
    for name, label in (("dead_time", "dead time"), ("static_gain", "static gain"),
                        ("tu", "ultimate period")):
        c = by[name]
        if c.exceeds and c.relative is not None:
            phrases.append(f"{label} {'rose' if c.relative > 0 else 'fell'} by {_pct(c.relative)}")
            riskier |= c.relative > 0
            gentler |= c.relative < 0
    dz = by["dead_zone"]
    if dz.exceeds and dz.difference:
        phrases.append(f"the dead zone {'grew' if dz.difference > 0 else 'shrank'} by "
                       f"{abs(dz.difference):.3g} output units")
    return phrases, riskier, gentler


def compare_figures(figures: Sequence[LoopFigures]) -> Comparison:
    """Each session's figures against the first converged session, with the sentence.

    The sentence names, for every other converged session, the changes beyond the
    uncertainty (the loop's gain as 1/Ku, dead time, static gain, ultimate period, dead zone)
    and what they mean for gains tuned on the reference: a higher loop gain, dead time,
    static gain or ultimate period leaves those gains less margin ("may overshoot"); only
    lower ones make them slower than designed; no real change: they should hold.
    """
    figs = tuple(figures)
    ref_i = next((i for i, f in enumerate(figs) if f.converged), None)
    if ref_i is None:
        return Comparison(figs, None, tuple(() for _ in figs), tuple(False for _ in figs),
                          "no session has a converged relay: nothing to compare; tune again")
    ref = figs[ref_i]
    changes: list[tuple[Change, ...]] = []
    model_changed: list[bool] = []
    parts: list[str] = []
    for i, f in enumerate(figs):
        if i == ref_i or not f.converged:
            changes.append(())
            model_changed.append(False)
            continue
        row = tuple(_change(name, ref, f) for name, _ in FIGURES)
        changes.append(row)
        model_changed.append(f.model is not None and ref.model is not None and
                             f.model != ref.model)
        phrases, riskier, gentler = _what_changed(ref, f, row)
        if not phrases:
            parts.append(f"{f.name}: no change beyond the uncertainty; gains tuned on "
                         f"{ref.name} should hold")
        elif riskier:
            parts.append(f"{f.name}: {', '.join(phrases)}: gains tuned on {ref.name} may "
                         "overshoot")
        elif gentler:
            parts.append(f"{f.name}: {', '.join(phrases)}: gains tuned on {ref.name} will be "
                         "slower than designed")
        else:
            parts.append(f"{f.name}: {', '.join(phrases)}")
    skipped = [f.name for i, f in enumerate(figs) if i != ref_i and not f.converged]
    if skipped:
        parts.append(f"not compared (no converged relay): {', '.join(skipped)}")
    if len(figs) - len(skipped) < 2:
        parts.insert(0, "only one session with a converged relay")
    return Comparison(figs, ref_i, tuple(changes), tuple(model_changed), "; ".join(parts))
