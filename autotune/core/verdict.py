"""Verdict on a confirmation step: measured figures beside the predicted ones, judged on a spec.

Pure module (no I/O, no clock). Figures use the units of autotune.core.metrics.StepMetrics:
overshoot in percent of the step size, rise/settling/saturated times in seconds, IAE in
PV units x seconds, peak output in output units. Gains are parallel form (output units per PV
unit, ki per second, kd in seconds).

The suggested action after a step:
- ``accept``: every figure of the spec is met;
- ``detune``: too much overshoot or too long in saturation -> scale all gains by a factor
  (default 0.7) and repeat (common practice, no source);
- ``try_other``: the response is well damped but too slow for the settling-time limit -> a
  more aggressive proposal is needed (scaling down would only slow it further);
- ``repeat``: the step did not give usable figures (it did not settle within the timeout,
  or a figure is missing) and no limit is clearly broken.
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


class Action(StrEnum):
    """What to do after a step."""

    ACCEPT = "accept"
    DETUNE = "detune"
    TRY_OTHER = "try_other"
    REPEAT = "repeat"


@dataclass(frozen=True)
class StepSpec:
    """The user's requirements on the step response; None switches a check off.

    max_overshoot: percent of the step size; max_settling_time: seconds (2% band);
    max_time_saturated: seconds the output may sit at its limit.
    """

    max_overshoot: float | None = None
    max_settling_time: float | None = None
    max_time_saturated: float | None = None

    def to_dict(self) -> dict[str, float | None]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class FigureRow:
    """One figure measured and predicted; `difference` = measured - predicted (None if unknown),
    `relative` = difference / |predicted| (None if predicted is 0 or unknown)."""

    name: str
    unit: str
    measured: float | None
    predicted: float | None
    difference: float | None
    relative: float | None

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class Check:
    """One spec item: `value` against `limit` (same units), passed or not (None = not measured)."""

    name: str
    value: float | None
    limit: float
    passed: bool
    message: str


@dataclass(frozen=True)
class Verdict:
    """Result of judging one step on a spec."""

    passed: bool
    checks: tuple[Check, ...]
    action: Action
    reason: str  # one line for the operator

    def to_dict(self) -> dict[str, Any]:
        return {
            "passed": self.passed,
            "action": self.action.value,
            "reason": self.reason,
            "checks": [dataclasses.asdict(c) for c in self.checks],
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


def compare(measured: Any, predicted: Mapping[str, Any] | None) -> list[FigureRow]:
    """Measured figures beside the predicted ones, with the difference (measured - predicted)."""
    m = figures_of(measured)
    p = figures_of(predicted or {})
    rows: list[FigureRow] = []
    for name, unit in FIGURES:
        mv, pv = m.get(name), p.get(name)
        diff = None if mv is None or pv is None else mv - pv
        rel = None if diff is None or not pv else diff / abs(pv)
        rows.append(FigureRow(name, unit, mv, pv, diff, rel))
    return rows


def judge(measured: Any, spec: StepSpec, *, settled: bool = True) -> Verdict:
    """Judge a step's figures against `spec` and suggest the next action.

    `settled` is False when the run ended on its timeout before the PV settled; such a step can
    still fail on overshoot or saturation, but a pass is not claimed from it.
    """
    m = figures_of(measured)
    checks: list[Check] = []

    def add(name: str, value: float | None, limit: float | None, unit: str) -> None:
        if limit is None:
            return
        if value is None:
            checks.append(Check(name, None, limit, False, f"{name} not measured"))
            return
        ok = value <= limit + 1e-12
        rel = "<=" if ok else ">"
        checks.append(Check(name, value, limit, ok, f"{name} {value:.3g} {unit} {rel} {limit:.3g} {unit}"))

    overshoot = m.get("overshoot")
    settling = m.get("settling_time")
    saturated = m.get("time_saturated")
    add("overshoot", overshoot, spec.max_overshoot, "%")
    add("settling_time", settling if settled else None, spec.max_settling_time, "s")
    add("time_saturated", saturated, spec.max_time_saturated, "s")

    failed = [c for c in checks if not c.passed]
    measured_failures = [c for c in failed if c.value is not None]
    if not failed and settled:
        return Verdict(True, tuple(checks), Action.ACCEPT, "the step meets the spec")
    names = {c.name for c in measured_failures}
    if "overshoot" in names or "time_saturated" in names:
        action = Action.DETUNE
    elif "settling_time" in names:
        # Slow but not oscillatory: a gentler loop would settle later still.
        lively = overshoot is not None and spec.max_overshoot is not None and (
            overshoot > 0.5 * spec.max_overshoot
        )
        action = Action.DETUNE if lively else Action.TRY_OTHER
    else:
        action = Action.REPEAT
    if measured_failures:
        reason = "; ".join(c.message for c in measured_failures)
    elif not settled:
        reason = "the PV did not settle within the timeout"
    else:
        reason = "; ".join(c.message for c in failed)
    return Verdict(False, tuple(checks), action, reason)


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
        lines.append(f"{label:<20}{f(r.measured):>12}{f(r.predicted):>12}{f(r.difference):>12}")
    return "\n".join(lines)
