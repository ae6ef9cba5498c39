"""What a powered run records: the session file (best effort, in time order) and the recent
samples the screen draws.

Recording never stands in the way of the stop: the session writer keeps its first failure
instead of raising (autotune.recorder.SessionWriter), and events raised from other threads (a
stop request from the key thread or the checks) are held until the samples before them are
written, so the file stays in time order. Samples whose device time does not increase (a board
that restarted during the stop, on its new clock) are not written as samples; the stop record
names the restart.
"""

from __future__ import annotations

import math
import threading
from collections import deque
from dataclasses import dataclass, field
from typing import Any

from autotune.recorder import SessionWriter

RECENT_SECONDS = 5.0  # device seconds of samples kept for the snapshot


@dataclass
class RecentSamples:
    """The last RECENT_SECONDS of samples for the snapshot (device time, s)."""

    t: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    pv: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    sp: deque[float] = field(default_factory=lambda: deque(maxlen=2048))
    out: deque[float] = field(default_factory=lambda: deque(maxlen=2048))

    def add(self, t: float, pv: float, sp: float, out: float) -> None:
        self.t.append(t)
        self.pv.append(pv)
        self.sp.append(sp)
        self.out.append(out)
        while self.t and self.t[0] < t - RECENT_SECONDS:
            self.t.popleft()
            self.pv.popleft()
            self.sp.popleft()
            self.out.popleft()


class RunRecorder:
    """The session file of one run, in time order; `writer` is None until the session opens
    (and when nothing is recorded). All methods are safe to call at any time and never raise
    for a failed write (see `error`)."""

    def __init__(self) -> None:
        self.writer: SessionWriter | None = None
        self._held: list[dict[str, Any]] = []
        self._lock = threading.Lock()
        self.t_last = -math.inf  # device time of the last sample written, s
        self.skipped = 0  # samples not written: their time did not increase

    @property
    def error(self) -> str | None:
        """The first write failure ("no space left on device"), or None."""
        return None if self.writer is None else self.writer.error

    def sample(self, t: float, pv: float, out: float, sp: float, **extra: Any) -> bool:
        """One sample (main thread); held events before it go first. False when not written
        (its time does not increase)."""
        if not t > self.t_last:
            self.skipped += 1
            return False
        self._write_held(before=t)
        self.t_last = t
        if self.writer is not None:
            self.writer.sample(t, pv, out, sp, **extra)
        return True

    def event(self, t: float | None, kind: str, detail: Any = None, **extra: Any) -> None:
        """An event at device time t (main thread); held events up to t go first."""
        self._write_held(before=math.inf if t is None else math.nextafter(t, math.inf))
        if self.writer is not None:
            self.writer.event(t, kind, detail, **extra)

    def hold_event(self, t: float | None, kind: str, detail: Any = None,
                   **extra: Any) -> dict[str, Any]:
        """An event from any thread: written before the first sample after `t` (or at the next
        `event` / `flush_held`). Returns the held record (it may still be amended)."""
        rec: dict[str, Any] = {"t": t, "kind": kind, "detail": detail, **extra}
        with self._lock:
            self._held.append(rec)
        return rec

    def flush_held(self) -> None:
        """Write every held event now."""
        self._write_held(before=math.inf)

    def _write_held(self, before: float) -> None:
        if not self._held:
            return
        with self._lock:
            due = [e for e in self._held if e["t"] is None or e["t"] < before]
            self._held = [e for e in self._held if not (e["t"] is None or e["t"] < before)]
        if self.writer is None:
            return
        for e in due:
            e = dict(e)
            self.writer.event(e.pop("t"), e.pop("kind"), e.pop("detail"), **e)
