"""Does a fitted model agree with what the relay experiment measured?

Pure functions. A candidate model (autotune.core.lti.DelayedTF; output units in, PV units out)
is checked against
- the measured frequency-response points (autotune.core.harmonics.FourierPoint: w, 3w, 5w and,
  under an asymmetric relay, 2w and 4w): it must reproduce each within CHECK_SIGMAS of the
  point's uncertainty, and at least within POINT_TOLERANCE (the fundamental) or
  HARMONIC_TOLERANCE (the higher harmonics) where the uncertainty is smaller than what
  low-order models can honestly promise;
- the static gain measured from an asymmetric relay (`DcPoint`), within its uncertainty;
- what the record can show: a self-regulating model whose slowest time constant is far longer
  than the record, or whose static gain disagrees with a measured one, is not offered (a lag
  of 3782 s fitted to 10 s of data says only "integrating"); an integrating model is not
  offered where the measured mean output shows the loop settles.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from autotune.core.harmonics import FourierPoint
from autotune.core.lti import DelayedTF

CHECK_SIGMAS = 3.0
POINT_TOLERANCE = 0.03  # relative miss a good low-order model may show at the fundamental
HARMONIC_TOLERANCE = 0.12  # ... and at the higher harmonics (common practice, no source)
SLOWEST_FACTOR = 1.0  # a lag longer than the record is beyond it: the record shows less than
#                       two thirds of its settling (common practice, no source)
DC_TOLERANCE = 0.05  # relative miss of the static gain a good model may show


@dataclass(frozen=True)
class DcPoint:
    """The static gain measured from an asymmetric relay over whole steady periods.

    gain: mean PV change over mean output change (PV units per output unit), None when the
    mean output did not move measurably; sigma: its standard error (same units);
    du, du_sigma: the mean output's shift from the operating point and its standard error
    (output units): near 0 in periodic steady state means an integrating loop (its PV holds
    still only at one output); settled: the mean PV stopped drifting over the cycles; dy,
    dy_sigma: the mean PV's shift and its standard error (PV units; NaN: not known).
    """

    gain: float | None
    sigma: float
    du: float
    du_sigma: float
    settled: bool
    detail: dict[str, Any] = field(default_factory=dict)
    dy: float = math.nan
    dy_sigma: float = math.nan

    def misfit(self, k: float) -> float:
        """How far a static gain `k` (PV units per output unit) lies from the two measured
        means, in standard errors: |dy - k du| / sqrt(dy_sigma^2 + k^2 du_sigma^2).

        The test of a hypothesised ratio behind Fieller's confidence interval (Fieller, "Some
        problems in interval estimation", J. Royal Statistical Society B 16, 1954): unlike the
        ratio's linearised standard error it stays honest when the mean output moved only a
        few of its standard errors (then dy/du is skewed: a mean output a little high makes
        the ratio much too low). Falls back on the ratio's own error when dy is not known."""
        if not (math.isfinite(self.dy) and math.isfinite(self.dy_sigma)):
            if self.gain is None or not math.isfinite(self.sigma) or self.sigma <= 0:
                return math.inf
            return abs(k - self.gain) / self.sigma
        scale = math.hypot(self.dy_sigma, k * self.du_sigma)
        return abs(self.dy - k * self.du) / max(scale, 1e-300)

    @property
    def self_regulating(self) -> bool:
        """The mean output moved far beyond its uncertainty while the PV settled, the two in
        the loop's own direction (a positive gain: the direction check has made the loop's sign
        positive): the loop has a finite static gain. A negative ratio is no such evidence:
        behind a dead zone an integrating loop holds its PV with the mean output off its
        operating point, by an amount the relay's duty sets, not the PV."""
        return (self.settled and abs(self.du) > 4.0 * self.du_sigma and self.gain is not None
                and self.gain > 0.0)

    def as_dict(self) -> dict[str, Any]:
        return {"gain": self.gain, "uncertainty": self.sigma, "mean_output_shift": self.du,
                "mean_output_shift_uncertainty": self.du_sigma, "settled": self.settled,
                **self.detail}


