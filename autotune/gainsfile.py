"""The accepted-gains file (TOML) and a code-ready block of the per-tick values.

Written when the operator accepts a confirmation step. Holds the gains in every form people's loop
code uses (parallel, standard, per tick for the loop period), the derivative filter, the
anti-windup and setpoint-weight settings, where the gains came from and the measured figures.

Units: gains in output units per PV unit, `ki` per second, `kd` in seconds (parallel form
u = kp e + ki ∫e dt + kd de/dt); Ti, Td, Tf, Tt and the loop period in seconds; per-tick values
for a loop that runs once every `period` seconds (see autotune.core.pid.DiscretePid).

Layout (all tables always present unless marked optional):
    format = "autotune-gains"; version = 1
    [gains]        kp, ki, kd                     parallel form
    [standard]     kc, ti, td                     (ti = inf without integral action; omitted if kp = 0)
    [per_tick]     kp, ki_ts, kd_ts, tf, ad, bd, ts
    [loop]         period, mode ("device"/"host"), axis, output_limit (optional)
    [filter]       n, tf
    [anti_windup]  method ("clamping"/"back-calculation"), tracking_time (optional)
    [setpoint]     weight
    [origin]       session, proposal, detuned_by, device, firmware, tool_version, created (optional keys)
    [measured]     step figures (overshoot %, rise_time s, settling_time s, iae, ...); [measured.load] optional
    [predicted]    predicted figures where known (optional)
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import tomli_w

from autotune.core.pid import PidGains, PidSettings, filter_time, per_tick, to_standard

FORMAT = "autotune-gains"
VERSION = 1


class GainsFileError(ValueError):
    """A gains file that cannot be read: names the file and the problem."""


@dataclass(frozen=True)
class GainsRecord:
    """Accepted gains with their settings and provenance (see module docstring for units)."""

    gains: PidGains
    period: float
    deriv_filter_n: float = 10.0
    setpoint_weight: float = 1.0
    tracking_time: float | None = None  # None -> clamping anti-windup
    loop_mode: str = "device"
    axis: int = 0
    output_limit: float | None = None
    origin: dict[str, Any] = field(default_factory=dict)
    measured: dict[str, Any] = field(default_factory=dict)
    predicted: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_settings(cls, settings: PidSettings, **kw: Any) -> GainsRecord:
        """Record from the PidSettings the step ran with (plus loop_mode, axis, origin, ...)."""
        return cls(
            gains=settings.gains,
            period=settings.ts,
            deriv_filter_n=settings.deriv_filter_n,
            setpoint_weight=settings.setpoint_weight,
            tracking_time=settings.tracking_time,
            **kw,
        )

    def pid_settings(self) -> PidSettings:
        """PidSettings for this record (output limits symmetric at output_limit if known)."""
        lim = self.output_limit if self.output_limit is not None else math.inf
        return PidSettings(self.gains, self.period, self.deriv_filter_n, self.setpoint_weight,
                           self.tracking_time, -lim, lim)


def _clean(d: Mapping[str, Any]) -> dict[str, Any]:
    """Drop None values (TOML has no null), recursively; keep finite and infinite floats."""
    out: dict[str, Any] = {}
    for k, v in d.items():
        if v is None:
            continue
        if isinstance(v, Mapping):
            sub = _clean(v)
            if sub:
                out[str(k)] = sub
        elif isinstance(v, bool | int | float | str):
            out[str(k)] = float(v) if isinstance(v, float) else v
        elif isinstance(v, list | tuple):
            out[str(k)] = list(v)
        else:
            out[str(k)] = str(v)
    return out


def to_document(rec: GainsRecord) -> dict[str, Any]:
    """The TOML document (a dict) for `rec`."""
    g = rec.gains
    doc: dict[str, Any] = {
        "format": FORMAT,
        "version": VERSION,
        "gains": {"kp": g.kp, "ki": g.ki, "kd": g.kd},
    }
    if g.kp != 0.0:
        kc, ti, td = to_standard(g)
        doc["standard"] = {"kc": kc, "ti": ti, "td": td}
    doc["per_tick"] = per_tick(g, rec.period, rec.deriv_filter_n)
    doc["loop"] = _clean({"period": rec.period, "mode": rec.loop_mode, "axis": rec.axis,
                          "output_limit": rec.output_limit})
    doc["filter"] = {"n": rec.deriv_filter_n, "tf": filter_time(g, rec.deriv_filter_n)}
    doc["anti_windup"] = _clean({
        "method": "clamping" if rec.tracking_time is None else "back-calculation",
        "tracking_time": rec.tracking_time,
    })
    doc["setpoint"] = {"weight": rec.setpoint_weight}
    for name in ("origin", "measured", "predicted"):
        sub = _clean(getattr(rec, name))
        if sub:
            doc[name] = sub
    return doc


HEADER = (
    "# Accepted PID gains (autotune). Gains: output units per PV unit; ki per second, kd in seconds\n"
    "# (parallel form u = kp e + ki * integral(e) + kd de/dt). Times in seconds. per_tick: values\n"
    "# for a loop that runs once every loop.period seconds, derivative on the measurement.\n\n"
)


def write_gains_file(path: str | Path, rec: GainsRecord) -> Path:
    """Write `rec` as TOML to `path` (parent directories created); returns the path."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(HEADER + tomli_w.dumps(to_document(rec)), encoding="utf-8")
    return p


def _num(doc: Mapping[str, Any], table: str, key: str, path: str, optional: bool = False) -> float | None:
    t = doc.get(table)
    if not isinstance(t, Mapping):
        raise GainsFileError(f"{path}: missing table [{table}]")
    if key not in t:
        if optional:
            return None
        raise GainsFileError(f"{path}: [{table}] {key}: missing")
    v = t[key]
    if isinstance(v, bool) or not isinstance(v, int | float):
        raise GainsFileError(f"{path}: [{table}] {key}: expected a number, got {v!r}")
    return float(v)


