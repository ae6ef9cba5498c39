"""Fault injection for the mock device (seeded, reproducible).

Spec syntax (``--faults SPEC``): comma-separated ``key=value`` pairs, no spaces needed, e.g.
``corrupt=0.01,jitter=0.002,seed=3``. The plant file's ``[faults]`` table takes the same keys
with TOML values. Unknown keys and bad values are errors naming the key. All times are device
(simulated) seconds; "after" times count from the first Hello the device receives (so a test
can place a fault relative to its own session, whatever the start-up time).

Link faults (applied to bytes, in the I/O loop; see LinkFaults):
  corrupt=P          probability per byte sent to the host that one random bit is flipped
  corrupt_rx=P       same for bytes received from the host (the device drops bad frames)
  drop=P             probability per frame sent that the whole frame is dropped
  drop_bytes=P       probability per byte sent that the byte is dropped
  latency=S          extra delay of every frame sent, s
  jitter=S           extra uniform random delay in [0, S] per frame sent, s (order kept)
  garbage=R          bursts of random bytes sent, R bursts per second on average (Poisson)
  garbage_len=N      longest burst, bytes (default 16); each burst is 1..N bytes
  disconnect_after=S close the port S seconds after the first Hello (the process then exits)
Device faults (applied in the device state machine; see DeviceFaults):
  reset_after=S      device resets once, S s after the first Hello: new boot id, device time,
                     sequence counter, limits, mode and latched faults all start afresh
  stuck_after=S      the sensor reading freezes at its value S s after the first Hello
  spike_rate=P       probability per tick of a one-tick spike on the PV
  spike_size=X       spike magnitude, PV units (random sign; default 5.0)
  reverse_sign=1     the actuator is wired backwards (plant input negated)
  unstable=R         a divergent mode is added to the PV from the first Hello on:
                     A*(exp(R*t) - 1) with A = unstable_size PV units (default 1.0), R in 1/s
  unstable_size=A    see unstable
  ignore_stop=1      Stop frames are ignored entirely (no reply, output kept; like every Stop
                     they do not feed the watchdog, so the watchdog still zeroes the output)
  no_ack=NAMES       requests of these types (message names joined by "+", e.g.
                     StartRelay+SetPid; not Stop) are acted on but never answered, so the host
                     retries them
  seed=N             seed of the fault random generator (default 0)
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from protocol.messages import REGISTRY

__all__ = ["FaultSpec", "FaultSpecError", "LinkFaults", "DeviceFaults", "parse_fault_spec"]


class FaultSpecError(ValueError):
    """A bad fault specification; the message (``"key: problem"``) names the key."""

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.key, _, self.problem = message.partition(": ")


@dataclass(frozen=True)
class FaultSpec:
    """Parsed fault specification; every field defaults to "no fault"."""

    corrupt: float = 0.0
    corrupt_rx: float = 0.0
    drop: float = 0.0
    drop_bytes: float = 0.0
    latency: float = 0.0
    jitter: float = 0.0
    garbage: float = 0.0
    garbage_len: int = 16
    disconnect_after: float | None = None
    reset_after: float | None = None
    stuck_after: float | None = None
    spike_rate: float = 0.0
    spike_size: float = 5.0
    reverse_sign: bool = False
    unstable: float = 0.0
    unstable_size: float = 1.0
    ignore_stop: bool = False
    no_ack: str = ""
    seed: int = 0

    @property
    def no_ack_types(self) -> frozenset[int]:
        """Type ids of the requests the device acts on without answering (``no_ack``)."""
        return _no_ack_types(self.no_ack)

    @property
    def any_link(self) -> bool:
        """True when a byte-level fault is active."""
        return bool(
            self.corrupt or self.corrupt_rx or self.drop or self.drop_bytes or self.latency
            or self.jitter or self.garbage
        )

    def merged(self, other: FaultSpec) -> FaultSpec:
        """This spec with every non-default field of ``other`` taking precedence."""
        default = FaultSpec()
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        for f in fields(other):
            v = getattr(other, f.name)
            if v != getattr(default, f.name):
                values[f.name] = v
        return FaultSpec(**values)


_PROBS = {"corrupt", "corrupt_rx", "drop", "drop_bytes", "spike_rate"}
_NONNEG = {"latency", "jitter", "garbage", "spike_size", "unstable", "unstable_size"}
_TIMES = {"disconnect_after", "reset_after", "stuck_after"}
_BOOLS = {"reverse_sign", "ignore_stop"}
_INTS = {"garbage_len", "seed"}
_NAMES = {"no_ack"}


def _no_ack_types(names: str) -> frozenset[int]:
    by_name = {cls.__name__: t for t, cls in REGISTRY.items() if 0x01 <= t <= 0x3F}
    out = set()
    for name in filter(None, (n.strip() for n in names.split("+"))):
        if name not in by_name or name == "Stop":
            known = "+".join(sorted(n for n in by_name if n != "Stop"))
            raise FaultSpecError(f"no_ack: {name!r} is not a request type (known: {known})")
        out.add(by_name[name])
    return frozenset(out)


def _coerce(key: str, value: Any) -> Any:
    if key in _NAMES:
        if not isinstance(value, str):
            raise FaultSpecError(f"{key}: expected message names joined by '+', got {value!r}")
        _no_ack_types(value)
        return value.strip()
    if key in _BOOLS:
        if isinstance(value, bool):
            return value
        if isinstance(value, int) and value in (0, 1):
            return bool(value)
        if isinstance(value, str) and value.strip().lower() in ("0", "1", "true", "false"):
            return value.strip().lower() in ("1", "true")
        raise FaultSpecError(f"{key}: expected 0/1 or true/false, got {value!r}")
    if key in _INTS:
        if isinstance(value, bool):
            raise FaultSpecError(f"{key}: expected an integer, got {value!r}")
        if isinstance(value, int):
            v = value
        elif isinstance(value, str):
            try:
                v = int(value.strip(), 10)
            except ValueError as exc:
                raise FaultSpecError(f"{key}: expected an integer, got {value!r}") from exc
        else:
            raise FaultSpecError(f"{key}: expected an integer, got {value!r}")
        if key == "garbage_len" and v < 1:
            raise FaultSpecError(f"{key}: must be >= 1, got {v}")
        if key == "seed" and v < 0:
            raise FaultSpecError(f"{key}: must be >= 0, got {v}")
        return v
    # floats
    if isinstance(value, bool):
        raise FaultSpecError(f"{key}: expected a number, got {value!r}")
    if isinstance(value, int | float):
        v = float(value)
    elif isinstance(value, str):
        try:
            v = float(value.strip())
        except ValueError as exc:
            raise FaultSpecError(f"{key}: expected a number, got {value!r}") from exc
    else:
        raise FaultSpecError(f"{key}: expected a number, got {value!r}")
    if not math.isfinite(v):
        raise FaultSpecError(f"{key}: must be finite, got {value!r}")
    if key in _PROBS and not 0.0 <= v <= 1.0:
        raise FaultSpecError(f"{key}: probability must be in [0, 1], got {v}")
    if (key in _NONNEG or key in _TIMES) and v < 0.0:
        raise FaultSpecError(f"{key}: must be >= 0, got {v}")
    return v


_KNOWN = {f.name for f in fields(FaultSpec)}


def fault_spec_from_mapping(table: Mapping[str, Any]) -> FaultSpec:
    """FaultSpec from a mapping (a TOML ``[faults]`` table or parsed spec); errors name the key."""
    values: dict[str, Any] = {}
    for key, value in table.items():
        if key not in _KNOWN:
            raise FaultSpecError(f"{key}: unknown fault (known: {', '.join(sorted(_KNOWN))})")
        values[key] = _coerce(key, value)
    return FaultSpec(**values)


def parse_fault_spec(spec: str) -> FaultSpec:
    """Parse ``key=value,key=value``; an empty string gives no faults."""
    table: dict[str, str] = {}
    for part in spec.split(","):
        part = part.strip()
        if not part:
            continue
        if "=" not in part:
            raise FaultSpecError(f"{part}: expected key=value")
        key, _, value = part.partition("=")
        key = key.strip()
        if key in table:
            raise FaultSpecError(f"{key}: given twice")
        table[key] = value
    return fault_spec_from_mapping(table)


class LinkFaults:
    """Byte-level faults between the device and the port. Pure: time is passed in.

    ``outgoing(data, t)`` takes one encoded frame (wire bytes) written at device time ``t``
    and returns ``(release_time, bytes)`` chunks (possibly none: dropped). ``incoming(data)``
    returns the received bytes after corruption. ``garbage(t0, t1)`` returns the random bursts
    due in the interval [t0, t1) as ``(time, bytes)``.
    """

    def __init__(self, spec: FaultSpec) -> None:
        self.spec = spec
        self.rng = np.random.default_rng([spec.seed, 1])
        self._last_release = -math.inf
        self.frames_dropped = 0
        self.bytes_dropped = 0
        self.bits_flipped = 0
        self.garbage_bursts = 0

    def _corrupt(self, data: bytes, p: float) -> bytes:
        if p <= 0.0 or not data:
            return data
        hits = np.nonzero(self.rng.random(len(data)) < p)[0]
        if hits.size == 0:
            return data
        buf = bytearray(data)
        for i in hits:
            buf[int(i)] ^= 1 << int(self.rng.integers(0, 8))
            self.bits_flipped += 1
        return bytes(buf)

    def outgoing(self, data: bytes, t: float) -> list[tuple[float, bytes]]:
        s = self.spec
        if s.drop > 0.0 and self.rng.random() < s.drop:
            self.frames_dropped += 1
            return []
        if s.drop_bytes > 0.0 and data:
            keep = self.rng.random(len(data)) >= s.drop_bytes
            self.bytes_dropped += int(len(data) - keep.sum())
            data = bytes(b for b, k in zip(data, keep, strict=True) if k)
        data = self._corrupt(data, s.corrupt)
        delay = s.latency + (s.jitter * float(self.rng.random()) if s.jitter > 0 else 0.0)
        release = max(t + delay, self._last_release)
        self._last_release = release
        return [(release, data)] if data else []

    def incoming(self, data: bytes) -> bytes:
        return self._corrupt(data, self.spec.corrupt_rx)

    def garbage(self, t0: float, t1: float) -> list[tuple[float, bytes]]:
        s = self.spec
        if s.garbage <= 0.0 or t1 <= t0:
            return []
        n = int(self.rng.poisson(s.garbage * (t1 - t0)))
        out = []
        for _ in range(n):
            size = int(self.rng.integers(1, s.garbage_len + 1))
            when = t0 + float(self.rng.random()) * (t1 - t0)
            out.append((max(when, self._last_release), self.rng.bytes(size)))
            self.garbage_bursts += 1
        out.sort(key=lambda item: item[0])
        return out


class DeviceFaults:
    """Faults applied inside the device: sensor, actuator, plant, stop handling, reset.

    Times ``t_since_hello`` are device seconds since the first Hello (None before it).
    """

    def __init__(self, spec: FaultSpec) -> None:
        self.spec = spec
        self.rng = np.random.default_rng([spec.seed, 2])
        self._stuck_value: float | None = None
        self.reset_done = False
        self.spikes = 0

    def actuator_sign(self) -> float:
        """-1 when the actuator is wired backwards, else +1."""
        return -1.0 if self.spec.reverse_sign else 1.0

    def pv(self, pv: float, t_since_hello: float | None) -> float:
        """The PV the device reads, after stuck sensor, runaway mode and spikes (PV units)."""
        s = self.spec
        if t_since_hello is not None:
            if s.unstable > 0.0:
                pv += s.unstable_size * math.expm1(min(s.unstable * t_since_hello, 700.0))
            if s.stuck_after is not None and t_since_hello >= s.stuck_after:
                if self._stuck_value is None:
                    self._stuck_value = pv
                pv = self._stuck_value
        if s.spike_rate > 0.0 and self.rng.random() < s.spike_rate:
            self.spikes += 1
            pv += s.spike_size if self.rng.random() < 0.5 else -s.spike_size
        return pv

    def reset_due(self, t_since_hello: float | None) -> bool:
        """True exactly once, when the reset time has come."""
        s = self.spec
        if self.reset_done or s.reset_after is None or t_since_hello is None:
            return False
        if t_since_hello >= s.reset_after:
            self.reset_done = True
            return True
        return False

    def disconnect_due(self, t_since_hello: float | None) -> bool:
        s = self.spec
        return (
            s.disconnect_after is not None
            and t_since_hello is not None
            and t_since_hello >= s.disconnect_after
        )
