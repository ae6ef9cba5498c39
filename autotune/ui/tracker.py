"""What the front end remembers across snapshots to draw the live run: the job's road, where
the time axis starts, when the current phase began, and the newest lines the job said.

The runner's snapshots stay what they are (facts of one instant); `LiveTracker` folds them
into a `LiveContext` (autotune.ui.views) that the pure renderers take beside the snapshot.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Sequence

from autotune.core.progress import Phase, RunSnapshot
from autotune.ui.views import LiveContext
from autotune.ui.widgets import PHASE_ROAD, default_road

LOG_LINES = 12  # newest lines the job said that the live screen may show


class LiveTracker:
    """Folds snapshots into a LiveContext.

    stages: (Phase value, longest device seconds or None) of the job in order, from the start
    information (empty: the whole job without the breakaway). A road phase the job enters that
    was not planned (a breakaway the relay asks for) joins the road after the stage before it.
    """

    def __init__(self, stages: Sequence[tuple[str, float | None]] = ()) -> None:
        self.road: list[Phase] = []
        self.expected: dict[Phase, float | None] = {}
        self.plan(stages)
        self.t0: float | None = None
        self.phase: Phase | None = None
        self.phase_t0: float | None = None
        self.reached: Phase | None = None
        self.log: deque[str] = deque(maxlen=LOG_LINES)
        self.context = LiveContext(road=tuple(self.road))

    def plan(self, stages: Sequence[tuple[str, float | None]]) -> None:
        """Set the road from the job's stages (see the class docstring)."""
        road, expected = [], {}
        for value, most in stages:
            try:
                phase = Phase(value)
            except ValueError:
                continue
            road.append(phase)
            expected[phase] = most
        self.road = road or list(default_road())
        self.expected = expected

    def said(self, line: str) -> LiveContext:
        """A line the job said."""
        self.log.append(line)
        return self._context()

    def update(self, snap: RunSnapshot) -> LiveContext:
        """The context for `snap`."""
        t_now = snap.t[-1] if snap.t else None
        if snap.t and (self.t0 is None or snap.t[0] < self.t0):
            self.t0 = snap.t[0]
        if snap.phase is not self.phase:
            self.phase = snap.phase
            self.phase_t0 = t_now
            if snap.phase in PHASE_ROAD:
                if snap.phase not in self.road:
                    self._join(snap.phase)
                self.reached = snap.phase
        elif self.phase_t0 is None:
            self.phase_t0 = t_now
        return self._context()

    def _join(self, phase: Phase) -> None:
        """Put an unplanned phase on the road after the stage reached last."""
        at = self.road.index(self.reached) + 1 if self.reached in self.road else len(self.road)
        self.road.insert(at, phase)

    def _context(self) -> LiveContext:
        phase = self.phase
        stage = self.road.index(phase) + 1 if phase in self.road else 0
        self.context = LiveContext(
            road=tuple(self.road), t0=self.t0, phase_t0=self.phase_t0,
            expected=self.expected.get(phase) if phase is not None else None, stage=stage,
            log=tuple(self.log), reached=self.reached)
        return self.context
