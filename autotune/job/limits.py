"""Before any motion: the PV start value at zero output, and the safety limits loaded into the
device and verified by read-back (what the board stores must be exactly what was sent)."""

from __future__ import annotations

import struct
import time
from collections.abc import Callable
from typing import Any

from autotune.config import WIRE_FLOAT_MAX, SafetyConfig
from autotune.errors import EXIT_FAILED, EXIT_LINK, EXIT_USAGE, UserError
from protocol.errors import NakError
from protocol.messages import ClearFault, GetLimits, Limits, SetLimits, Stream

START_SAMPLES = 5  # samples at zero output that give the PV start value


def float32(x: float) -> float:
    """`x` rounded to IEEE-754 single precision (what the wire carries)."""
    return struct.unpack("<f", struct.pack("<f", float(x)))[0]


def start_samples(link: Any, axis: int, port: str, wait: float,
                  say: Callable[[str], None], decimation: int = 1
                  ) -> tuple[list[Any], list[str]]:
    """Stream on and take START_SAMPLES samples of `axis` at zero output (waiting at most
    `wait` wall s for them). A fault latched before this run (the watchdog after an earlier host
    died) is cleared and said. decimation: the Stream asks for every Nth sample. Returns (the samples, the names of the stale faults cleared).
    UserError: no samples (exit 4), a non-zero output before the run (exit 1)."""
    link.request(Stream(axis, 1, decimation))
    first: list[Any] = []
    deadline = time.monotonic() + wait

    def take(skip_latched: bool) -> None:
        while len(first) < START_SAMPLES:
            rec = link.next_sample(timeout=max(0.0, deadline - time.monotonic()))
            if rec is None:
                raise UserError(f"{port}: the device sends no samples", exit_code=EXIT_LINK)
            if rec.axis == axis and not (skip_latched and rec.fault_latched):
                first.append(rec)

    take(False)
    if any(abs(r.output) > 0.0 for r in first):
        raise UserError("the device reports a non-zero output before the run started; "
                        "stop it and check the board", exit_code=EXIT_FAILED)
    stale = [f.name for f in link.poll_faults()]
    if stale or any(r.fault_latched for r in first):
        link.request(ClearFault())
        stale = stale or ["latched"]
        say(f"the device had a fault latched from before ({', '.join(stale)}); cleared it")
        first[:] = [r for r in first if not r.fault_latched]
        deadline = time.monotonic() + wait
        take(True)
    return first, stale


def load_limits(link: Any, axis: int, s: SafetyConfig, pv_start: float) -> dict[str, float]:
    """Send the safety limits (window around `pv_start`, PV units) and read them back; returns
    the read-back values. UserError: a window the wire cannot carry (exit 2), a refusal or a
    read-back that differs from what was sent (exit 1: nothing was powered)."""
    low, high = pv_start - s.pv_window, pv_start + s.pv_window
    if not (abs(low) <= WIRE_FLOAT_MAX and abs(high) <= WIRE_FLOAT_MAX):
        raise UserError(f"safety.pv_window {s.pv_window:g} around the start value "
                        f"{pv_start:g} does not fit the wire format (float32)",
                        exit_code=EXIT_USAGE)
    lim = SetLimits(axis, s.output_limit, low, high, s.pv_rate_limit, round(s.watchdog * 1000))
    try:
        link.request(lim)
        back = link.request(GetLimits(axis))
    except NakError as exc:
        raise UserError(f"the device refused the safety limits: {exc}",
                        exit_code=EXIT_FAILED) from None
    if not isinstance(back, Limits):
        raise UserError("the device did not report its limits back", exit_code=EXIT_FAILED)
    for name in ("output_limit", "pv_low", "pv_high", "pv_rate_limit"):
        if float32(getattr(lim, name)) != float32(getattr(back, name)):
            raise UserError(
                f"the device reports {name} = {getattr(back, name):g}, not the "
                f"{getattr(lim, name):g} sent; nothing was powered", exit_code=EXIT_FAILED)
    if back.watchdog_ms != lim.watchdog_ms:
        raise UserError(f"the device reports a watchdog of {back.watchdog_ms} ms, not the "
                        f"{lim.watchdog_ms} ms sent; nothing was powered",
                        exit_code=EXIT_FAILED)
    return {"output_limit": back.output_limit, "pv_low": back.pv_low, "pv_high": back.pv_high,
            "pv_rate_limit": back.pv_rate_limit, "watchdog_ms": back.watchdog_ms}

