"""Verdict on a confirmation step: measured figures beside the predicted ones, judged on a spec.

Pure module (no I/O, no clock). Figures use the units of autotune.core.metrics.StepMetrics:
overshoot in percent of the step size, rise/settling/saturated times in seconds, IAE in
PV units x seconds, peak output in output units. Gains are parallel form (output units per PV
unit, ki per second, kd in seconds).

The spec (`StepSpec`, defaults from the config's [spec] table) is stated in full and every
check is written beside its limit and where that limit came from:
- overshoot at most the predicted overshoot plus `overshoot_margin` points, and at most
  `max_overshoot` percent;
- settled (on the labelled band, 2 % of the step by default) within `settling_factor` times the
  predicted settling time on the same band, and within `max_settling_time` when one is set;
- no sustained oscillation: successive swings with a decay ratio below `max_decay_ratio`;
- at most `max_time_saturated` seconds with the output at its limit.
A check that cannot be judged (nothing measured, no limit to judge against, a record too short)
says so and why, and the step then does not pass: "not judged" never reads as a pass.

The suggested action after a step:
- ``accept``: every check of the spec passed;
- ``detune``: oscillating, too much overshoot or too long in saturation: a gentler design is
  needed (the reason names the oscillation and its period when there is one);
- ``try_other``: well damped but too slow for the settling limit: a more aggressive proposal
  is needed (a gentler one would only be slower);
- ``repeat``: the step gave no usable figures (stopped early, a figure missing) and no limit is
  clearly broken. An oscillating step is never sent back to "repeat".
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

DEFAULT_DETUNE = 0.7  # factor applied to every gain by the detune action (common practice, no source)

# Figures compared side by side, with their units (order = display order).
FIGURES: tuple[tuple[str, str], ...] = (
    ("overshoot", "%"),
    ("rise_time", "s"),
    ("settling_time", "s"),
    ("steady_state_error", "PV"),
    ("iae", "PV·s"),
    ("peak_output", "out"),
    ("time_saturated", "s"),
)

PASS, FAIL, NOT_JUDGED = "pass", "fail", "not judged"


class Action(StrEnum):
    """What to do after a step."""

    ACCEPT = "accept"
    DETUNE = "detune"
    TRY_OTHER = "try_other"
    REPEAT = "repeat"


@dataclass(frozen=True)
class StepSpec:
    """What a confirmation step must show; None switches a limit off.

    max_overshoot: percent of the step, absolute cap; overshoot_margin: percentage points
    allowed above the predicted overshoot; max_settling_time: s, absolute (the user's own
    limit); settling_factor: settled within this many times the predicted settling time;
    max_time_saturated: s the output may sit at its limit; max_decay_ratio: successive swings
    at or above this ratio are a sustained oscillation (stops the step early); settle_band:
    settling band half-width as a fraction of the step; noisy_band: the band used instead when
    the PV noise alone exceeds `settle_band` (labelled so).
    Defaults: the default spec of the config's [spec] table (autotune.config.SpecConfig).
    """

    max_overshoot: float | None = 25.0
    max_settling_time: float | None = None
    max_time_saturated: float | None = 0.25
    overshoot_margin: float | None = 5.0
    settling_factor: float | None = 2.0
    max_decay_ratio: float | None = 0.5
    settle_band: float = 0.02
    noisy_band: float = 0.05

    def __post_init__(self) -> None:
        if not 0.0 < self.settle_band < 1.0 or not 0.0 < self.noisy_band < 1.0:
            raise ValueError("settle_band and noisy_band must lie between 0 and 1")
        if self.noisy_band < self.settle_band:
            raise ValueError("noisy_band must be at least settle_band")

    def to_dict(self) -> dict[str, float | None]:
        return dataclasses.asdict(self)

    def overshoot_limit(self, predicted: float | None, noise_points: float = 0.0
                        ) -> tuple[float | None, str]:
        """The overshoot limit (%) and where it comes from, for a predicted overshoot (%).

        noise_points: percentage points of the step the PV noise can add to a measured peak
        (the noise amplitude left after the smoothing over the step size); it widens the
        margin on the prediction, never the absolute cap `max_overshoot`."""
        parts: list[tuple[float, str]] = []
        if self.max_overshoot is not None:
            parts.append((self.max_overshoot, f"at most {self.max_overshoot:g} %"))
        if self.overshoot_margin is not None and _finite(predicted):
            assert predicted is not None
            noise = max(0.0, float(noise_points)) if _finite(noise_points) else 0.0
            extra = f" + {noise:.2g} points of PV noise" if noise >= 0.05 else ""
            parts.append((predicted + self.overshoot_margin + (noise if extra else 0.0),
                          f"predicted {predicted:.3g} % + {self.overshoot_margin:g} points"
                          + extra))
        if not parts:
            return None, "no overshoot limit in the spec"
        return min(parts, key=lambda p: p[0])

    def settling_limit(self, predicted: float | None, band_label: str = "2 % band"
                       ) -> tuple[float | None, str]:
        """The settling-time limit (s) and where it comes from, for a predicted settling time
        (s, on the band named `band_label`)."""
        parts: list[tuple[float, str]] = []
        if self.max_settling_time is not None:
            parts.append((self.max_settling_time, f"at most {self.max_settling_time:g} s"))
        if self.settling_factor is not None and _finite(predicted) and predicted is not None \
                and predicted > 0:
            parts.append((self.settling_factor * predicted,
                          f"{self.settling_factor:g} x predicted {predicted:.3g} s "
                          f"({band_label})"))
        if not parts:
            return None, "no predicted settling time and no max_settling_time"
        return min(parts, key=lambda p: p[0])


def spec_from_config(cfg: Any) -> StepSpec:
    """The StepSpec of an autotune.config.Config: its [spec] table, with the user's design
    limits (design.max_overshoot, design.max_settling_time) binding where they are tighter."""
    s, d = cfg.spec, cfg.design
    cap = s.max_overshoot
    if d.max_overshoot is not None:
        cap = d.max_overshoot if cap is None else min(cap, d.max_overshoot)
    return StepSpec(max_overshoot=cap, max_settling_time=d.max_settling_time,
                    max_time_saturated=s.max_saturation, overshoot_margin=s.overshoot_margin,
                    settling_factor=s.settling_factor, max_decay_ratio=s.max_decay_ratio,
                    settle_band=s.settle_band, noisy_band=s.noisy_band)


def _finite(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


@dataclass(frozen=True)
class FigureRow:
    """One figure measured and predicted; `difference` = measured - predicted (None if unknown),
    `relative` = difference / |predicted| (None if predicted is 0 or unknown); `label` says
    what the figure was measured on (e.g. the settling band), "" when nothing needs saying."""

    name: str
    unit: str
    measured: float | None
    predicted: float | None
    difference: float | None
    relative: float | None
    label: str = ""

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class Check:
    """One spec item: `value` against `limit` (same units, `unit`), with `basis` saying where the
    limit comes from. status: "pass", "fail", "not judged" (nothing measured or nothing to
    judge against: never a pass) or "off" (switched off in the spec); passed is status "pass"
    or "off"."""

    name: str
    value: float | None
    limit: float | None
    passed: bool
    message: str
    status: str = PASS
    basis: str = ""
    unit: str = ""

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class Verdict:
    """Result of judging one step on a spec.

    passed: every check passed (or is switched off); status: "pass", "fail", "oscillating" or
    "not judged"; reason: one line for the operator; oscillation: period (s) and decay ratio of
    a sustained oscillation, None when there was none; spec: the spec judged against.
    """

    passed: bool
    checks: tuple[Check, ...]
    action: Action
    reason: str
    status: str = PASS
    oscillation: dict[str, float] | None = None
    spec: dict[str, Any] | None = None

    def check(self, name: str) -> Check | None:
        """The check called `name`, if the verdict has one."""
        return next((c for c in self.checks if c.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        return {
            "passed": self.passed,
            "status": self.status,
            "action": self.action.value,
            "reason": self.reason,
            "checks": [c.to_dict() for c in self.checks],
            "oscillation": self.oscillation,
            "spec": self.spec,
        }


def figures_of(metrics: Any) -> dict[str, float | None]:
    """Plain dict of figures from a StepMetrics dataclass or a mapping (non-finite -> None)."""
    if dataclasses.is_dataclass(metrics) and not isinstance(metrics, type):
        raw = dataclasses.asdict(metrics)
    elif isinstance(metrics, Mapping):
        raw = dict(metrics)
    else:
        raise TypeError(f"expected step metrics, got {type(metrics).__name__}")
    out: dict[str, float | None] = {}
    for key, value in raw.items():
        if isinstance(value, bool) or value is None:
            out[key] = None if value is None else float(value)
        elif isinstance(value, int | float):
            out[key] = float(value) if math.isfinite(value) else None
    return out


def compare(measured: Any, predicted: Mapping[str, Any] | None,
            labels: Mapping[str, str] | None = None) -> list[FigureRow]:
    """Measured figures beside the predicted ones, with the difference (measured - predicted);
    `labels` (figure name -> text) say what a figure was measured on."""
    m = figures_of(measured)
    p = figures_of(predicted or {})
    labels = labels or {}
    rows: list[FigureRow] = []
    for name, unit in FIGURES:
        mv, pv = m.get(name), p.get(name)
        diff = None if mv is None or pv is None else mv - pv
        rel = None if diff is None or not pv else diff / abs(pv)
        rows.append(FigureRow(name, unit, mv, pv, diff, rel, labels.get(name, "")))
    return rows


def _value_check(name: str, value: float | None, limit: float | None, basis: str,
                 unit: str, off: bool = False) -> Check:
    label = name.replace("_", " ")
    if off:
        return Check(name, value, None, True, f"{label}: switched off in the spec", "off",
                     basis, unit)
    if limit is None:
        return Check(name, value, None, False, f"{label} not judged: {basis}", NOT_JUDGED,
                     basis, unit)
    if value is None:
        return Check(name, None, limit, False, f"{label} not judged: not measured",
                     NOT_JUDGED, basis, unit)
    ok = value <= limit + 1e-12
    rel = "<=" if ok else ">"
    return Check(name, value, limit, ok,
                 f"{label} {value:.3g} {unit} {rel} {limit:.3g} {unit} ({basis})",
                 PASS if ok else FAIL, basis, unit)


def _settling_check(value: float | None, settled: bool, spec: StepSpec,
                    predicted: float | None, record: float | None, band_label: str,
                    band_judged: bool, band_note: str) -> Check:
    name, unit = "settling_time", "s"
    if spec.settling_factor is None and spec.max_settling_time is None:
        return _value_check(name, value, None, "", unit, off=True)
    limit, basis = spec.settling_limit(predicted, band_label)
    if not band_judged:
        return Check(name, value, limit, False, f"settling time not judged: {band_note}",
                     NOT_JUDGED, basis, unit)
    if limit is None:
        if record is None:
            return _value_check(name, value, None, basis, unit)
        limit, basis = record, f"no predicted settling time: settled within the {record:.3g} s record"
    if settled and value is not None:
        return _value_check(name, value, limit, basis, unit)
    if record is not None and record + 1e-9 < limit:
        return Check(name, None, limit, False,
                     f"settling time not judged: the record ({record:.3g} s) ended before the "
                     f"limit ({limit:.3g} s, {basis})", NOT_JUDGED, basis, unit)
    where = f"the {record:.3g} s record" if record is not None else "the record"
    return Check(name, None, limit, False,
                 f"not settled within {where} ({band_label}; limit {limit:.3g} s, {basis})",
                 FAIL, basis, unit)


def _oscillation_check(spec: StepSpec, oscillation: Any, decay_ratio: float | None) -> Check:
    name = "oscillation"
    limit = spec.max_decay_ratio
    if limit is None:
        return _value_check(name, decay_ratio, None, "", "", off=True)
    basis = f"successive swings with a decay ratio below {limit:g}"
    if oscillation is not None:
        o = _as_mapping(oscillation)
        dr = o.get("decay_ratio")
        what = (f"decay ratio {dr:.2f} >= {limit:g}" if _finite(dr) else
                str(o.get("cause") or "the PV left the predicted response"))
        return Check(name, dr if _finite(dr) else None, limit, False,
                     f"oscillating (period {float(o['period']):.3g} s, {what})", FAIL, basis)
    if decay_ratio is None:
        return Check(name, None, limit, True,
                     "no sustained oscillation (no second swing beyond the band)", PASS, basis)
    return Check(name, decay_ratio, limit, True,
                 f"no sustained oscillation (decay ratio {decay_ratio:.2f} < {limit:g})",
                 PASS, basis)


def _as_mapping(o: Any) -> dict[str, Any]:
    if isinstance(o, Mapping):
        return dict(o)
    if dataclasses.is_dataclass(o) and not isinstance(o, type):
        return dataclasses.asdict(o)
    raise TypeError(f"expected an oscillation record, got {type(o).__name__}")


def oscillating_reason(period: float) -> str:
    """The verdict's words for a sustained oscillation of `period` seconds."""
    return f"oscillating (period {period:.3g} s): detune"


