"""Run supervision: pure detectors the runner feeds with every sample (no I/O, no clock).

Time is device time in seconds (from the samples), PV in PV units, output in output units.

Detectors (each returns a `SupervisorFault` once, then stays latched):
  LinkQualityMonitor  frames lost from the device's sample stream (sequence gaps) or rejected on
                      reception (CRC, framing, undecodable) as a fraction over a sliding window of
                      device time; above `max_loss` -> `fault:link_quality`. Rejected frames are
                      never acted on (the link drops them); this only judges whether enough get
                      through to supervise the run.
  ResponseMonitor     an output that demonstrably moved the PV before (the direction pulse) held
                      for `hold_time` while the PV stays inside its noise band -> `fault:no_response`
                      (stuck sensor, broken coupling, motor unpowered).
  ResetMonitor        the device's boot id changed, or device time ran backwards ->
                      `fault:device_reset` (the device lost its limits and state).

`Supervisor` bundles them for the runner. The link counters come in as `LinkCounters`, a plain
record the runner builds from the link's statistics (`LinkCounters.from_stats`, duck-typed, so
this module never imports protocol/).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Any

from autotune.core.safety import Violation

__all__ = [
    "LinkCounters",
    "LinkQualityMonitor",
    "ResetMonitor",
    "ResponseMonitor",
    "Supervisor",
    "SupervisorFault",
    "noise_band",
]


@dataclass(frozen=True)
class SupervisorFault(Violation):
    """A fault found by a detector: `which` ("link_quality", "no_response", "device_reset"),
    the measured `value` and the `limit` it broke (units of that detector), device time `t` (s),
    and a one-line `message` for the operator. Same record as a limit Violation; only the end
    reason differs."""

    @property
    def reason(self) -> str:
        """End reason for result.json / session.jsonl."""
        return f"fault:{self.which}"


@dataclass(frozen=True)
class LinkCounters:
    """Cumulative link counters (counts since the link opened).

    good: frames received intact; rejected: frames dropped on reception (CRC, framing,
    undecodable); received: samples received; lost: unsolicited frames missing from the
    device's sequence (dropped or corrupted on the way).
    """

    good: int
    rejected: int
    received: int
    lost: int

    @classmethod
    def from_mapping(cls, c: Any) -> LinkCounters:
        """From `protocol.link.Link.counters()` (a dict with the LinkStats counter names)."""
        return cls(int(c["frames_good"]),
                   int(c["crc_errors"]) + int(c["framing_errors"]) + int(c["decode_errors"]),
                   int(c["samples_received"]), int(c["seq_gaps"]))

    @classmethod
    def from_stats(cls, stats: Any) -> LinkCounters:
        """From a `protocol.link.LinkStats` (or anything with the same counter names)."""
        rejected = (int(getattr(stats, "crc_errors", 0)) + int(getattr(stats, "framing_errors", 0))
                    + int(getattr(stats, "decode_errors", 0)))
        return cls(int(stats.frames_good), rejected, int(stats.samples_received),
                   int(stats.seq_gaps))


_MAX_HISTORY = 4096  # counter readings kept at most (bounds memory on a very slow stream)


class LinkQualityMonitor:
    """Judges the link from its counters over the last `window` seconds of device time.

    max_loss: largest tolerated fraction (0..1) of lost frames (sequence gaps among the sample
        stream) and of rejected frames (among all frames received); 1.0 turns the check off.
    window: length of the sliding window, s (device time).
    min_frames: the fractions are judged only over at least this many frames of the sample
        stream (the window stretches back further when the stream is slow), so that chance
        does not decide: at 25% loss the spread over 100 frames is about 4%.
    interval: how often the counters need to be read, s (device time); see `due`.

    Corrupt or garbage frames are never acted on (the link's CRC drops them); they count here.
    """

    def __init__(self, max_loss: float, window: float, *, min_frames: int = 100,
                 interval: float = 0.1) -> None:
        if not 0.0 < max_loss <= 1.0:
            raise ValueError(f"max_loss must lie in (0, 1], got {max_loss!r}")
        if not (math.isfinite(window) and window > 0):
            raise ValueError(f"window must be > 0 s, got {window!r}")
        self.max_loss = float(max_loss)
        self.window = float(window)
        self.min_frames = int(min_frames)
        self.interval = float(interval)
        self._hist: deque[tuple[float, LinkCounters]] = deque()
        self._next_due = -math.inf
        self.loss = 0.0  #: fraction of sample-stream frames lost in the last window
        self.rejected = 0.0  #: fraction of received frames rejected in the last window
        self.fault: SupervisorFault | None = None

    def due(self, t: float) -> bool:
        """True when the counters should be read at device time `t` (s); reading them on every
        sample is allowed but costs the caller time."""
        return t >= self._next_due

    def update(self, t: float, counters: LinkCounters) -> SupervisorFault | None:
        """Add the counters read at device time `t` (s); the fault once the loss is too high."""
        if self.fault is not None:
            return self.fault
        if not math.isfinite(t):
            return None
        self._next_due = t + self.interval
        hist = self._hist
        if hist and t < hist[-1][0]:  # time ran backwards (device reset): start afresh
            hist.clear()
        hist.append((t, counters))
        stream_now = counters.received + counters.lost

        def enough(entry: tuple[float, LinkCounters]) -> bool:
            te, ce = entry
            return te <= t - self.window and stream_now - (ce.received + ce.lost) >= \
                self.min_frames

        # the base: the newest entry a full window and min_frames back; older ones go
        while len(hist) >= 2 and enough(hist[1]):
            hist.popleft()
        while len(hist) > _MAX_HISTORY:
            hist.popleft()
        t0, base = hist[0]
        d_good = counters.good - base.good
        d_rej = counters.rejected - base.rejected
        d_recv = counters.received - base.received
        d_lost = counters.lost - base.lost
        if min(d_good, d_rej, d_recv, d_lost) < 0:  # counters reset (new link): start afresh
            hist.clear()
            hist.append((t, counters))
            return None
        frames = d_good + d_rej
        stream = d_recv + d_lost
        self.rejected = d_rej / frames if frames > 0 else 0.0
        self.loss = d_lost / stream if stream > 0 else 0.0
        if self.max_loss >= 1.0 or not enough(hist[0]):
            return None
        worst = max(self.loss, self.rejected)
        if worst > self.max_loss:
            self.fault = SupervisorFault(
                "link_quality", worst, self.max_loss, t,
                f"link quality too poor: {100 * self.loss:.0f}% of samples lost and "
                f"{100 * self.rejected:.0f}% of frames rejected over the last "
                f"{t - t0:.2g} s (limit {100 * self.max_loss:.0f}%); check the cable, "
                "connectors, baud rate and electrical noise")
            return self.fault
        return None


def noise_band(noise_std: float, resolution: float, scale: float = 1.0) -> float:
    """PV change that noise alone explains (PV units): the larger of 6 noise standard deviations
    (about the range of 200 Gaussian samples), two resolution steps, and a float32 floor of
    1e-6 x `scale` (common practice, no source)."""
    return max(6.0 * max(noise_std, 0.0), 2.0 * max(resolution, 0.0), 1e-6 * max(abs(scale), 1.0))


class ResponseMonitor:
    """`fault:no_response`: the output is applied but the PV does not move.

    bias: operating-point output (output units). level: an output step from the bias that has
    demonstrably moved the PV (the direction pulse), output units; only samples with
    |out - bias| >= level count as "output applied". band: PV movement explained by noise (PV
    units), see `noise_band`. hold_time: how long (s) the output may be applied with the PV
    inside the band before the run stops (e.g. the direction pulse's timeout).

    The window restarts whenever the PV leaves the band or the output drops below the level, so
    a moving PV, a relay that switches, or an output too small to move the load never trips it.
    """

    def __init__(self, bias: float, level: float, band: float, hold_time: float) -> None:
        for name, v in (("level", level), ("band", band), ("hold_time", hold_time)):
            if not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a finite number > 0, got {v!r}")
        if not math.isfinite(bias):
            raise ValueError(f"bias must be finite, got {bias!r}")
        self.bias = float(bias)
        self.level = float(level)
        self.band = float(band)
        self.hold_time = float(hold_time)
        self._t0: float | None = None
        self._lo = math.inf
        self._hi = -math.inf
        self.fault: SupervisorFault | None = None

    def update(self, t: float, pv: float, out: float) -> SupervisorFault | None:
        """One sample: t (s), pv (PV units), applied out (output units)."""
        if self.fault is not None:
            return self.fault
        if not (math.isfinite(t) and math.isfinite(pv) and math.isfinite(out)):
            self._t0 = None
            return None
        if abs(out - self.bias) < self.level * (1.0 - 1e-6):
            self._t0 = None
            return None
        if self._t0 is None or t < self._t0:
            self._t0, self._lo, self._hi = t, pv, pv
            return None
        lo, hi = min(self._lo, pv), max(self._hi, pv)
        if hi - lo > self.band:
            self._t0, self._lo, self._hi = t, pv, pv  # it moved: start a new window here
            return None
        self._lo, self._hi = lo, hi
        held = t - self._t0
        if held >= self.hold_time:
            self.fault = SupervisorFault(
                "no_response", hi - lo, self.band, t,
                f"no response: the output was held at {out:g} for {held:.3g} s and the PV "
                f"moved only {hi - lo:.3g} (noise alone moves it {self.band:.3g}); check the "
                "sensor, its wiring, the coupling and the motor power")
            return self.fault
        return None


class ResetMonitor:
    """`fault:device_reset` from the boot id (Pong/HelloReply) or device time running backwards.

    boot_id: the id the device reported at the handshake.
    """

    def __init__(self, boot_id: int) -> None:
        self.boot_id = int(boot_id)
        self._t_prev: float | None = None
        self.fault: SupervisorFault | None = None

    def check_boot_id(self, t: float, boot_id: int | None) -> SupervisorFault | None:
        """A boot id seen at device time t (s) (None: nothing new)."""
        if self.fault is not None:
            return self.fault
        if boot_id is not None and int(boot_id) != self.boot_id:
            self.fault = SupervisorFault(
                "device_reset", float(boot_id), float(self.boot_id), t,
                f"the device restarted (boot id {self.boot_id:#010x} -> {int(boot_id):#010x}): "
                "its limits and state are gone")
        return self.fault

    def check_time(self, t: float) -> SupervisorFault | None:
        """A sample's device time t (s): running backwards by more than a microsecond means the
        device clock restarted."""
        if self.fault is not None:
            return self.fault
        prev = self._t_prev
        self._t_prev = t
        if prev is not None and math.isfinite(t) and t < prev - 1e-6:
            self.fault = SupervisorFault(
                "device_reset", t, prev, t,
                f"device time ran backwards ({prev:.6g} s -> {t:.6g} s): the device restarted")
        return self.fault


class Supervisor:
    """The detectors of one powered run, fed by the runner.

    link: a LinkQualityMonitor (None: off); reset: a ResetMonitor (None: off). The response
    monitor is armed later with `expect_response`, once the direction check has shown which
    output moves the PV.
    """

    def __init__(self, link: LinkQualityMonitor | None = None,
                 reset: ResetMonitor | None = None) -> None:
        self.link = link
        self.reset = reset
        self.response: ResponseMonitor | None = None
        self.fault: SupervisorFault | None = None

    def expect_response(self, bias: float, level: float, band: float,
                        hold_time: float) -> None:
        """Arm the no-response detector (see ResponseMonitor)."""
        self.response = ResponseMonitor(bias, level, band, hold_time)

    def disarm_response(self) -> None:
        """The no-response detector watches the open-loop stages only (prechecks, relay): under
        closed-loop control a steady output with a steady PV is what settling looks like."""
        self.response = None

    def link_due(self, t: float) -> bool:
        """True when the runner should read the link counters for `check_link`."""
        return self.link is not None and self.fault is None and self.link.due(t)

    def check_sample(self, t: float, pv: float, out: float,
                     boot_id: int | None = None) -> SupervisorFault | None:
        """One sample (t s, pv PV units, applied out output units) and the last boot id seen."""
        if self.fault is not None:
            return self.fault
        f = None
        if self.reset is not None:
            f = self.reset.check_boot_id(t, boot_id) or self.reset.check_time(t)
        if f is None and self.response is not None:
            f = self.response.update(t, pv, out)
        self.fault = f
        return f

    def check_link(self, t: float, counters: LinkCounters) -> SupervisorFault | None:
        """The link counters read at device time t (s)."""
        if self.fault is not None:
            return self.fault
        if self.link is None:
            return None
        self.fault = self.link.update(t, counters)
        return self.fault
