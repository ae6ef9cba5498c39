"""Run configuration: TOML file -> validated, frozen dataclasses with documented defaults.

A config file holds any of the sections below; every key is optional (the defaults are in the
dataclasses). An unknown section or key, a wrong type or an impossible combination of limits is a
`ConfigError` naming the file, the key (``section.key``) and the problem; nothing moves.

```toml
[connection]   # port, axis, loop mode, sign
[safety]       # limits enforced by the host on every sample and loaded into the device
[relay]        # the relay experiment
[prechecks]    # rest, direction pulse, breakaway ramp
[design]       # what the proposed gains should achieve
[step]         # the confirmation step test
[spec]         # what the confirmation step must show to pass
[[loop]]       # a plan: several loops of one board, tuned in order on one connection
```

A plan lists one ``[[loop]]`` table a loop (see LoopConfig): its ``name`` (the folder of its
files under the output folder), its ``axis`` on the board, its ``role`` and, in a
``[loop.limits]`` table, the keys of ``[safety]`` that differ for it. Everything else comes
from the sections above, shared by every loop. Without a plan the job tunes the one loop
``connection.axis`` names, as before.

Units: seconds, PV units, output units. Keys whose default is `None` ("automatic") are simply
left out of the file; TOML has no null.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Literal, get_args, get_origin

from autotune.core.relay import RelayPlan
from autotune.errors import ConfigError

LoopMode = Literal["auto", "host", "device"]
LoopRole = Literal["single", "matched", "heading"]
"""A loop of a plan: "single" is tuned on its own; "matched" loops (two wheels of a drive base,
say) are tuned in turn and then compared, for gains that make them respond alike; "heading" is
the loop on top of the two matched wheel loops before it (the drive base's heading from the
wheel-speed difference, run on the host every `host_ticks` device ticks; it has no axis of its
own and needs wheel_radius and track_width)."""
MAX_LOOPS = 8
"""Most loops a plan may hold (a drive base and a few more; the board's axes bound it too)."""
LOOP_NAME_CHARS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-")
"""A loop name is a folder name: letters, digits, '_' and '-' only."""

WIRE_FLOAT_MAX = 3.4028234663852886e38
"""Largest float32, what the wire carries: a setting beyond it cannot be sent to the board."""
INT_MAX = 2**31 - 1
"""Largest integer setting (cycle counts and the like; a baud rate has its own bound)."""
BAUD_MAX = 20_000_000
"""Fastest serial rate accepted, bit/s (beyond any UART a controller board uses)."""


@dataclass(frozen=True)
class ConnectionConfig:
    """Where and what to drive.

    port: anything `serial.serial_for_url` takes, or "sim" (the built-in simulated board);
        None means it must come from `--port`.
    axis: axis index on the board (0-based).
    loop: "device" runs the relay on the board, "host" computes it on the host for each sample,
        "auto" picks device when the board offers it.
    sign: +1 when a positive output makes the PV rise, -1 when it makes it fall.
    baudrate: serial speed (ignored by pty/socket ports).
    plant, speed: only for port "sim": the simulated plant (scenario name or plant TOML file) and
        how many times faster than the wall clock its time runs.
    """

    port: str | None = None
    axis: int = 0
    loop: LoopMode = "auto"
    sign: int = 1
    baudrate: int = 115200
    plant: str = "cart-wheel"
    speed: float = 1.0


@dataclass(frozen=True)
class SafetyConfig:
    """Limits, enforced twice: by the host on every sample and by the device itself.

    output_limit: |output| never exceeds this (output units).
    pv_window: the PV may move at most this far from its value at the start (PV units).
    pv_rate_limit: |d pv / dt| above this stops the run (PV units per s); 0 = off.
    max_duration: the powered part of the run stops after this long (s, device time).
    watchdog: the device zeroes its output when the host is silent this long (s, device time).
    max_sample_gap: a gap between consecutive samples longer than this stops the run (s, device
        time).
    max_frame_loss: the run stops with fault:link_quality when more than this fraction (0..1] of
        the sample frames is lost, or of the frames received is rejected (CRC, framing), over
        the last `frame_loss_window` s; 1 = off. Bad frames are never acted on either way.
    frame_loss_window: the window of the frame-loss check (s, device time).
    """

    output_limit: float = 30.0
    pv_window: float = 5.0
    pv_rate_limit: float = 0.0
    max_duration: float = 300.0
    watchdog: float = 0.5
    max_sample_gap: float = 0.25
    max_frame_loss: float = 0.5
    frame_loss_window: float = 2.0


@dataclass(frozen=True)
class RelayConfig:
    """The relay experiment (the one place for its defaults: autotune.core.relay.RelayPlan
    takes them through `relay_plan`).

    start_amplitude: first relay amplitude d (output units); None = a quarter of the output limit.
    target_amplitude: PV oscillation amplitude (peak, PV units) the adaptation aims for.
    hysteresis: relay hysteresis (PV units); None = from the rest precheck,
        max(3 x noise, resolution), the resolution from the board or the direction pulse.
    asymmetry: relay asymmetry a in [0, 1): the high step is d (1 + a), the low one d (1 - a).
        An asymmetric relay moves the mean output, so the mean PV change over whole periods
        gives the static gain of a self-regulating loop, and the half-period ratio its
        normalised dead time (Berner, Hägglund and Åström 2016). 0 = symmetric (then the bias
        is balanced instead).
    max_cycles: the relay stops after this many cycles.
    max_time: the relay stops after this long (s, device time).
    bias: output at the operating point (output units), the relay switches bias +/- d.
    bias_tolerance: half-periods are balanced when they differ by less than this fraction.
    amplitude_step_factor: one correction raises d by at most this factor (a lower d is set
        in one step; d also rises by it when the relay does not switch for stall_time).
    amplitude_stages: the relay runs at this many amplitudes at least; two measure a dead zone
        from the swing at both (1 = stay at the first amplitude that lands near the target).
    converge_tol: relative agreement of period and amplitude between the last steady cycles
        (widened to what the tick, PV noise and resolution can resolve).
    adapt_amplitude: adapt d towards the target amplitude (false: keep the start amplitude).
    balance_bias: adjust the bias until the half-periods match (symmetric relay only).
    stall_time: no relay switch for this long (s) raises d, or ends the run when it cannot
        rise; used only when the loop's own time scale is unknown: the wait is 10 times the
        direction pulse's response time, and after the first cycle three periods.
    amplitude_tolerance: d is left alone while the PV amplitude lies within this fraction of
        the target (widened to the PV's peak-reading error); the target is a guide, and every
        change of d costs cycles.
    min_cycles: steady cycles after the transient one that follows a change of the relay,
        needed before convergence can be declared; the last two or three must agree within
        converge_tol.
    confirm_samples: host loop: a switch needs this many consecutive samples beyond the
        hysteresis (2 rejects one-sample PV spikes at the cost of one sample of delay); 1 = off.
    """

    start_amplitude: float | None = None
    target_amplitude: float = 0.5
    hysteresis: float | None = None
    asymmetry: float = 0.2
    max_cycles: int = 20
    max_time: float = 120.0
    bias: float = 0.0
    bias_tolerance: float = 0.03
    amplitude_step_factor: float = 3.0
    amplitude_stages: int = 2
    converge_tol: float = 0.02
    adapt_amplitude: bool = True
    balance_bias: bool = True
    stall_time: float = 5.0
    min_cycles: int = 2
    amplitude_tolerance: float = 0.3
    confirm_samples: int = 1


@dataclass(frozen=True)
class PrecheckConfig:
    """Checks before any relay motion.

    rest_time: output held at the bias this long to measure noise, drift, resolution (s).
    pulse_size: size of the direction pulse (output units); None = the relay start amplitude.
    pulse_timeout: the PV must respond to the pulse within this long (s).
    breakaway: two slow output ramps measure the actuator dead zone (an unmeasured dead zone
        inflates the ultimate gain by d / (d - dead zone)). "auto" (default): the relay's swing
        at two amplitudes estimates the dead zone anyway, and the ramps run after the relay
        when that estimate shows one; true: the ramps run before the relay (which then starts
        at twice the dead zone at least); false: never (the relay's estimate still corrects
        the figures).
    breakaway_rate: ramp rate of the breakaway test (output units per s).
    """

    rest_time: float = 1.0
    pulse_size: float | None = None
    pulse_timeout: float = 2.0
    breakaway: bool | Literal["auto"] = "auto"
    breakaway_rate: float = 5.0


@dataclass(frozen=True)
class DesignConfig:
    """What the proposed gains should achieve.

    ms_target: maximum sensitivity target (robustness; 1.4 is a common choice).
    max_overshoot: largest acceptable overshoot of a setpoint step (percent); None = no limit.
    max_settling_time: largest acceptable 2% settling time (s); None = no limit.
    step_size: setpoint step used for the predictions (PV units); None = the target amplitude.
    """

    ms_target: float = 1.4
    max_overshoot: float | None = None
    max_settling_time: float | None = None
    step_size: float | None = None


@dataclass(frozen=True)
class StepConfig:
    """The confirmation step test (gains applied, one setpoint step).

    size: setpoint step (PV units); None = the design step size.
    duration: the shortest record after each setpoint change (s); the record is
        max(duration, 3 x the predicted settling time, 4 x Tu), capped by safety.max_duration.
    settle_time: the shortest hold at rest at the start value before the step (s); the hold
        lasts until the PV has been at rest for max(settle_time, Tu).
    deriv_filter_n: derivative filter of hand-given gains, Tf = Td / N (a proposal brings its
        own).
    load_offset: load-disturbance test: output offset added once the step has settled
        (output units); 0 = no load test.
    retries: unattended (--yes): after a step that misses the spec, this many gentler
        designs are tried in turn before the job gives up.
    """

    size: float | None = None
    duration: float = 5.0
    settle_time: float = 1.0
    deriv_filter_n: float = 10.0
    load_offset: float = 0.0
    retries: int = 2


@dataclass(frozen=True)
class SpecConfig:
    """What the confirmation step must show to pass (the step's spec; every check is written
    in result.json beside its limit). The user's design limits (design.max_overshoot,
    design.max_settling_time) bind as well where they are tighter.

    max_overshoot: overshoot never above this (percent of the step).
    overshoot_margin: overshoot at most this many percentage points above the prediction.
    settling_factor: settled within this many times the predicted settling time.
    max_saturation: the output at its limit for at most this long (s).
    max_decay_ratio: successive swings decaying by less than this ratio (swing k+2 over
        swing k) are a sustained oscillation: the step stops early and the verdict says
        "oscillating".
    settle_band: settling band half-width, fraction of the step (0.02: the 2 % band).
    noisy_band: the band used, and labelled, when the PV noise alone exceeds settle_band.
    """

    max_overshoot: float = 25.0
    overshoot_margin: float = 5.0
    settling_factor: float = 2.0
    max_saturation: float = 0.25
    max_decay_ratio: float = 0.5
    settle_band: float = 0.02
    noisy_band: float = 0.05


@dataclass(frozen=True)
class LoopConfig:
    """One loop of a plan (a ``[[loop]]`` table).

    name: the loop's name, also the folder of its files under the output folder (letters,
        digits, '_' and '-'; unique in the plan, whatever the letter case).
    axis: the loop's axis on the board (0-based; one loop an axis).
    role: "single" (tuned on its own) or "matched" (tuned, then compared with the plan's other
        matched loops; at least two).
    sign: +1 when a positive output makes this loop's PV rise, -1 when it makes it fall;
        None = connection.sign.
    limits: the ``[safety]`` keys set for this loop (``[loop.limits]``), as (key, value) pairs;
        every other limit is the ``[safety]`` one.
    wheel_radius, track_width: the drive base's wheel radius and track width (m; a "heading"
        loop's, turning wheel speeds in rad/s into the heading rate).
    host_ticks: a "heading" loop's period in device ticks (the host runs it).
    """

    name: str
    axis: int = -1
    role: LoopRole = "single"
    sign: int | None = None
    limits: tuple[tuple[str, Any], ...] = ()
    wheel_radius: float | None = None
    track_width: float | None = None
    host_ticks: int = 5


@dataclass(frozen=True)
class Config:
    """The whole configuration; `source` is the file it came from (or "<defaults>").

    `plan` holds the ``[[loop]]`` tables (empty: one loop, `connection.axis`); `for_loop`
    gives the configuration one loop of it runs with."""

    connection: ConnectionConfig = field(default_factory=ConnectionConfig)
    safety: SafetyConfig = field(default_factory=SafetyConfig)
    relay: RelayConfig = field(default_factory=RelayConfig)
    prechecks: PrecheckConfig = field(default_factory=PrecheckConfig)
    design: DesignConfig = field(default_factory=DesignConfig)
    step: StepConfig = field(default_factory=StepConfig)
    spec: SpecConfig = field(default_factory=SpecConfig)
    source: str = "<defaults>"
    overrides: tuple[tuple[str, str], ...] = ()
    """("section.key", where it was set) for each value set after the file (with_overrides)."""
    plan: tuple[LoopConfig, ...] = ()

    def for_loop(self, loop: LoopConfig) -> Config:
        """The configuration of one loop of the plan: its axis, its sign, its limits over the
        shared ``[safety]``, no plan (the single-loop job runs it as it stands)."""
        connection = replace(self.connection, axis=loop.axis,
                             sign=self.connection.sign if loop.sign is None else loop.sign)
        safety = replace(self.safety, **dict(loop.limits))
        return replace(self, connection=connection, safety=safety, plan=())

    def source_of(self, key: str) -> str:
        """Where the value of `key` ("section.key") came from: the override's origin (e.g.
        "command line") when one set it, else the file (or "<defaults>")."""
        return next((o for k, o in reversed(self.overrides) if k == key), self.source)

    @property
    def start_amplitude(self) -> float:
        """The relay start amplitude in output units (the automatic default resolved)."""
        if self.relay.start_amplitude is not None:
            return self.relay.start_amplitude
        return 0.25 * self.safety.output_limit

    @property
    def pulse_size(self) -> float:
        """The direction pulse size in output units (the automatic default resolved)."""
        if self.prechecks.pulse_size is not None:
            return self.prechecks.pulse_size
        return self.start_amplitude

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of all sections (for the session header)."""
        d = dataclasses.asdict(self)
        d.pop("overrides", None)
        if not self.plan:
            d.pop("plan", None)  # a one-loop run's header is as it always was
        else:
            d["plan"] = [_loop_dict(loop) for loop in d["plan"]]
        return d


HEADING_KEYS = ("wheel_radius", "track_width", "host_ticks")
"""The [[loop]] keys of a "heading" loop only."""


def _loop_dict(loop: dict[str, Any]) -> dict[str, Any]:
    """A [[loop]] as plain data: its limits a table; the heading keys only on a heading loop,
    its axis not there (it has none of its own)."""
    out = dict(loop, limits=dict(loop["limits"]))
    if out["role"] == "heading":
        out.pop("axis", None)
    else:
        for key in HEADING_KEYS:
            out.pop(key, None)
    return out


SECTIONS: dict[str, type] = {
    "connection": ConnectionConfig,
    "safety": SafetyConfig,
    "relay": RelayConfig,
    "prechecks": PrecheckConfig,
    "design": DesignConfig,
    "step": StepConfig,
    "spec": SpecConfig,
}


def _type_name(tp: Any) -> str:
    origin = get_origin(tp)
    if origin is Literal:
        return " or ".join(repr(a) for a in get_args(tp))
    if origin in (typing.Union, types.UnionType):
        args = [a for a in get_args(tp) if a is not type(None)]
        return " or ".join(_type_name(a) for a in args)
    return {float: "a number", int: "an integer", bool: "true or false", str: "a string"}.get(
        tp, str(tp)
    )


def _coerce(tp: Any, value: Any) -> Any:
    """Return `value` as type `tp` or raise TypeError (bool is never a number here)."""
    origin = get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        args = [a for a in get_args(tp) if a is not type(None)]
        if value is None and type(None) in get_args(tp):
            return None
        for a in args:
            try:
                return _coerce(a, value)
            except TypeError:
                continue
        raise TypeError
    if origin is Literal:
        if value in get_args(tp) and type(value) is type(get_args(tp)[0]):
            return value
        raise TypeError
    if tp is bool:
        if isinstance(value, bool):
            return value
        raise TypeError
    if tp is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        raise TypeError
    if tp is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            v = float(value)
            if not math.isfinite(v):
                raise TypeError
            return v
        raise TypeError
    if tp is str:
        if isinstance(value, str):
            return value
        raise TypeError
    raise TypeError  # pragma: no cover (unsupported field type)


def _section_from_dict(cls: type, data: dict[str, Any], path: str, section: str) -> Any:
    hints = typing.get_type_hints(cls)
    names = {f.name for f in fields(cls)}
    kwargs: dict[str, Any] = {}
    for key, value in data.items():
        if key not in names:
            known = ", ".join(sorted(names))
            raise ConfigError(path, f"{section}.{key}", f"unknown key (known keys: {known})")
        try:
            kwargs[key] = _coerce(hints[key], value)
        except TypeError:
            raise ConfigError(
                path,
                f"{section}.{key}",
                f"expected {_type_name(hints[key])}, got {value!r}",
            ) from None
    return cls(**kwargs)


def config_from_dict(data: dict[str, Any], path: str = "<dict>") -> Config:
    """Build and validate a Config from a TOML-shaped dict; raises ConfigError."""
    if not isinstance(data, dict):
        raise ConfigError(path, None, "expected a table of sections")
    parts: dict[str, Any] = {}
    plan: tuple[LoopConfig, ...] = ()
    for name, value in data.items():
        if name == "loop":
            plan = _plan_from_list(value, path)
            continue
        if name not in SECTIONS:
            known = ", ".join([*(f"[{s}]" for s in SECTIONS), "[[loop]]"])
            raise ConfigError(path, name, f"unknown section (known sections: {known})")
        if not isinstance(value, dict):
            raise ConfigError(path, name, f"expected a [{name}] table, got {value!r}")
        parts[name] = _section_from_dict(SECTIONS[name], value, path, name)
    if plan and "axis" in data.get("connection", {}):
        raise ConfigError(path, "connection.axis",
                          "not used with a [[loop]] plan: give each loop its own axis")
    cfg = Config(**parts, source=path, plan=plan)
    validate(cfg)
    return cfg


_LOOP_KEYS = {f.name for f in fields(LoopConfig)}


def _plan_from_list(value: Any, path: str) -> tuple[LoopConfig, ...]:
    """The ``[[loop]]`` tables as LoopConfigs (types and keys checked; ranges in validate)."""
    if not isinstance(value, list) or not all(isinstance(t, dict) for t in value):
        raise ConfigError(path, "loop", "expected [[loop]] tables (an array of tables)")
    plan = []
    for i, table in enumerate(value):
        where = f"loop[{i}]"
        for key in table:
            if key not in _LOOP_KEYS:
                known = ", ".join(sorted(_LOOP_KEYS))
                raise ConfigError(path, f"{where}.{key}", f"unknown key (known keys: {known})")
        for key in ("name",) if table.get("role") == "heading" else ("name", "axis"):
            if key not in table:
                raise ConfigError(path, f"{where}.{key}", "must be given")
        hints = typing.get_type_hints(LoopConfig)
        kwargs: dict[str, Any] = {}
        for key in ("name", "axis", "role", "sign", "wheel_radius", "track_width",
                    "host_ticks"):
            if key in table:
                try:
                    kwargs[key] = _coerce(hints[key], table[key])
                except TypeError:
                    raise ConfigError(path, f"{where}.{key}",
                                      f"expected {_type_name(hints[key])}, got {table[key]!r}"
                                      ) from None
        limits = table.get("limits", {})
        if not isinstance(limits, dict):
            raise ConfigError(path, f"{where}.limits",
                              f"expected a [loop.limits] table, got {limits!r}")
        checked = _section_from_dict(SafetyConfig, limits, path, f"{where}.limits")
        kwargs["limits"] = tuple((k, getattr(checked, k)) for k in limits)
        plan.append(LoopConfig(**kwargs))
    return tuple(plan)


def _validate_plan(cfg: Config, src: str) -> None:
    """The plan's own rules, then every loop's configuration as the job will run it."""
    plan = cfg.plan
    if not plan:
        return
    if len(plan) > MAX_LOOPS:
        raise ConfigError(src, "loop", f"at most {MAX_LOOPS} loops, got {len(plan)}")
    names: dict[str, int] = {}
    axes: dict[int, str] = {}
    for i, loop in enumerate(plan):
        where = f"loop[{i}]"
        if not loop.name or not set(loop.name) <= LOOP_NAME_CHARS:
            raise ConfigError(src, f"{where}.name", f"{loop.name!r}: letters, digits, '_' and "
                              "'-' only (it names the loop's folder)")
        if loop.name.lower() in names:
            raise ConfigError(src, f"{where}.name", f"{loop.name!r} is taken by "
                              f"loop[{names[loop.name.lower()]}]")
        names[loop.name.lower()] = i
        if loop.role == "heading":
            _validate_heading(plan, i, src)
            continue
        if not 0 <= loop.axis <= 255:
            raise ConfigError(src, f"{where}.axis", f"must be 0..255, got {loop.axis}")
        if loop.axis in axes:
            raise ConfigError(src, f"{where}.axis", f"axis {loop.axis} is already loop "
                              f"{axes[loop.axis]!r}'s: one loop an axis")
        axes[loop.axis] = loop.name
        if loop.sign is not None and loop.sign not in (1, -1):
            raise ConfigError(src, f"{where}.sign", f"must be +1 or -1, got {loop.sign}")
    if sum(loop.role == "matched" for loop in plan) == 1:
        (i,) = (i for i, loop in enumerate(plan) if loop.role == "matched")
        raise ConfigError(src, f"loop[{i}].role",
                          "a matched loop needs another matched loop to be compared with")
    for loop in plan:
        if loop.role != "heading":
            validate(cfg.for_loop(loop), source=f"{src}, loop {loop.name!r}")


def _validate_heading(plan: tuple[LoopConfig, ...], i: int, src: str) -> None:
    """A heading loop: two matched loops before it (its wheels), its geometry given (m, > 0),
    host_ticks 1..1000."""
    loop = plan[i]
    where = f"loop[{i}]"
    if sum(lp.role == "matched" for lp in plan[:i]) != 2:
        raise ConfigError(src, f"{where}.role", "a heading loop comes after exactly two "
                          "matched loops (its left and right wheel, in that order)")
    for key in ("wheel_radius", "track_width"):
        v = getattr(loop, key)
        if v is None or not (math.isfinite(v) and v > 0):
            raise ConfigError(src, f"{where}.{key}", f"must be given, in m (> 0), got {v!r}")
    if not 1 <= loop.host_ticks <= 1000:
        raise ConfigError(src, f"{where}.host_ticks", f"must be 1..1000, got {loop.host_ticks}")


def load_config(path: str | Path | None) -> Config:
    """Read a TOML config file (None -> all defaults); raises ConfigError on any problem."""
    if path is None:
        cfg = Config()
        validate(cfg)
        return cfg
    p = str(path)
    try:
        with open(p, "rb") as f:
            data = tomllib.load(f)
    except FileNotFoundError:
        raise ConfigError(p, None, "no such file") from None
    except OSError as exc:
        raise ConfigError(p, None, f"cannot read: {exc.strerror or exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(p, None, f"not valid TOML: {exc}") from None
    except UnicodeDecodeError:
        raise ConfigError(p, None, "not a TOML file (not UTF-8 text)") from None
    except RecursionError:
        raise ConfigError(p, None, "not a usable TOML file (nested too deeply)") from None
    return config_from_dict(data, p)


def with_overrides(cfg: Config, overrides: dict[str, Any], origin: str = "command line"
                   ) -> Config:
    """Return `cfg` with `{"section.key": value}` replaced (None values are skipped), validated.

    Used for command-line options; a problem names the option's key as `section.key` and the
    source `origin`, and later checks of a replaced key (against the device, the noise) name
    `origin` too (Config.source_of).
    """
    sections: dict[str, dict[str, Any]] = {}
    for dotted, value in overrides.items():
        if value is None:
            continue
        section, key = dotted.split(".", 1)
        sections.setdefault(section, {})[key] = value
    new = cfg
    for section, values in sections.items():
        cls = SECTIONS[section]
        checked = _section_from_dict(cls, values, origin, section)
        new = replace(new, **{section: replace(getattr(new, section), **{
            k: getattr(checked, k) for k in values
        })})
    new = replace(new, overrides=cfg.overrides + tuple(
        (f"{section}.{k}", origin) for section, values in sections.items() for k in values))
    where = "command-line options" if origin == "command line" else f"the {origin}"
    validate(new, source=f"{cfg.source} with {where}")
    return new


def _positive(cfg_source: str, key: str, value: float | int | None, *, allow_zero: bool = False,
              optional: bool = False) -> None:
    if value is None:
        if optional:
            return
        raise ConfigError(cfg_source, key, "must be given")
    if allow_zero:
        if value < 0:
            raise ConfigError(cfg_source, key, f"must be >= 0, got {value!r}")
    elif value <= 0:
        raise ConfigError(cfg_source, key, f"must be > 0, got {value!r}")


def _check_ranges(cfg: Config, src: str) -> None:
    """Every number of every section fits what carries it: floats the wire's float32 (less
    than half of it, so that a window around a start value fits too), integers 32 bits."""
    for section in SECTIONS:
        part = getattr(cfg, section)
        for f in fields(part):
            v = getattr(part, f.name)
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                continue
            key = f"{section}.{f.name}"
            if isinstance(v, float) and not abs(v) <= WIRE_FLOAT_MAX / 2:
                raise ConfigError(src, key, f"{v:g} is out of range: the wire format (float32) "
                                  f"carries at most {WIRE_FLOAT_MAX:.3g}, and the limits "
                                  "around a start value need room within it")
            if isinstance(v, int) and not abs(v) <= INT_MAX:
                raise ConfigError(src, key, f"{v} is out of range (at most {INT_MAX})")


def validate(cfg: Config, source: str | None = None) -> None:
    """Reject impossible values and combinations; raises ConfigError naming the key."""
    src = source or cfg.source
    c, s, r, p, d, st = cfg.connection, cfg.safety, cfg.relay, cfg.prechecks, cfg.design, cfg.step
    _check_ranges(cfg, src)
    if not 0 < c.baudrate <= BAUD_MAX:
        raise ConfigError(src, "connection.baudrate",
                          f"must be 1..{BAUD_MAX} bit/s, got {c.baudrate}")
    if c.axis < 0 or c.axis > 255:
        raise ConfigError(src, "connection.axis", f"must be 0..255, got {c.axis}")
    if c.sign not in (1, -1):
        raise ConfigError(src, "connection.sign", f"must be +1 or -1, got {c.sign}")
    _positive(src, "connection.baudrate", c.baudrate)
    _positive(src, "connection.speed", c.speed)
    _positive(src, "safety.output_limit", s.output_limit)
    _positive(src, "safety.pv_window", s.pv_window)
    _positive(src, "safety.pv_rate_limit", s.pv_rate_limit, allow_zero=True)
    _positive(src, "safety.max_duration", s.max_duration)
    _positive(src, "safety.watchdog", s.watchdog)
    if s.watchdog > 65.535:
        raise ConfigError(src, "safety.watchdog", f"must be at most 65.535 s, got {s.watchdog}")
    if s.watchdog < 0.01:
        raise ConfigError(src, "safety.watchdog", f"must be at least 0.01 s, got {s.watchdog}")
    _positive(src, "safety.max_sample_gap", s.max_sample_gap)
    if not 0.0 < s.max_frame_loss <= 1.0:
        raise ConfigError(src, "safety.max_frame_loss",
                          f"must be a fraction in (0, 1], got {s.max_frame_loss}")
    _positive(src, "safety.frame_loss_window", s.frame_loss_window)
    if not 1 <= r.confirm_samples <= 10:
        raise ConfigError(src, "relay.confirm_samples", f"must be 1..10, got {r.confirm_samples}")
    _positive(src, "relay.start_amplitude", r.start_amplitude, optional=True)
    _positive(src, "relay.target_amplitude", r.target_amplitude)
    _positive(src, "relay.hysteresis", r.hysteresis, allow_zero=True, optional=True)
    _positive(src, "relay.max_cycles", r.max_cycles)
    _positive(src, "relay.max_time", r.max_time)
    _positive(src, "relay.bias_tolerance", r.bias_tolerance)
    _positive(src, "relay.converge_tol", r.converge_tol)
    _positive(src, "relay.amplitude_tolerance", r.amplitude_tolerance)
    _positive(src, "relay.stall_time", r.stall_time)
    if r.min_cycles < 1:
        raise ConfigError(src, "relay.min_cycles", f"must be >= 1, got {r.min_cycles}")
    if r.min_cycles > r.max_cycles:
        raise ConfigError(src, "relay.min_cycles", f"{r.min_cycles} is more than "
                          f"relay.max_cycles {r.max_cycles}")
    if r.amplitude_step_factor <= 1.0:
        raise ConfigError(src, "relay.amplitude_step_factor",
                          f"must be > 1, got {r.amplitude_step_factor}")
    if not 0.0 <= r.asymmetry < 0.9:
        raise ConfigError(src, "relay.asymmetry", f"must be in [0, 0.9), got {r.asymmetry}")
    if not 1 <= r.amplitude_stages <= 5:
        raise ConfigError(src, "relay.amplitude_stages",
                          f"must be 1..5, got {r.amplitude_stages}")
    _positive(src, "prechecks.rest_time", p.rest_time)
    _positive(src, "prechecks.pulse_size", p.pulse_size, optional=True)
    _positive(src, "prechecks.pulse_timeout", p.pulse_timeout)
    _positive(src, "prechecks.breakaway_rate", p.breakaway_rate)
    if d.ms_target <= 1.0:
        raise ConfigError(src, "design.ms_target", f"must be > 1, got {d.ms_target}")
    _positive(src, "design.max_overshoot", d.max_overshoot, allow_zero=True, optional=True)
    _positive(src, "design.max_settling_time", d.max_settling_time, optional=True)
    _positive(src, "design.step_size", d.step_size, optional=True)
    _positive(src, "step.size", st.size, optional=True)
    _positive(src, "step.duration", st.duration)
    _positive(src, "step.settle_time", st.settle_time, allow_zero=True)
    _positive(src, "step.deriv_filter_n", st.deriv_filter_n)
    if st.retries < 0:
        raise ConfigError(src, "step.retries", f"must be >= 0, got {st.retries}")
    sp = cfg.spec
    _positive(src, "spec.max_overshoot", sp.max_overshoot, allow_zero=True)
    _positive(src, "spec.overshoot_margin", sp.overshoot_margin, allow_zero=True)
    _positive(src, "spec.settling_factor", sp.settling_factor)
    _positive(src, "spec.max_saturation", sp.max_saturation, allow_zero=True)
    _positive(src, "spec.max_decay_ratio", sp.max_decay_ratio)
    for key, v in (("spec.settle_band", sp.settle_band), ("spec.noisy_band", sp.noisy_band)):
        if not 0.0 < v < 0.5:
            raise ConfigError(src, key, f"must be a fraction of the step in (0, 0.5), got {v:g}")
    if sp.noisy_band < sp.settle_band:
        raise ConfigError(src, "spec.noisy_band", f"{sp.noisy_band:g} is narrower than "
                          f"spec.settle_band {sp.settle_band:g}")

    # Combinations that cannot work.
    if abs(r.bias) >= s.output_limit:
        raise ConfigError(src, "relay.bias", f"|bias| {abs(r.bias):g} leaves no room within "
                          f"safety.output_limit {s.output_limit:g}")
    room = s.output_limit - abs(r.bias)
    if cfg.start_amplitude > room:
        raise ConfigError(src, "relay.start_amplitude",
                          f"{cfg.start_amplitude:g} plus |bias| {abs(r.bias):g} exceeds "
                          f"safety.output_limit {s.output_limit:g}")
    if cfg.pulse_size > room:
        raise ConfigError(src, "prechecks.pulse_size",
                          f"{cfg.pulse_size:g} plus |bias| {abs(r.bias):g} exceeds "
                          f"safety.output_limit {s.output_limit:g}")
    # The oscillation (peak target_amplitude either side of the centre) plus its overshoot
    # while the amplitude adapts must fit in the window: half the window (common practice,
    # no source).
    if r.target_amplitude > 0.5 * s.pv_window:
        raise ConfigError(src, "relay.target_amplitude",
                          f"{r.target_amplitude:g} is more than half of safety.pv_window "
                          f"{s.pv_window:g}; widen the window or aim lower")
    if r.hysteresis is not None and r.hysteresis >= r.target_amplitude:
        raise ConfigError(src, "relay.hysteresis",
                          f"{r.hysteresis:g} must be below relay.target_amplitude "
                          f"{r.target_amplitude:g}")
    if d.step_size is not None and d.step_size > s.pv_window:
        raise ConfigError(src, "design.step_size",
                          f"{d.step_size:g} exceeds safety.pv_window {s.pv_window:g}")
    if st.size is not None and st.size > s.pv_window:
        raise ConfigError(src, "step.size",
                          f"{st.size:g} exceeds safety.pv_window {s.pv_window:g}")
    if s.max_sample_gap < 0.0:  # pragma: no cover (caught above)
        raise ConfigError(src, "safety.max_sample_gap", "must be > 0")
    _validate_plan(cfg, src)


def check_against_device(cfg: Config, max_output: float, axis_count: int,
                         tick: float) -> None:
    """Reject limits the board cannot honour (after the handshake); raises ConfigError.

    max_output: the board's largest output (output units); axis_count: axes on the board;
    tick: the board's tick (s).
    """
    if cfg.safety.output_limit > max_output:
        raise ConfigError(cfg.source_of("safety.output_limit"), "safety.output_limit",
                          f"{cfg.safety.output_limit:g} is above the device's maximum output "
                          f"{max_output:g}")
    if cfg.connection.axis >= axis_count:
        raise ConfigError(cfg.source_of("connection.axis"), "connection.axis",
                          f"axis {cfg.connection.axis} does not exist: the device has "
                          f"{axis_count} axis(es), numbered from 0")
    if cfg.safety.max_sample_gap < 2 * tick:
        raise ConfigError(cfg.source_of("safety.max_sample_gap"), "safety.max_sample_gap",
                          f"{cfg.safety.max_sample_gap:g} s is shorter than two device ticks "
                          f"({2 * tick:g} s)")
    if cfg.safety.watchdog < 2 * tick:
        raise ConfigError(cfg.source_of("safety.watchdog"), "safety.watchdog",
                          f"{cfg.safety.watchdog:g} s is shorter than two device ticks "
                          f"({2 * tick:g} s)")


def check_against_noise(cfg: Config, noise_std: float, resolution: float) -> None:
    """Reject a PV window or target amplitude the measured noise makes meaningless.

    Called after the rest precheck (noise_std, resolution in PV units); raises ConfigError.
    A window narrower than 10 noise standard deviations, or a target amplitude below 5 of them,
    cannot be told apart from noise (common practice, no source).
    """
    floor = max(noise_std, 0.5 * resolution)
    if floor > 0 and cfg.safety.pv_window < 10 * floor:
        raise ConfigError(cfg.source_of("safety.pv_window"), "safety.pv_window",
                          f"{cfg.safety.pv_window:g} is narrower than the measured noise allows "
                          f"(noise {noise_std:.3g}, resolution {resolution:.3g}; need at least "
                          f"{10 * floor:.3g})")
    if floor > 0 and cfg.relay.target_amplitude < 5 * floor:
        raise ConfigError(cfg.source_of("relay.target_amplitude"), "relay.target_amplitude",
                          f"{cfg.relay.target_amplitude:g} is lost in the measured noise "
                          f"(noise {noise_std:.3g}, resolution {resolution:.3g}; need at least "
                          f"{5 * floor:.3g})")


def relay_plan(relay: RelayConfig, *, start_amplitude: float | None = None,
               pv_window: float | None = None, deadband: float = 0.0, tick: float = 0.0,
               pv_noise: float = 0.0, pv_resolution: float = 0.0,
               response_time: float = 0.0, **internal: Any) -> RelayPlan:
    """The relay experiment's plan from the config's [relay] table.

    start_amplitude (output units; None: the table's, which may be None too), pv_window (PV
    units, from [safety]), and what the prechecks measured: deadband (output units), tick (s),
    pv_noise and pv_resolution (PV units), response_time (s: the direction pulse's; the relay
    counts as stalled after 10 times it without a switch, the table's stall_time standing in
    when it is unknown; common practice, no source). `internal`: RelayPlan's own settings (e.g.
    max_amplitude, settle_cycles), for tests and special runs.
    """
    return RelayPlan(
        target_amplitude=relay.target_amplitude,
        amplitude_step_factor=relay.amplitude_step_factor,
        amplitude_tolerance=relay.amplitude_tolerance,
        amplitude_stages=relay.amplitude_stages,
        adapt_amplitude=relay.adapt_amplitude,
        balance_bias=relay.balance_bias,
        bias_tolerance=relay.bias_tolerance,
        max_cycles=relay.max_cycles,
        max_time=relay.max_time,
        converge_tol=relay.converge_tol,
        min_cycles=relay.min_cycles,
        stall_time=(None if relay.stall_time is None else
                    10.0 * response_time if response_time > 0 else relay.stall_time),
        start_amplitude=start_amplitude if start_amplitude is not None
        else relay.start_amplitude,
        pv_window=pv_window, deadband=deadband, tick=tick, pv_noise=pv_noise,
        pv_resolution=pv_resolution, **internal)