def read_gains_file(path: str | Path) -> GainsRecord:
    """Read a gains file back; raises GainsFileError naming the file and the key on bad input."""
    p = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise GainsFileError(f"{p}: cannot read: {exc.strerror or exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise GainsFileError(f"{p}: not valid TOML: {exc}") from exc
    if doc.get("format") != FORMAT:
        raise GainsFileError(f"{p}: not an autotune gains file (format = {doc.get('format')!r})")
    if doc.get("version") != VERSION:
        raise GainsFileError(f"{p}: unsupported version {doc.get('version')!r} (expected {VERSION})")
    kp = _num(doc, "gains", "kp", p)
    ki = _num(doc, "gains", "ki", p)
    kd = _num(doc, "gains", "kd", p)
    period = _num(doc, "loop", "period", p)
    assert kp is not None and ki is not None and kd is not None and period is not None
    if not period > 0:
        raise GainsFileError(f"{p}: [loop] period: must be > 0 s")
    n = _num(doc, "filter", "n", p)
    b = _num(doc, "setpoint", "weight", p)
    tt = _num(doc, "anti_windup", "tracking_time", p, optional=True)
    method = doc["anti_windup"].get("method")
    if method not in ("clamping", "back-calculation"):
        raise GainsFileError(f"{p}: [anti_windup] method: expected 'clamping' or "
                             f"'back-calculation', got {method!r}")
    if method == "back-calculation" and tt is None:
        raise GainsFileError(f"{p}: [anti_windup] tracking_time: missing for back-calculation")
    loop = doc["loop"]
    mode = loop.get("mode", "device")
    if mode not in ("device", "host"):
        raise GainsFileError(f"{p}: [loop] mode: expected 'device' or 'host', got {mode!r}")
    axis = loop.get("axis", 0)
    if isinstance(axis, bool) or not isinstance(axis, int):
        raise GainsFileError(f"{p}: [loop] axis: expected an integer, got {axis!r}")
    assert n is not None and b is not None
    return GainsRecord(
        gains=PidGains(kp, ki, kd),
        period=period,
        deriv_filter_n=n,
        setpoint_weight=b,
        tracking_time=tt if method == "back-calculation" else None,
        loop_mode=mode,
        axis=axis,
        output_limit=_num(doc, "loop", "output_limit", p, optional=True),
        origin=dict(doc.get("origin", {})),
        measured=dict(doc.get("measured", {})),
        predicted=dict(doc.get("predicted", {})),
    )


def code_block(rec: GainsRecord) -> str:
    """A short, language-neutral block of the per-tick values and the update a loop runs per tick."""
    c = per_tick(rec.gains, rec.period, rec.deriv_filter_n)
    lim = rec.output_limit
    aw = ("hold I while the output is clamped and e pushes further" if rec.tracking_time is None
          else f"I += (ts/Tt)*(u - v), Tt = {rec.tracking_time:.6g} s")
    lines = [
        f"// PID per tick, loop period ts = {rec.period:.6g} s"
        f" (derivative on measurement, filter N = {rec.deriv_filter_n:g})",
        f"KP    = {c['kp']:.6g}   // output units per PV unit",
        f"KI_TS = {c['ki_ts']:.6g}   // ki*ts: integral increment per unit error per tick",
        f"AD    = {c['ad']:.6g}   // derivative filter pole Tf/(Tf+ts)",
        f"BD    = {c['bd']:.6g}   // kd/(Tf+ts): derivative per unit PV change per tick",
        f"B     = {rec.setpoint_weight:.6g}   // setpoint weight",
    ]
    if lim is not None:
        lines.append(f"U_MAX = {lim:.6g}   // output limit, output units")
    lines += [
        "// each tick:",
        "//   D = AD*D - BD*(pv - pv_prev);  v = KP*(B*sp - pv) + I + D",
        "//   u = clamp(v, -U_MAX, U_MAX);   e = sp - pv",
        f"//   I += KI_TS*e   ({aw});  pv_prev = pv",
    ]
    if rec.setpoint_weight != 1.0:
        lines.append("// on engaging at setpoint sp0: I = KP*(1 - B)*sp0 (no bump; B < 1 otherwise "
                     "kicks the output by KP*(B - 1)*sp0)")
    return "\n".join(lines)


def record_from_outcome(outcome: Any, session: str | None = None,
                    device: dict[str, Any] | None = None,
                    tool_version: str | None = None) -> GainsRecord:
    """The GainsRecord of a step outcome (autotune.core.steptest.StepOutcome): the gains as
    run, with the measured and predicted figures."""
    dev = device or {}
    sf = outcome.step_field()
    measured: dict[str, Any] = {k: sf.get(k) for k in (
        "overshoot", "rise_time", "settling_time", "steady_state_error", "iae",
        "peak_output", "time_saturated", "settle_band")}
    if outcome.load is not None:
        measured["load"] = outcome.load.to_dict()
    lim = outcome.pid.out_max
    return GainsRecord.from_settings(
        outcome.pid, loop_mode=outcome.loop, axis=int(dev.get("axis", 0)),
        output_limit=lim if math.isfinite(lim) else None,
        origin={"session": session, "proposal": outcome.candidate.name,
                "device": dev.get("name"), "firmware": dev.get("firmware"),
                "tool_version": tool_version},
        measured=measured,
        predicted={k: v for k, v in outcome.candidate.predicted.items()
                   if isinstance(v, int | float) and not isinstance(v, bool)},
    )