def judge(measured: Any, spec: StepSpec | None = None, *, settled: bool = True,
          predicted: Mapping[str, Any] | None = None, record: float | None = None,
          oscillation: Any = None, decay_ratio: float | None = None,
          band_label: str = "2 % band", band_judged: bool = True,
          band_note: str = "", noise_points: float = 0.0) -> Verdict:
    """Judge a step's figures against `spec` (None: the default StepSpec) and suggest the next
    action.

    measured: StepMetrics (or a mapping) on the labelled band; predicted: the predicted figures
    on the same band (overshoot %, settling_time s); settled: the PV was inside the band at the
    end of the record; record: s recorded after the step; oscillation: the sustained
    oscillation that stopped the step (period s, decay_ratio; a mapping or
    autotune.core.metrics.Oscillation), None when none; decay_ratio: the largest decay ratio
    seen otherwise (None: no second swing); band_judged False when the noise exceeds even the
    noisy band (`band_note` says so): settling is then not judged; noise_points: how far (points
    of the step) the PV noise left after the smoothing can lift the measured overshoot
    (`StepSpec.overshoot_limit`).
    """
    spec = StepSpec() if spec is None else spec
    m = figures_of(measured)
    p = figures_of(predicted or {})
    os_limit, os_basis = spec.overshoot_limit(p.get("overshoot"), noise_points)
    off_os = spec.max_overshoot is None and spec.overshoot_margin is None
    sat_basis = (f"at most {spec.max_time_saturated:g} s at the output limit"
                 if spec.max_time_saturated is not None else "")
    checks = (
        _value_check("overshoot", m.get("overshoot"), os_limit, os_basis, "%", off=off_os),
        _settling_check(m.get("settling_time"), settled, spec, p.get("settling_time"), record,
                        band_label, band_judged, band_note),
        _oscillation_check(spec, oscillation, decay_ratio),
        _value_check("time_saturated", m.get("time_saturated"), spec.max_time_saturated,
                     sat_basis if m.get("time_saturated") is not None
                     else "no output limit known", "s", off=spec.max_time_saturated is None),
    )
    spec_d = spec.to_dict()
    failed = [c for c in checks if c.status == FAIL]
    names = {c.name for c in failed}
    if "oscillation" in names:
        o = _as_mapping(oscillation)
        period = float(o["period"])
        return Verdict(False, checks, Action.DETUNE, oscillating_reason(period), "oscillating",
                       {k: float(v) for k, v in o.items() if _finite(v)}, spec_d)
    if not failed:
        pending = [c for c in checks if c.status == NOT_JUDGED]
        if not pending:
            return Verdict(True, checks, Action.ACCEPT, "the step meets the spec", PASS, None,
                           spec_d)
        return Verdict(False, checks, Action.REPEAT,
                       "meets what could be judged; " + "; ".join(c.message for c in pending),
                       NOT_JUDGED, None, spec_d)
    if "overshoot" in names or "time_saturated" in names:
        action = Action.DETUNE
    else:
        # Slow: a lively response (overshoot above half its limit) is detuned, a damped one
        # needs a more aggressive design (a gentler loop would settle later still).
        os_ = m.get("overshoot")
        lively = os_ is not None and os_limit is not None and os_ > 0.5 * os_limit
        action = Action.DETUNE if lively else Action.TRY_OTHER
    return Verdict(False, checks, action, "; ".join(c.message for c in failed), FAIL, None,
                   spec_d)


def detune_factor_ok(factor: float) -> bool:
    """A detune factor must lie in (0, 1): it scales every gain down."""
    return 0.0 < factor < 1.0


def detune(gains: Any, factor: float = DEFAULT_DETUNE) -> Any:
    """The same gains (a dataclass with kp, ki, kd, e.g. autotune.core.pid.PidGains) times `factor`."""
    if not detune_factor_ok(factor):
        raise ValueError(f"detune factor must lie between 0 and 1, got {factor!r}")
    return dataclasses.replace(
        gains, kp=gains.kp * factor, ki=gains.ki * factor, kd=gains.kd * factor
    )


def format_comparison(rows: list[FigureRow]) -> str:
    """Plain-text table: figure, measured, predicted, difference (for line-mode output)."""

    def f(v: float | None) -> str:
        return "-" if v is None else f"{v:.4g}"

    lines = [f"{'figure':<20}{'measured':>12}{'predicted':>12}{'difference':>12}"]
    for r in rows:
        label = f"{r.name} ({r.unit})"
        note = f"  [{r.label}]" if r.label else ""
        lines.append(f"{label:<20}{f(r.measured):>12}{f(r.predicted):>12}{f(r.difference):>12}"
                     f"{note}")
    return "\n".join(lines)
