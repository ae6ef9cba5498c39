"""The host's checks on every sample, run as the sample arrives (in the link's reader thread).

A powered run's checks never wait for the thread that commands the device: while that thread
sits in a request's retries, every sample is still checked the moment it is decoded, so a
safety decision is always taken on the newest sample there is. Order on each sample: the host
limits (autotune.core.safety.SafetyGuard) first, so that when the device latched on the same
sample the host limit names the cause; then the supervisor's detectors (device reset, no
response, link quality); then the device's own fault flag.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from autotune.core.safety import SafetyGuard
from autotune.core.supervise import LinkCounters, Supervisor
from autotune.errors import EXIT_FAILED, EXIT_LINK


@dataclass(frozen=True)
class StopCause:
    """Why a run must stop: `reason` for the session end record ("limit:pv_window", ...),
    `message` for the operator, `exit_code`, `t` the device time (s) of the sample decided on."""

    reason: str
    message: str
    exit_code: int
    t: float | None = None


class SampleChecks:
    """The checks of one armed run. `check(rec)` returns the first StopCause (and the same one
    for every later sample: a cause is latched) or None.

    guard: host limits; supervisor: the detectors (None: none); counters: returns the link's
    reception counters (for the link-quality detector); boot_id: returns the boot id of the
    latest Pong (None before one). Pure apart from those two readers.
    """

    def __init__(self, guard: SafetyGuard, supervisor: Supervisor | None,
                 counters: Callable[[], dict[str, int]] | None = None,
                 boot_id: Callable[[], int | None] | None = None) -> None:
        self.guard = guard
        self.supervisor = supervisor
        self.counters = counters
        self.boot_id = boot_id
        self.cause: StopCause | None = None
        self.checked = 0

    def check(self, rec: Any) -> StopCause | None:
        """One sample (`t` device s, `pv` PV units, `output` output units, `fault_latched`)."""
        self.checked += 1
        if self.cause is not None:
            return self.cause
        v = self.guard.check(rec.t, rec.pv, rec.output)
        if v is not None:
            self.cause = StopCause(f"limit:{v.which}", v.message, EXIT_FAILED, rec.t)
            return self.cause
        sup = self.supervisor
        if sup is not None:
            f = sup.check_sample(rec.t, rec.pv, rec.output,
                                 None if self.boot_id is None else self.boot_id())
            if f is None and self.counters is not None and sup.link_due(rec.t):
                f = sup.check_link(rec.t, LinkCounters.from_mapping(self.counters()))
            if f is not None:
                code = EXIT_FAILED if f.which == "no_response" else EXIT_LINK
                self.cause = StopCause(f.reason, f.message, code, rec.t)
                return self.cause
        if rec.fault_latched:
            # the device has zeroed its output; its Fault report (which follows this sample)
            # names the fault: see PoweredRun, which refines "fault:latched" with it
            self.cause = StopCause("fault:latched", "the device reports a latched fault",
                                   EXIT_FAILED, rec.t)
        return self.cause
