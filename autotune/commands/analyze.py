"""`autotune analyze SESSION [--json FILE]`: the relay analysis offline, from a session file."""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

import numpy as np

from autotune.core.analysis import AnalysisError
from autotune.core.identify import RelaySettingsRecord, RunRecord
from autotune.core.prechecks import assess_rest
from autotune.errors import EXIT_OK, UserError

HELP = "analyse a recorded relay session: ultimate gain and period, model, gain proposals"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("session", metavar="SESSION", help="session.jsonl written by `tune`")
    parser.add_argument("--json", metavar="FILE", default=None,
                        help="where to write result.json (default: result.json next to SESSION)")
    parser.add_argument("--deadband", metavar="U", type=float, default=None,
                        help="actuator dead zone to take out of the output before the analysis "
                             "(output units; default: as the live run decided it, from the "
                             "breakaway ramps or the swing at the relay amplitudes; 0 = none)")


def _get(d: Any, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return None
        d = d[k]
    return d


def _finite(x: Any) -> float | None:
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
    sign = _finite(header.get("sign")) or _finite(_get(header, "config", "connection", "sign"))
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
    src = detail if detail is not None else (_get(header, "config", "relay") or {})
    centre = _finite(src.get("centre"))
    if centre is None:
        sp = session.sp[np.isfinite(session.sp)]
        centre = float(sign_i * np.median(sp)) if sp.size else float(
            np.median(sign_i * session.pv[np.isfinite(session.pv)]))
    settings = RelaySettingsRecord(
        centre=centre, bias=_finite(src.get("bias")) or 0.0,
        amplitude=_finite(src.get("amplitude")) or 0.0,
        hysteresis=_finite(src.get("hysteresis")) or 0.0,
        asymmetry=_finite(src.get("asymmetry")) or 0.0)
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
    t_motion = _finite(_get(direction, "t_pulse"))
    t_end = None
    if isinstance(breakaway, dict) and breakaway.get("after_relay"):
        t_end = _finite(breakaway.get("t_end"))
    return RunRecord(
        t=session.t, y=sign_i * session.pv, u=session.out, phase=phase, settings=settings,
        state=state, tick=_finite(_get(header, "device", "tick")),
        output_limit=_finite(_get(header, "config", "safety", "output_limit")),
        relay=_get(header, "config", "relay") or {}, rest=rest, direction=direction,
        breakaway=breakaway,
        pv_resolution=_finite(_get(direction, "board_resolution")) or _finite(
            _get(header, "device", "pv_resolution")) or 0.0,
        sign=sign_i, t_first_motion=t_motion, t_powered_end=t_end,
        end_reason=session.reason)


def run(args: argparse.Namespace) -> int:
    from autotune.job.tune import analyse_record
    from autotune.recorder import read_session, write_result

    session = read_session(args.session)
    if args.deadband is not None and args.deadband < 0:
        raise UserError(f"--deadband must be >= 0, got {args.deadband:g}")
    record = session_record(session, args.deadband)
    if int(np.sum(record.phase == "relay")) < 10:
        raise UserError(f"{args.session}: no relay samples to analyse")
    header = session.header
    try:
        fields, notes = analyse_record(record, _get(header, "config", "design") or {},
                                       _finite(_get(header, "config", "relay",
                                                    "target_amplitude")))
    except AnalysisError as exc:
        raise UserError(f"{args.session}: {exc}") from None
    result: dict[str, Any] = {"source": str(args.session), **fields}
    result["end_reason"] = session.reason or "cut-off"
    result["notes"] = list(session.warnings) + notes
    out = Path(args.json) if args.json else Path(args.session).with_name("result.json")
    write_result(out, result)
    unc = result["uncertainty"]
    print(f"ultimate gain   {result['ultimate_gain']:.5g} (+/- "
          f"{100 * unc['ultimate_gain']:.1f}%)   plain {result['ultimate_gain_df']:.5g}")
    print(f"ultimate period {result['ultimate_period']:.5g} s (+/- "
          f"{100 * unc['ultimate_period']:.1f}%)   plain {result['ultimate_period_df']:.5g} s")
    if result["static_gain"] is not None:
        print(f"static gain     {result['static_gain']:.5g} (+/- "
              f"{100 * (unc['static_gain'] or 0.0):.1f}%)")
    if result["velocity_gain"] is not None:
        print(f"velocity gain   {result['velocity_gain']:.5g} /s (+/- "
              f"{100 * (unc['velocity_gain'] or 0.0):.1f}%)")
    model = result["model"]
    params = ", ".join(f"{k} {v:.4g}" for k, v in model["params"].items())
    print(f"model           {model['kind']}: {params}"
          f"{'' if model['reliable'] else ' (does not reproduce the measurement)'}")
    print(f"cycles used     {result['cycles_used']}"
          f"{'' if result['converged'] else ' (not converged)'}")
    if result["dead_zone"]:
        print(f"dead zone       {result['dead_zone']:.4g} taken out of the output "
              f"({result['identification']['dead_zone']['method']}; --deadband 0: none)")
    for w in notes:
        print(f"warning: {w}")
    print(f"wrote {out}")
    return EXIT_OK
