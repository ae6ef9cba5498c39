"""The accepted-gains file (TOML), the C header beside it, and a short code block for screens.

Written when the operator accepts a confirmation step: `gains.toml` states the whole controller
the gains belong to (form, setpoint weight b, derivative on the measurement with its filter,
anti-windup, tick), the gains in the forms loop code uses, the limits, where the gains came from
and the measured figures; `gains.h` (same stem, beside it) holds the same per-tick coefficients
and the difference equations of autotune.core.pid.DiscretePid as C a loop programmer can paste.

Units: gains in output units per PV unit, `ki` per second, `kd` in seconds (parallel form);
Ti, Td, Tf, Tt and the loop period in seconds; limits in output units; per-tick values for a loop
that runs once every `period` seconds.

Layout (version 2; version 1 files, with [loop], [filter], [anti_windup] and [setpoint]
instead of [controller] and [limits], are still read):
    format = "autotune-gains"; version = 2
    [controller]   form, setpoint_weight, derivative, filter_n, filter_tf, anti_windup,
                   tracking_time (back-calculation only), period, loop, axis
    [gains]        kp, ki, kd                     parallel form
    [standard]     kc, ti, td                     (ti = inf without integral action; omitted if kp = 0)
    [per_tick]     kp, ki_ts, ad, bd, b, ts       what the per-tick code uses
    [limits]       actuator, actuator_source, tuning_run (optional keys)
    [origin]       session, proposal, device, firmware, tool_version (optional keys)
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
VERSION = 2
READABLE_VERSIONS = (1, 2)
CODE_SUFFIX = ".h"
PER_TICK_KEYS = ("kp", "ki_ts", "ad", "bd")  # the coefficients the per-tick code uses


class GainsFileError(ValueError):
    """A gains file that cannot be read: names the file and the problem."""


@dataclass(frozen=True)
class GainsRecord:
    """Accepted gains with their controller, limits and provenance (see the module docstring).

    output_limit: the output limit the confirmation step ran with (the tuning run's limit);
    actuator_limit: the largest output the actuator takes (the board's handshake max_output),
    with actuator_source saying where it came from; None where unknown.
    """

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
    actuator_limit: float | None = None
    actuator_source: str = ""

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

    def coefficients(self) -> dict[str, float]:
        """The per-tick coefficients the code uses (see PER_TICK_KEYS), b and ts."""
        c = per_tick(self.gains, self.period, self.deriv_filter_n)
        out = {k: c[k] for k in PER_TICK_KEYS}
        out.update(b=self.setpoint_weight, ts=self.period)
        return out

    @property
    def code_limit(self) -> float | None:
        """Where the per-tick code clamps the output: the limit the gains were proven at,
        else the actuator's."""
        return self.output_limit if self.output_limit is not None else self.actuator_limit


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


def _anti_windup(rec: GainsRecord) -> str:
    return "clamping" if rec.tracking_time is None else "back-calculation"


def to_document(rec: GainsRecord) -> dict[str, Any]:
    """The TOML document (a dict) for `rec`."""
    g = rec.gains
    doc: dict[str, Any] = {"format": FORMAT, "version": VERSION}
    doc["controller"] = _clean({
        "form": "parallel",
        "setpoint_weight": rec.setpoint_weight,
        "derivative": "on measurement",
        "filter_n": rec.deriv_filter_n,
        "filter_tf": filter_time(g, rec.deriv_filter_n),
        "anti_windup": _anti_windup(rec),
        "tracking_time": rec.tracking_time,
        "period": rec.period,
        "loop": rec.loop_mode,
        "axis": rec.axis,
    })
    doc["gains"] = {"kp": g.kp, "ki": g.ki, "kd": g.kd}
    if g.kp != 0.0:
        kc, ti, td = to_standard(g)
        doc["standard"] = {"kc": kc, "ti": ti, "td": td}
    doc["per_tick"] = rec.coefficients()
    limits = _clean({"actuator": rec.actuator_limit,
                     "actuator_source": rec.actuator_source or None,
                     "tuning_run": rec.output_limit})
    if limits:
        doc["limits"] = limits
    for name in ("origin", "measured", "predicted"):
        sub = _clean(getattr(rec, name))
        if sub:
            doc[name] = sub
    return doc


def _value(v: Any) -> str:
    """`v` as a TOML value."""
    return tomli_w.dumps({"v": v})[4:].strip()


def _g(v: float | None) -> str:
    return "—" if v is None else f"{v:.6g}"


def header_comment(rec: GainsRecord) -> str:
    """The comment that opens gains.toml: the whole controller in words, with this record's
    numbers, and which coefficients the per-tick code uses."""
    g = rec.gains
    tf = filter_time(g, rec.deriv_filter_n)
    org = rec.origin
    what = ", ".join(str(x) for x in (org.get("proposal"), org.get("device")) if x)
    aw = ("clamping: the integral holds while the output is at its limit" if
          rec.tracking_time is None else
          f"back-calculation with tracking time Tt = {rec.tracking_time:.6g} s")
    lines = [
        f"PID gains accepted by autotune after a confirmation step{' (' + what + ')' if what else ''}.",
        "",
        "They belong to this whole controller, run once every tick; the same gains in another",
        "controller (setpoint weight 1, derivative on the error) give another response:",
        "",
        "  u = kp (b sp - pv) + ki * integral(sp - pv) dt - kd * d(pv_f)/dt,"
        "  clamped to +/- the limit",
        "",
        "  form         parallel (ki = kp/Ti, kd = kp Td); [standard] is the same controller",
        f"  b            setpoint weight {rec.setpoint_weight:.6g}: the proportional term sees"
        " b sp - pv",
        "  derivative   on the measurement only (no kick when the setpoint steps), through",
        f"               a first-order filter Tf = Td/N = {tf:.6g} s (N = {rec.deriv_filter_n:g})",
        f"  anti-windup  {aw}",
        f"  tick         ts = {rec.period:.6g} s ({rec.loop_mode} loop, axis {rec.axis})",
        f"  limit        the code clamps at +/- {_g(rec.code_limit)} output units, the limit"
        " the gains were",
        f"               proven at (the actuator takes +/- {_g(rec.actuator_limit)})",
        "",
        "Loop code that runs every ts uses [per_tick]: kp, ki_ts, ad, bd and b, in the equations",
        f"of the C header beside this file (same stem, {CODE_SUFFIX}), which holds the same"
        " numbers.",
        "[gains] and [standard] are the continuous-time forms, for code that discretises itself.",
        "Units: output units (out) per PV unit; ki per second, kd in seconds; times in seconds.",
    ]
    return "".join(f"# {ln}".rstrip() + "\n" for ln in lines)


TABLE_NOTES = {
    "controller": "the controller the gains belong to (see above)",
    "gains": "parallel form: kp out/PV, ki out/PV/s, kd out*s/PV",
    "standard": "standard form Kc (e + 1/Ti integral(e) + Td de/dt): kc out/PV, ti s, td s",
    "per_tick": "what the code uses each tick of ts seconds (the equations are in the header)",
    "limits": "output units: actuator = what the actuator takes; tuning_run = the limit the "
              "gains were proven at",
    "origin": "where the gains came from",
    "measured": "the confirmation step as measured (overshoot %, times s, iae PV*s)",
    "predicted": "the same figures predicted on the fitted model",
}
PER_TICK_NOTES = {
    "kp": "out/PV: proportional gain",
    "ki_ts": "ki * ts: integral increment per unit error per tick",
    "ad": "Tf / (Tf + ts): derivative filter pole",
    "bd": "kd / (Tf + ts): derivative step per unit PV change in one tick",
    "b": "setpoint weight of the proportional term",
    "ts": "s: the tick these coefficients are for",
}


def gains_text(rec: GainsRecord) -> str:
    """gains.toml as text: the header comment, then each table with a note above it."""
    doc = to_document(rec)
    out = [header_comment(rec), "\n"]
    out.append(tomli_w.dumps({k: v for k, v in doc.items() if not isinstance(v, Mapping)}))
    for name, table in doc.items():
        if not isinstance(table, Mapping):
            continue
        out.append(f"\n# {TABLE_NOTES.get(name, name)}\n")
        if name == "per_tick":
            out.append("[per_tick]\n")
            for k, v in table.items():
                note = PER_TICK_NOTES.get(k)
                out.append(f"{k} = {_value(v)}" + (f"  # {note}" if note else "") + "\n")
        else:
            out.append(tomli_w.dumps({name: table}))
    return "".join(out)


def code_path(path: str | Path) -> Path:
    """The C header written beside a gains file (same stem, CODE_SUFFIX)."""
    return Path(path).with_suffix(CODE_SUFFIX)


def write_gains_file(path: str | Path, rec: GainsRecord) -> tuple[Path, Path]:
    """Write `rec` as TOML to `path` and its C header beside it (parent directories
    created); returns both paths."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(gains_text(rec), encoding="utf-8")
    c = code_path(p)
    c.write_text(c_header(rec, p.name), encoding="utf-8")
    return p, c


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


def _str(doc: Mapping[str, Any], table: str, key: str, path: str, choices: tuple[str, ...],
         default: str | None = None) -> str:
    t = doc.get(table)
    v = t.get(key, default) if isinstance(t, Mapping) else default
    if v not in choices:
        names = " or ".join(repr(c) for c in choices)
        raise GainsFileError(f"{path}: [{table}] {key}: expected {names}, got {v!r}")
    return str(v)


def read_gains_file(path: str | Path) -> GainsRecord:
    """Read a gains file back; raises GainsFileError naming the file and the key on bad input."""
    p = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise GainsFileError(f"{p}: cannot read: {exc.strerror or exc}") from exc
    except tomllib.TOMLDecodeError as exc:
        raise GainsFileError(f"{p}: not valid TOML: {exc}") from exc
    except UnicodeDecodeError:
        raise GainsFileError(f"{p}: not a gains file (not UTF-8 text)") from None
    if doc.get("format") != FORMAT:
        raise GainsFileError(f"{p}: not an autotune gains file (format = {doc.get('format')!r})")
    version = doc.get("version")
    if version not in READABLE_VERSIONS:
        raise GainsFileError(f"{p}: unsupported version {version!r} (expected one of "
                             f"{', '.join(map(str, READABLE_VERSIONS))})")
    kp = _num(doc, "gains", "kp", p)
    ki = _num(doc, "gains", "ki", p)
    kd = _num(doc, "gains", "kd", p)
    assert kp is not None and ki is not None and kd is not None
    if version == 1:
        ctl, period_key, mode_table = "loop", "period", "loop"
        n = _num(doc, "filter", "n", p)
        b = _num(doc, "setpoint", "weight", p)
        tt = _num(doc, "anti_windup", "tracking_time", p, optional=True)
        method = _str(doc, "anti_windup", "method", p, ("clamping", "back-calculation"))
        mode = _str(doc, "loop", "mode", p, ("device", "host"), "device")
        limit = _num(doc, "loop", "output_limit", p, optional=True)
        actuator, source = None, ""
    else:
        ctl, period_key, mode_table = "controller", "period", "controller"
        n = _num(doc, ctl, "filter_n", p)
        b = _num(doc, ctl, "setpoint_weight", p)
        tt = _num(doc, ctl, "tracking_time", p, optional=True)
        method = _str(doc, ctl, "anti_windup", p, ("clamping", "back-calculation"))
        mode = _str(doc, ctl, "loop", p, ("device", "host"), "device")
        lim = doc.get("limits") if isinstance(doc.get("limits"), Mapping) else None
        limit = _num(doc, "limits", "tuning_run", p, optional=True) if lim else None
        actuator = _num(doc, "limits", "actuator", p, optional=True) if lim else None
        source = str(lim.get("actuator_source", "")) if lim else ""
    period = _num(doc, ctl, period_key, p)
    assert period is not None and n is not None and b is not None
    if not period > 0:
        raise GainsFileError(f"{p}: [{ctl}] period: must be > 0 s")
    if method == "back-calculation" and tt is None:
        raise GainsFileError(f"{p}: [{ctl if version == 2 else 'anti_windup'}] tracking_time: "
                             "missing for back-calculation")
    axis = doc[mode_table].get("axis", 0)
    if isinstance(axis, bool) or not isinstance(axis, int):
        raise GainsFileError(f"{p}: [{mode_table}] axis: expected an integer, got {axis!r}")
    return GainsRecord(
        gains=PidGains(kp, ki, kd),
        period=period,
        deriv_filter_n=n,
        setpoint_weight=b,
        tracking_time=tt if method == "back-calculation" else None,
        loop_mode=mode,
        axis=axis,
        output_limit=limit,
        origin=dict(doc.get("origin", {})),
        measured=dict(doc.get("measured", {})),
        predicted=dict(doc.get("predicted", {})),
        actuator_limit=actuator,
        actuator_source=source,
    )


def code_block(rec: GainsRecord) -> str:
    """A short, language-neutral block of the per-tick values and the update a loop runs per
    tick (for the finish screen; the C header holds the same)."""
    c = rec.coefficients()
    lim = rec.code_limit
    aw = ("hold I while u is clamped and e pushes further" if rec.tracking_time is None
          else f"I += (ts/Tt)*(u - v), Tt = {rec.tracking_time:.6g} s")
    lines = [
        f"// once every ts = {rec.period:.6g} s; derivative on the measurement, filter N = "
        f"{rec.deriv_filter_n:g}",
        f"KP    = {c['kp']:.6g}   // out/PV",
        f"KI_TS = {c['ki_ts']:.6g}   // ki*ts: integral step per unit error",
        f"AD    = {c['ad']:.6g}   // Tf/(Tf+ts): derivative filter pole",
        f"BD    = {c['bd']:.6g}   // kd/(Tf+ts): derivative step per unit PV change",
        f"B     = {c['b']:.6g}   // setpoint weight",
    ]
    if lim is not None:
        lines.append(f"U_MAX = {lim:.6g}   // out: the limit the gains were proven at")
    lines += [
        "// D = AD*D - BD*(pv - pv_prev);  v = KP*(B*sp - pv) + I + D",
        "// u = clamp(v, -U_MAX, U_MAX);   e = sp - pv",
        f"// I += KI_TS*e ({aw});  pv_prev = pv",
    ]
    return "\n".join(lines)


def _c(v: float) -> str:
    """A C double literal that round-trips `v`."""
    if math.isinf(v):
        return "HUGE_VAL" if v > 0 else "(-HUGE_VAL)"
    text = repr(float(v))
    return text if any(ch in text for ch in ".eE") else text + ".0"


def c_header(rec: GainsRecord, toml_name: str = "gains.toml") -> str:
    """The per-tick controller as a C header a loop programmer can paste: the coefficients of
    `rec` (the same numbers as the TOML) and the difference equations of
    autotune.core.pid.DiscretePid. AT_PID_REAL (default float) sets the arithmetic type."""
    c = rec.coefficients()
    lim = rec.code_limit
    track = 0.0 if rec.tracking_time is None else rec.period / rec.tracking_time
    org = rec.origin
    what = ", ".join(str(x) for x in (org.get("proposal"), org.get("device")) if x)
    actuator = ("" if rec.actuator_limit is None else
                f"; the actuator takes up to {rec.actuator_limit:.6g}")
    aw = ("by clamping: I holds while u is clamped"
          if rec.tracking_time is None else
          f"by back-calculation, Tt = {rec.tracking_time:.6g} s")
    return f"""/* PID accepted by autotune{' (' + what + ')' if what else ''}: the controller of {toml_name}
 * beside this file, with the same numbers, per tick of ts = {rec.period:.6g} s. Paste it into the
 * loop code and call at_pid_tick() once every tick.
 *
 * Each tick, sp the setpoint and pv the measurement (PV units), u the output (output units):
 *   P = KP (B sp - pv)                 setpoint weight B
 *   D = AD D - BD (pv - pv_prev)       derivative on the measurement, first-order filter
 *   v = P + I + D                      (add your own bias or feedforward here)
 *   u = clamp(v, -U_MAX, U_MAX)
 *   I = I + KI_TS (sp - pv)            anti-windup {aw}
 *       + TRACK (u - v)                (back-calculation only; TRACK = ts/Tt, 0 = clamping)
 *   pv_prev = pv
 * The first tick after at_pid_reset() takes pv_prev = pv (no derivative kick). To take over
 * bumplessly from an output u0 at setpoint sp and measurement pv, reset with
 * I = u0 - KP (B sp - pv).
 */
#ifndef AUTOTUNE_GAINS_H
#define AUTOTUNE_GAINS_H

#include <math.h>

#ifndef AT_PID_REAL
#define AT_PID_REAL float
#endif

#define AT_PID_TS    {_c(c['ts'])}  /* s: the tick these coefficients are for */
#define AT_PID_KP    {_c(c['kp'])}  /* out/PV */
#define AT_PID_KI_TS {_c(c['ki_ts'])}  /* ki * ts */
#define AT_PID_AD    {_c(c['ad'])}  /* Tf / (Tf + ts) */
#define AT_PID_BD    {_c(c['bd'])}  /* kd / (Tf + ts) */
#define AT_PID_B     {_c(c['b'])}  /* setpoint weight */
#define AT_PID_U_MAX {_c(lim if lim is not None else math.inf)}  /* out: the limit the gains were proven at{actuator} */
#define AT_PID_TRACK {_c(track)}  /* ts / Tt of back-calculation; 0: clamping */

typedef struct {{
    AT_PID_REAL i;        /* integral state, output units */
    AT_PID_REAL d;        /* filtered derivative state, output units */
    AT_PID_REAL pv_prev;  /* last measurement, PV units */
    int started;          /* 0 until the first tick after a reset */
}} at_pid_state;

static inline void at_pid_reset(at_pid_state *s, AT_PID_REAL integral)
{{
    s->i = integral;
    s->d = 0;
    s->pv_prev = 0;
    s->started = 0;
}}

static inline AT_PID_REAL at_pid_tick(at_pid_state *s, AT_PID_REAL sp, AT_PID_REAL pv)
{{
    AT_PID_REAL prev = s->started ? s->pv_prev : pv;
    AT_PID_REAL p = (AT_PID_REAL)AT_PID_KP * ((AT_PID_REAL)AT_PID_B * sp - pv);
    s->d = (AT_PID_REAL)AT_PID_AD * s->d - (AT_PID_REAL)AT_PID_BD * (pv - prev);
    AT_PID_REAL v = p + s->i + s->d;
    AT_PID_REAL u = v;
    if (u > (AT_PID_REAL)AT_PID_U_MAX) u = (AT_PID_REAL)AT_PID_U_MAX;
    if (u < -(AT_PID_REAL)AT_PID_U_MAX) u = -(AT_PID_REAL)AT_PID_U_MAX;
    AT_PID_REAL inc = (AT_PID_REAL)AT_PID_KI_TS * (sp - pv);
    if (AT_PID_TRACK > 0) {{
        s->i += inc + (AT_PID_REAL)AT_PID_TRACK * (u - v);
    }} else if (!((v > (AT_PID_REAL)AT_PID_U_MAX && inc > 0) ||
                 (v < -(AT_PID_REAL)AT_PID_U_MAX && inc < 0))) {{
        s->i += inc;
    }}
    s->pv_prev = pv;
    s->started = 1;
    return u;
}}

#endif /* AUTOTUNE_GAINS_H */
"""


def record_from_outcome(outcome: Any, session: str | None = None,
                        device: dict[str, Any] | None = None,
                        tool_version: str | None = None,
                        tuning_limit: float | None = None) -> GainsRecord:
    """The GainsRecord of a step outcome (autotune.core.steptest.StepOutcome): the gains as
    run, with the measured and predicted figures. device: name, firmware, axis and max_output
    (the actuator limit from the board's handshake); tuning_limit: the run's output limit
    (default: the clamp the step's PID ran with)."""
    dev = device or {}
    sf = outcome.step_field()
    measured: dict[str, Any] = {k: sf.get(k) for k in (
        "overshoot", "rise_time", "settling_time", "steady_state_error", "iae",
        "peak_output", "time_saturated", "settle_band")}
    if outcome.load is not None:
        measured["load"] = outcome.load.to_dict()
    lim = tuning_limit if tuning_limit is not None else outcome.pid.out_max
    act = dev.get("max_output")
    return GainsRecord.from_settings(
        outcome.pid, loop_mode=outcome.loop, axis=int(dev.get("axis", 0)),
        output_limit=float(lim) if lim is not None and math.isfinite(lim) else None,
        actuator_limit=float(act) if isinstance(act, int | float) and math.isfinite(act)
        else None,
        actuator_source="board handshake (max_output)" if isinstance(act, int | float) else "",
        origin={"session": session, "proposal": outcome.candidate.name,
                "device": dev.get("name"), "firmware": dev.get("firmware"),
                "tool_version": tool_version},
        measured=measured,
        predicted={k: v for k, v in outcome.candidate.predicted.items()
                   if isinstance(v, int | float) and not isinstance(v, bool)},
    )