@dataclass(frozen=True)
class ModelCheck:
    """Outcome for one candidate: passed (all checks), plausible (not rejected outright),
    misses per harmonic (relative), the static-gain miss (relative, None when not checked),
    and the reasons it failed, in words."""

    passed: bool
    plausible: bool
    misses: dict[int, float]
    dc_miss: float | None
    reasons: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        return {"passed": self.passed, "plausible": self.plausible,
                "misses": {str(k): v for k, v in self.misses.items()},
                "static_gain_miss": self.dc_miss, "reasons": list(self.reasons)}


def point_allowance(p: FourierPoint) -> float:
    """Largest relative miss a model may show at point `p`."""
    floor = POINT_TOLERANCE if p.harmonic == 1 else HARMONIC_TOLERANCE
    return max(CHECK_SIGMAS * p.uncertainty, floor)


def slowest_time_constant(tf: DelayedTF) -> float:
    """Longest time constant (s) of the model's stable poles (1 / |smallest real part|);
    0 for a static model; integrator poles (at 0) are not counted."""
    if len(tf.den) < 2:
        return 0.0
    poles = np.roots(tf.den)
    re = [abs(float(p.real)) for p in poles if abs(p) > 1e-12 * max(1.0, float(np.max(
        np.abs(poles))))]
    re = [r for r in re if r > 0]
    return 1.0 / min(re) if re else math.inf


def check_model(tf: DelayedTF, points: Sequence[FourierPoint], dc: DcPoint | None,
                record_span: float) -> ModelCheck:
    """Check one candidate against the points, the measured static gain and the record.

    record_span: length of the record (s). See the module docstring for the rules.
    """
    reasons: list[str] = []
    misses: dict[int, float] = {}
    ok = True
    plausible = True
    if not (all(math.isfinite(c) for c in tf.num + tf.den) and math.isfinite(tf.delay)):
        return ModelCheck(False, False, {}, None, ("not a finite model",))
    for p in points:
        g = complex(tf.freq_response(p.w))
        miss = abs(g - p.g) / max(abs(p.g), 1e-300)
        misses[p.harmonic] = float(miss)
        if not miss <= point_allowance(p):
            ok = False
            reasons.append(f"misses the measured response at {p.harmonic} x the oscillation "
                           f"frequency by {100 * miss:.0f}%")
    dc_miss = None
    if tf.is_integrating:
        if dc is not None and dc.self_regulating:
            ok = plausible = False
            reasons.append("integrating, but the mean output moved and the PV settled: the "
                           "loop is self-regulating")
    else:
        k = tf.static_gain
        slow = slowest_time_constant(tf)
        agrees = False
        if dc is not None and dc.gain is not None:
            dc_miss = abs(k - dc.gain) / max(abs(dc.gain), 1e-300)
            z = dc.misfit(k)
            agrees = dc_miss <= DC_TOLERANCE or z <= CHECK_SIGMAS
            if not agrees:
                ok = False
                reasons.append(f"its static gain ({k:.4g}) is off the measured one "
                               f"({dc.gain:.4g} +/- {dc.sigma:.2g})")
                if dc.settled and dc_miss > 3.0 * DC_TOLERANCE and z > 3.0 * CHECK_SIGMAS:
                    plausible = False
        if slow > SLOWEST_FACTOR * record_span and not (
                dc is not None and dc.self_regulating and agrees):
            ok = plausible = False
            reasons.append(f"a time constant of {slow:.3g} s lies far beyond the "
                           f"{record_span:.3g} s record (gain {k:.3g}): the record shows "
                           "only an integrating loop")
    return ModelCheck(ok, plausible, misses, dc_miss, tuple(reasons))
