"""A recorded session (autotune.recorder.Session, parsed) as the run record the identification
reads (autotune.core.identify.RunRecord): the offline side of the one analysis path; the live
run builds the same record from what it recorded (autotune.job.tune.TuneRun.run_record).

Pure: plain data in, a RunRecord out. Units: seconds (device time), PV units, output units.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from autotune.core.identify import RelaySettingsRecord, RunRecord
from autotune.core.prechecks import assess_rest

RECORD_PHASES = ("precheck:rest", "precheck:direction", "precheck:breakaway", "relay")
"""The phases a run record is built from (the live run records the same from the rest on);
a job's later phases (analysis, step, waiting) are not part of the identification."""



def get_path(d: Any, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return None
        d = d[k]
    return d


def finite(x: Any) -> float | None:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return None
    return float(x) if math.isfinite(float(x)) else None


def _precheck(session: Any, check: str) -> dict[str, Any] | None:
    """The last precheck event's detail for `check` ("rest", "direction", "breakaway"); older
    files name the breakaway only by its "deadband" key."""
    found = None
    for e in session.events:
        det = e.get("detail")
        if e.get("kind") != "precheck" or not isinstance(det, dict):
            continue
        if e.get("check") == check or (check == "breakaway" and e.get("check") is None and
                                       "deadband" in det):
            found = det
    return found


def session_record(session: Any, deadband: float | None = None) -> RunRecord:
    """The run record (autotune.core.identify.RunRecord) of a recorder.Session: what the live
    run hands to the same analysis.

    Samples: every sample with its recorded phase (a file without phases counts as all relay);
    PV multiplied by the header's `sign`. Settings: the last `relay_final`, else
    `settings_applied`, else `relay_settings` event, else the header config's [relay].
    Prechecks: the last precheck event of each check. deadband (output units): given, it
    stands for a dead zone measured by the breakaway ramps (0: none, and no estimate).
    """
    header = session.header
    sign = finite(header.get("sign")) or finite(get_path(header, "config", "connection", "sign"))
    sign_i = -1 if sign is not None and sign < 0 else 1
    phase = session.extra.get("phase")
    if phase is None or not np.any(phase == "relay"):
        phase = np.full(session.t.shape, "relay", dtype=object)
    state = session.extra.get("state")
    if state is not None and state.dtype.kind != "f":
        state = None
    detail = None
    for kind in ("relay_final", "settings_applied", "relay_settings"):
        evs = [e for e in session.events if e.get("kind") == kind]
        if evs and isinstance(evs[-1].get("detail"), dict):
            detail = evs[-1]["detail"]
            break
    src = detail if detail is not None else (get_path(header, "config", "relay") or {})
    centre = finite(src.get("centre"))
    if centre is None:
        sp = session.sp[np.isfinite(session.sp)]
        centre = float(sign_i * np.median(sp)) if sp.size else float(
            np.median(sign_i * session.pv[np.isfinite(session.pv)]))
    settings = RelaySettingsRecord(
        centre=centre, bias=finite(src.get("bias")) or 0.0,
        amplitude=finite(src.get("amplitude")) or 0.0,
        hysteresis=finite(src.get("hysteresis")) or 0.0,
        asymmetry=finite(src.get("asymmetry")) or 0.0)
    rest = _precheck(session, "rest")
    direction = _precheck(session, "direction")
    breakaway = _precheck(session, "breakaway")
    if deadband is not None:
        breakaway = {"deadband": float(deadband), "spread": 0.0}
    if rest is None:
        # an older file without the rest check's event: its samples, if recorded
        m = (phase == "precheck:rest") & np.isfinite(session.pv)
        if m.sum() >= 3:
            rest = assess_rest(session.t[m], session.pv[m], session.out[m]).as_dict()
    t_motion = finite(get_path(direction, "t_pulse"))
    t_end = None
    if isinstance(breakaway, dict) and breakaway.get("after_relay"):
        t_end = finite(breakaway.get("t_end"))
    return RunRecord(
        t=session.t, y=sign_i * session.pv, u=session.out, phase=phase, settings=settings,
        state=state, tick=sample_interval(header),
        output_limit=finite(get_path(header, "config", "safety", "output_limit")),
        relay=get_path(header, "config", "relay") or {}, rest=rest, direction=direction,
        breakaway=breakaway,
        pv_resolution=finite(get_path(direction, "board_resolution")) or finite(
            get_path(header, "device", "pv_resolution")) or 0.0,
        sign=sign_i, t_first_motion=t_motion, t_powered_end=t_end,
        end_reason=session.reason)


def sample_interval(header: Any) -> float | None:
    """Seconds between the recorded samples: the device tick times the stream decimation the
    run asked for (every Nth sample)."""
    tick = finite(get_path(header, "device", "tick"))
    if tick is None:
        return None
    return tick * int(finite(get_path(header, "stream_decimation")) or 1)
