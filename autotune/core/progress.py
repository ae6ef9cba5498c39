"""Snapshots of a run's state: what the runner publishes and the screen draws.

The runner builds a fresh `RunSnapshot` (immutable) whenever something changes and hands it to
its `on_update` callback; renderers are pure functions of a snapshot. Units: seconds (device
time), PV units, output units.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum


class Phase(StrEnum):
    """Where a run stands."""

    CONNECT = "connect"
    PRECHECK_REST = "precheck:rest"
    PRECHECK_DIRECTION = "precheck:direction"
    PRECHECK_BREAKAWAY = "precheck:breakaway"
    RELAY = "relay"
    ANALYSIS = "analysis"
    PROPOSALS = "proposals"
    STEP = "step"
    WAITING = "waiting"  # between powered stages: the motor is unpowered, the operator decides
    STOPPING = "stopping"
    DONE = "done"


@dataclass(frozen=True)
class LimitGauge:
    """How close the run is to one safety limit: `value` against `limit` (same units)."""

    name: str  # "pv_window", "pv_rate", "output", "duration", "sample_gap"
    value: float
    limit: float
    unit: str = ""

    @property
    def fraction(self) -> float:
        """value / limit, 0 when the limit is off (0 or inf)."""
        if not self.limit or self.limit == float("inf"):
            return 0.0
        return abs(self.value) / abs(self.limit)


@dataclass(frozen=True)
class CycleEstimate:
    """Estimates after relay cycle `index` (1-based): period (s), peak-to-peak amplitude (PV
    units), ultimate gain (output units per PV unit) and period (s).

    ku, tu: the refined live figure, from the measured harmonics of the cycles at the current
    relay amplitude (autotune.core.harmonics.cycle_estimate; the final analysis refines it
    again with a fitted model); ku_df, tu_df: the plain describing-function figure of this
    cycle (4 d / (pi a), the period), shown beside it. None where not computed.
    """

    index: int
    period: float
    amplitude: float
    ku: float
    tu: float
    ku_df: float | None = None
    tu_df: float | None = None


@dataclass(frozen=True)
class LinkHealth:
    """Round-trip times in seconds, counters since the link opened."""

    rtt_median: float | None = None
    rtt_p99: float | None = None
    frames_good: int = 0
    frames_lost: int = 0
    crc_errors: int = 0


@dataclass(frozen=True)
class RunSnapshot:
    """Everything the screen needs at one instant. Arrays are tuples of the last few seconds."""

    phase: Phase
    message: str = ""  # one line: what is happening now, or why it stopped
    device: str = ""  # device name and firmware
    axis: int = 0
    loop_mode: str = "device"  # "device" or "host"
    t: tuple[float, ...] = ()  # device time of the recent samples, s
    pv: tuple[float, ...] = ()
    sp: tuple[float, ...] = ()  # setpoint or relay centre, PV units
    out: tuple[float, ...] = ()  # applied output, output units
    cycle: int = 0  # relay cycles completed
    max_cycles: int = 0
    progress: float = 0.0  # 0..1 within the phase
    estimates: tuple[CycleEstimate, ...] = ()
    converged: bool = False
    limits: tuple[LimitGauge, ...] = ()
    link: LinkHealth = field(default_factory=LinkHealth)
    alarm: str | None = None  # full-width message: lost link, fault, operator must cut power
    stopped: bool = False  # device confirmed zero output
