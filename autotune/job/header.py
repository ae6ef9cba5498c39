"""The session header of a powered run: tool, config, device, limits as read back, start."""

from __future__ import annotations

from typing import Any

from autotune import __version__
from autotune.config import Config


def session_header(cfg: Config, *, verb: str, port: str, info: Any,
                   limits: dict[str, float] | None, pv_start: float | None,
                   t_start: float | None, stale_faults: list[str], speed: float, sim: Any = None,
                   faults: str | None = None, **extra: Any) -> dict[str, Any]:
    """The header record's fields (the recorder adds type, format, version and tool).

    info: the device's DeviceInfo; limits: the read-back limits; pv_start: PV units; t_start:
    device time (s) the run's duration counts from; speed:
    the simulated board's time factor (1 for a real board); sim: the SimDevice for `--port sim`
    (its plant and speed are recorded) with its `faults` spec; extra: the verb's own fields.
    """
    header: dict[str, Any] = {
        "verb": verb,
        "version_tool": __version__,
        "config": cfg.to_dict(),
        "config_source": cfg.source,
        "port": port,
        "device": {
            "name": info.device_name, "firmware": info.firmware, "boot_id": info.boot_id,
            "axis_count": info.axis_count, "tick": info.tick,
            "capabilities": info.capabilities, "max_output": info.max_output,
            "has_host_loop": info.has_host_loop,
            "has_device_relay": info.has_device_relay,
            "has_device_pid": info.has_device_pid,
        },
        "limits": limits,
        "pv_start": pv_start,
        "t_start": t_start,
        "stale_faults_cleared": stale_faults,
        "axis": cfg.connection.axis,
        "sign": cfg.connection.sign,
        "speed": speed,
    }
    if sim is not None:
        header["sim"] = {"plant": sim.plant, "speed": sim.speed, "faults": faults}
    else:  # connection.plant names the simulated board's plant: none on another port
        header["config"]["connection"]["plant"] = None
    header.update(extra)
    return header
