"""Plant file (TOML) for the mock device: loading, validation, defaults.

A plant file has these tables (every table and key is optional; defaults shown)::

    [plant]
    num = [1.0]          # numerator, highest power of s first (as scipy.signal)
    den = [1.0, 1.0]     # denominator, same order; ending in 0 = integrating plant
    delay = 0.0          # dead time, s
    load = 0.0           # constant disturbance at the plant input, output units
    [actuator]
    limit = 100.0        # drive saturates at +/- limit, output units
    deadband = 0.0       # |drive| <= deadband moves nothing (dead zone), output units
    [sensor]
    noise = 0.0          # standard deviation of the PV noise, PV units
    resolution = 0.0     # quantisation step, PV units; 0 = none
    offset = 0.0         # PV at rest, PV units
    [device]
    period = 0.01        # device tick, s
    name = "mock-device" # reported in the handshake (at most 16 bytes UTF-8)
    max_output = 100.0   # the device refuses output limits above this, output units
    watchdog = 0.25      # watchdog period used when SetLimits gives watchdog_ms = 0, s
    relay = true         # offers the device-side relay
    pid = true           # offers the device-side PID
    seed = 0             # seed of the sensor noise generator (--seed overrides)
    [faults]             # same keys as --faults (see mock_device.faults)

A board with several axes lists them as ``[[axis]]`` tables instead of the top-level
``[plant]``, ``[actuator]`` and ``[sensor]`` (which are then an error); each holds its own
``[axis.plant]``, ``[axis.actuator]`` and ``[axis.sensor]`` (same keys and defaults as above)
and an optional ``name`` (free text, for the reader and the logs). Axes are numbered from 0 in
the order written; ``[device]`` and ``[faults]`` are shared (the device faults act on axis 0).
A file without ``[[axis]]`` is a one-axis board, exactly as before.

Unknown tables or keys and wrong types raise MockConfigError naming the file and the key.
Built-in scenarios (``cart-wheel``, ``cart-wheel-loaded``, ``mast-pan``, ``drive-base``) live in
mock_device/scenarios/.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from mock_device.faults import FaultSpec, FaultSpecError, fault_spec_from_mapping

__all__ = [
    "ActuatorConfig",
    "AxisConfig",
    "DeviceConfig",
    "MockConfig",
    "MockConfigError",
    "PlantConfig",
    "SCENARIOS",
    "SensorConfig",
    "load_config",
    "parse_config",
]

SCENARIOS = ("cart-wheel", "cart-wheel-loaded", "mast-pan", "drive-base")
MAX_AXES = 8
"""Most axes a plant file may declare (a drive base or a small arm; the wire allows 255)."""
COEFFICIENT_MAX = 1e12
"""Largest |coefficient| of num and den once both are divided by den[0]: far beyond any motor
loop (time constants down to a microsecond), well inside what the simulation keeps finite."""
WIRE_MAX = 3.4028234663852886e38
"""Largest float32 (the wire format): values reported to the host must fit."""


class MockConfigError(ValueError):
    """Bad plant file: ``"<file>: [table] key: problem"``."""

    def __init__(self, source: str, key: str | None, problem: str) -> None:
        where = f"{source}: {key}: " if key else f"{source}: "
        super().__init__(where + problem)
        self.source, self.key, self.problem = source, key, problem


@dataclass(frozen=True)
class PlantConfig:
    """Transfer function num/den (s), dead time ``delay`` (s), ``load`` (output units)."""

    num: tuple[float, ...] = (1.0,)
    den: tuple[float, ...] = (1.0, 1.0)
    delay: float = 0.0
    load: float = 0.0


@dataclass(frozen=True)
class ActuatorConfig:
    """Saturation ``limit`` and dead zone ``deadband``, output units."""

    limit: float = 100.0
    deadband: float = 0.0


@dataclass(frozen=True)
class SensorConfig:
    """Noise std, quantisation step and rest offset, PV units."""

    noise: float = 0.0
    resolution: float = 0.0
    offset: float = 0.0


@dataclass(frozen=True)
class DeviceConfig:
    """Tick ``period`` (s), handshake ``name``, ``max_output`` (output units), default
    ``watchdog`` (s), device-side ``relay``/``pid`` capabilities, noise ``seed``."""

    period: float = 0.01
    name: str = "mock-device"
    max_output: float = 100.0
    watchdog: float = 0.25
    relay: bool = True
    pid: bool = True
    seed: int = 0


@dataclass(frozen=True)
class AxisConfig:
    """One axis of the board: its plant, actuator and sensor; ``name`` is free text."""

    plant: PlantConfig = field(default_factory=PlantConfig)
    actuator: ActuatorConfig = field(default_factory=ActuatorConfig)
    sensor: SensorConfig = field(default_factory=SensorConfig)
    name: str = ""


@dataclass(frozen=True)
class MockConfig:
    """Everything the mock device needs; ``source`` names the file or scenario.

    ``plant``, ``actuator`` and ``sensor`` are axis 0's; ``axes`` lists every axis of a board
    with several (empty for a one-axis board: use ``axis_configs``)."""

    plant: PlantConfig = field(default_factory=PlantConfig)
    actuator: ActuatorConfig = field(default_factory=ActuatorConfig)
    sensor: SensorConfig = field(default_factory=SensorConfig)
    device: DeviceConfig = field(default_factory=DeviceConfig)
    faults: FaultSpec = field(default_factory=FaultSpec)
    source: str = "<defaults>"
    axes: tuple[AxisConfig, ...] = ()

    @property
    def axis_configs(self) -> tuple[AxisConfig, ...]:
        """Every axis, numbered from 0 (one for a file without ``[[axis]]``)."""
        return self.axes or (AxisConfig(self.plant, self.actuator, self.sensor),)


# key -> kind: "float", "floats", "str", "bool", "int"
_SCHEMA: dict[str, dict[str, str]] = {
    "plant": {"num": "floats", "den": "floats", "delay": "float", "load": "float"},
    "actuator": {"limit": "float", "deadband": "float"},
    "sensor": {"noise": "float", "resolution": "float", "offset": "float"},
    "device": {
        "period": "float",
        "name": "str",
        "max_output": "float",
        "watchdog": "float",
        "relay": "bool",
        "pid": "bool",
        "seed": "int",
    },
}


def _typed(source: str, key: str, kind: str, value: Any) -> Any:
    def bad(expected: str) -> MockConfigError:
        return MockConfigError(source, key, f"expected {expected}, got {value!r}")

    if kind == "float":
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise bad("a number")
        v = float(value)
        if not math.isfinite(v):
            raise MockConfigError(source, key, f"must be finite, got {value!r}")
        return v
    if kind == "floats":
        if not isinstance(value, list) or not value:
            raise bad("a non-empty list of numbers")
        out = []
        for item in value:
            if isinstance(item, bool) or not isinstance(item, int | float):
                raise bad("a non-empty list of numbers")
            if not math.isfinite(float(item)):
                raise MockConfigError(source, key, f"must be finite, got {value!r}")
            out.append(float(item))
        return tuple(out)
    if kind == "str":
        if not isinstance(value, str):
            raise bad("a string")
        return value
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad("true or false")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad("an integer")
        return value
    raise AssertionError(kind)


_AXIS_TABLES = ("plant", "actuator", "sensor")


def _section(source: str, table: str, content: Any, prefix: str = "") -> dict[str, Any]:
    """Typed values of one table; ``prefix`` names the enclosing ``[[axis]]`` in errors."""
    if not isinstance(content, dict):
        raise MockConfigError(source, f"{prefix}[{table}]", "expected a table")
    schema = _SCHEMA[table]
    values: dict[str, Any] = {}
    for key, value in content.items():
        name = f"{prefix}[{table}] {key}"
        if key not in schema:
            raise MockConfigError(
                source, name, f"unknown key (known in [{table}]: {', '.join(schema)})"
            )
        values[key] = _typed(source, name, schema[key], value)
    return values


def _axes(source: str, content: Any) -> tuple[AxisConfig, ...]:
    """The ``[[axis]]`` tables: each its plant, actuator, sensor and name."""
    if not isinstance(content, list) or not all(isinstance(a, dict) for a in content):
        raise MockConfigError(source, "[[axis]]", "expected an array of tables ([[axis]])")
    if not 1 <= len(content) <= MAX_AXES:
        raise MockConfigError(source, "[[axis]]",
                              f"between 1 and {MAX_AXES} axes, got {len(content)}")
    axes = []
    for i, table in enumerate(content):
        prefix = f"[[axis]] {i} "
        parts: dict[str, Any] = {}
        name = ""
        for key, value in table.items():
            if key == "name":
                name = _typed(source, f"{prefix}name", "str", value)
            elif key in _AXIS_TABLES:
                parts[key] = _section(source, key, value, prefix)
            else:
                raise MockConfigError(
                    source, f"{prefix}{key}",
                    f"unknown key (known in [[axis]]: name, {', '.join(_AXIS_TABLES)})",
                )
        axis = AxisConfig(
            PlantConfig(**parts.get("plant", {})),
            ActuatorConfig(**parts.get("actuator", {})),
            SensorConfig(**parts.get("sensor", {})),
            name,
        )
        _check_axis(source, axis.plant, axis.actuator, axis.sensor, prefix)
        axes.append(axis)
    return tuple(axes)


def parse_config(data: dict[str, Any], source: str = "<plant file>") -> MockConfig:
    """Validate a parsed TOML document and build a MockConfig (errors name source and key)."""
    sections: dict[str, dict[str, Any]] = {}
    faults = FaultSpec()
    axes: tuple[AxisConfig, ...] = ()
    for table, content in data.items():
        if table == "faults":
            if not isinstance(content, dict):
                raise MockConfigError(source, "[faults]", "expected a table")
            try:
                faults = fault_spec_from_mapping(content)
            except FaultSpecError as exc:
                raise MockConfigError(source, f"[faults] {exc.key}", exc.problem) from exc
            continue
        if table == "axis":
            axes = _axes(source, content)
            continue
        if table not in _SCHEMA:
            raise MockConfigError(
                source, f"[{table}]",
                f"unknown table (known: {', '.join([*_SCHEMA, 'faults', '[axis]'])})",
            )
        sections[table] = _section(source, table, content)
    if axes:
        for table in _AXIS_TABLES:
            if table in sections:
                raise MockConfigError(
                    source, f"[{table}]",
                    "not allowed beside [[axis]]: give each axis its own [axis.{table}]",
                )

    device = DeviceConfig(**sections.get("device", {}))
    if axes:
        _check_device(source, device)
        first = axes[0]
        return MockConfig(first.plant, first.actuator, first.sensor, device, faults, source, axes)
    plant = PlantConfig(**sections.get("plant", {}))
    actuator = ActuatorConfig(**sections.get("actuator", {}))
    sensor = SensorConfig(**sections.get("sensor", {}))
    _check_axis(source, plant, actuator, sensor)
    _check_device(source, device)
    return MockConfig(plant, actuator, sensor, device, faults, source)


def _check_axis(
    source: str,
    plant: PlantConfig,
    actuator: ActuatorConfig,
    sensor: SensorConfig,
    prefix: str = "",
) -> None:
    """Ranges of one axis's plant, actuator and sensor; ``prefix`` names its ``[[axis]]``."""

    def err(key: str, problem: str) -> MockConfigError:
        return MockConfigError(source, prefix + key, problem)

    if plant.den[0] == 0.0:
        raise err("[plant] den", "leading coefficient must not be 0")
    for key, coefs in (("num", plant.num), ("den", plant.den)):
        for c in coefs:
            scaled = c / plant.den[0]
            if not abs(scaled) <= COEFFICIENT_MAX:
                raise err(f"[plant] {key}", f"coefficient {c:g} is out of range: divided by "
                          f"den[0] = {plant.den[0]:g} every coefficient must lie within "
                          f"+/-{COEFFICIENT_MAX:g}")
    if all(c == 0.0 for c in plant.num):
        raise err("[plant] num", "all coefficients are 0: the plant would never move")
    if not plant.delay <= 3600.0:
        raise err("[plant] delay", f"must be at most 3600 s, got {plant.delay}")
    if len(plant.num) > len(plant.den):
        raise err("[plant] num", "more coefficients than den: the plant must be proper")
    if plant.delay < 0.0:
        raise err("[plant] delay", f"must be >= 0 s, got {plant.delay}")
    if actuator.limit <= 0.0:
        raise err("[actuator] limit", f"must be > 0, got {actuator.limit}")
    if not 0.0 <= actuator.deadband < actuator.limit:
        raise err("[actuator] deadband", f"must be in [0, limit), got {actuator.deadband}")
    for key, value in (("[plant] load", plant.load), ("[actuator] limit", actuator.limit),
                       ("[sensor] offset", sensor.offset), ("[sensor] noise", sensor.noise)):
        if not abs(value) <= 1e9:
            raise err(key, f"{value:g} is out of range: at most 1e9 in magnitude")
    if sensor.noise < 0.0:
        raise err("[sensor] noise", f"must be >= 0, got {sensor.noise}")
    if sensor.resolution < 0.0:
        raise err("[sensor] resolution", f"must be >= 0, got {sensor.resolution}")


