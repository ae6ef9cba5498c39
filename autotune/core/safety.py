"""Host-side safety guard: checks every sample against the run's limits (pure, no clock).

Units: time in seconds (device time, from the samples), PV in PV units, output in output units.

Checks, in this order of precedence when one sample breaks several limits:
  sample_gap  t - t_prev > max_sample_gap (link trouble), or time not advancing (t <= t_prev:
              device reset or a corrupt sample); between consecutive samples seen by the guard
  pv_window   |pv - pv_start| > pv_window; a PV that is not a number also trips it
  pv_rate     |pv - pv_prev| / (t - t_prev) > pv_rate_limit. A hard limit: the rate is taken over
              the sample interval as it is, with no filtering, so a single spike big enough to
              exceed it trips the guard
  output      |out| > output_limit (1 ppm allowance for float32 transport); NaN trips it
  duration    t - t_start > max_duration
A limit given as None (or inf) is off; output_limit and pv_window are always on.

The guard latches: once a violation is found, every later `check` returns that same violation.
The reason string for result.json and session.jsonl is `Violation.reason` == f"limit:{which}".
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

from autotune.core.progress import LimitGauge

__all__ = ["LIMIT_NAMES", "SafetyGuard", "SafetyLimits", "Violation"]

LIMIT_NAMES = ("sample_gap", "pv_window", "pv_rate", "output", "duration")
_OUTPUT_ALLOWANCE = 1e-6  # relative; float32 carries about 7 significant digits


def _optional_positive(name: str, value: float | None) -> None:
    if value is not None and not value > 0:
        raise ValueError(f"{name} must be > 0 (or None for off), got {value!r}")


@dataclass(frozen=True)
class SafetyLimits:
    """Limits of one run.

    output_limit: |output| bound, output units. pv_window: the PV may move at most this far from
    its start value, PV units. pv_rate_limit: PV units per second. max_duration: seconds from
    t_start. max_sample_gap: longest allowed interval between samples, seconds.
    """

    output_limit: float
    pv_window: float
    pv_rate_limit: float | None = None
    max_duration: float | None = None
    max_sample_gap: float | None = None

    def __post_init__(self) -> None:
        for name in ("output_limit", "pv_window"):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a finite number > 0, got {v!r}")
        for name in ("pv_rate_limit", "max_duration", "max_sample_gap"):
            _optional_positive(name, getattr(self, name))

    def as_dict(self) -> dict[str, float | None]:
        return asdict(self)


@dataclass(frozen=True)
class Violation:
    """The first limit a run broke: which (one of LIMIT_NAMES), the offending value and the limit
    (units of that limit), device time t (s), and a one-line message for the operator."""

    which: str
    value: float
    limit: float
    t: float
    message: str

    @property
    def reason(self) -> str:
        """End reason for result.json / session.jsonl."""
        return f"limit:{self.which}"

    def as_dict(self) -> dict[str, Any]:
        return {**asdict(self), "reason": self.reason}


def _on(limit: float | None) -> bool:
    return limit is not None and math.isfinite(limit)


class SafetyGuard:
    """Checks samples against `limits`; `pv_start` (PV units) is the window's centre, `t_start`
    (device time, s) the start of the run for the duration limit."""

    def __init__(self, limits: SafetyLimits, pv_start: float, t_start: float) -> None:
        if not (math.isfinite(pv_start) and math.isfinite(t_start)):
            raise ValueError("pv_start and t_start must be finite numbers")
        self.limits = limits
        self.pv_start = float(pv_start)
        self.t_start = float(t_start)
        self.violation: Violation | None = None
        self._t_prev: float | None = None
        self._pv_prev: float | None = None
        # last values, for the gauges
        self._last_dev = 0.0
        self._last_rate = 0.0
        self._last_out = 0.0
        self._last_gap = 0.0
        self._last_t = self.t_start

    @property
    def tripped(self) -> bool:
        return self.violation is not None

    def check(self, t: float, pv: float, out: float) -> Violation | None:
        """Check one sample (t device time s, pv PV units, out applied output, output units)."""
        if self.violation is not None:
            return self.violation
        self._record(t, pv, out)
        v = self._first_violation(t, pv, out)
        if v is not None:
            self.violation = v
        self._t_prev, self._pv_prev = t, pv
        return v

    def _record(self, t: float, pv: float, out: float) -> None:
        """Keep the figures of this sample for the gauges (inf where a value is not a number)."""

        def mag(x: float) -> float:
            return abs(x) if math.isfinite(x) else math.inf

        if math.isfinite(t):
            if self._t_prev is not None and t > self._t_prev:
                self._last_gap = t - self._t_prev
                if self._pv_prev is not None:
                    self._last_rate = mag((pv - self._pv_prev) / self._last_gap)
            self._last_t = t
        self._last_dev = mag(pv - self.pv_start)
        self._last_out = mag(out)

    def _first_violation(self, t: float, pv: float, out: float) -> Violation | None:
        lim = self.limits
        rate: float | None = None
        if self._t_prev is not None:
            dt = t - self._t_prev
            if not dt > 0:
                return Violation("sample_gap", dt, 0.0, t,
                                 f"sample time did not advance (t={t:g} s after {self._t_prev:g}"
                                 " s): device reset or corrupt sample")
            gap = lim.max_sample_gap
            if gap is not None and _on(gap) and dt > gap:
                return Violation("sample_gap", dt, gap, t,
                                 f"no sample for {dt:.3g} s (limit {gap:g} s): link trouble")
            if self._pv_prev is not None and math.isfinite(self._pv_prev):
                rate = (pv - self._pv_prev) / dt
        elif not math.isfinite(t):
            return Violation("sample_gap", t, 0.0, t, f"sample time is not a number ({t!r})")
        dev = pv - self.pv_start
        if not abs(dev) <= lim.pv_window:
            what = (f"PV {pv:g} is {abs(dev):.4g} from its start value {self.pv_start:g}"
                    if math.isfinite(pv) else f"PV is not a number ({pv!r})")
            return Violation("pv_window", pv, lim.pv_window, t,
                             f"{what}: outside the PV window of +/-{lim.pv_window:g}")
        if rate is not None:
            rmax = lim.pv_rate_limit
            if rmax is not None and _on(rmax) and not abs(rate) <= rmax:
                return Violation("pv_rate", rate, rmax, t,
                                 f"PV changing at {rate:.4g} per s, faster than the limit of"
                                 f" {rmax:g} per s")
        if not abs(out) <= lim.output_limit * (1 + _OUTPUT_ALLOWANCE):
            return Violation("output", out, lim.output_limit, t,
                             f"output {out:g} beyond the output limit of +/-{lim.output_limit:g}")
        elapsed = t - self.t_start
        tmax = lim.max_duration
        if tmax is not None and _on(tmax) and elapsed > tmax:
            return Violation("duration", elapsed, tmax, t,
                             f"run time {elapsed:.4g} s beyond the limit of {tmax:g} s")
        return None

    def gauges(self) -> tuple[LimitGauge, ...]:
        """How close the last sample came to each limit (0 limit = off), for the UI."""
        lim = self.limits

        def val(x: float | None) -> float:
            return float(x) if _on(x) else 0.0

        return (
            LimitGauge("pv_window", self._last_dev, lim.pv_window, "PV"),
            LimitGauge("pv_rate", self._last_rate, val(lim.pv_rate_limit), "PV/s"),
            LimitGauge("output", self._last_out, lim.output_limit, "out"),
            LimitGauge("duration", self._last_t - self.t_start, val(lim.max_duration), "s"),
            LimitGauge("sample_gap", self._last_gap, val(lim.max_sample_gap), "s"),
        )