def _check_device(source: str, device: DeviceConfig) -> None:
    """Ranges of the shared ``[device]`` table."""

    def err(key: str, problem: str) -> MockConfigError:
        return MockConfigError(source, key, problem)

    if not abs(device.max_output) <= 1e9:
        raise err("[device] max_output",
                  f"{device.max_output:g} is out of range: at most 1e9 in magnitude")
    if not 1e-4 <= device.period <= 1.0:
        raise err("[device] period", f"must be in [0.0001, 1] s, got {device.period}")
    if device.max_output <= 0.0:
        raise err("[device] max_output", f"must be > 0, got {device.max_output}")
    if not 0.0 < device.watchdog <= 65.535:
        raise err("[device] watchdog", f"must be in (0, 65.535] s, got {device.watchdog}")
    if len(device.name.encode("utf-8")) > 16:
        raise err("[device] name", "at most 16 bytes (UTF-8)")
    if device.seed < 0:
        raise err("[device] seed", f"must be >= 0, got {device.seed}")


def load_config(plant: str | Path) -> MockConfig:
    """Load a plant file, or a built-in scenario by name (see SCENARIOS)."""
    name = str(plant)
    if name in SCENARIOS:
        ref = resources.files("mock_device") / "scenarios" / f"{name}.toml"
        text = ref.read_text(encoding="utf-8")
        source = f"scenario {name}"
    else:
        path = Path(plant)
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError as exc:
            raise MockConfigError(
                name, None, f"no such file (built-in scenarios: {', '.join(SCENARIOS)})"
            ) from exc
        except OSError as exc:
            raise MockConfigError(name, None, f"cannot read: {exc.strerror or exc}") from exc
        except UnicodeDecodeError as exc:
            raise MockConfigError(name, None, "not UTF-8 text") from exc
        source = name
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise MockConfigError(source, None, f"not valid TOML: {exc}") from exc
    return parse_config(data, source)
