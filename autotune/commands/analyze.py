"""`autotune analyze SESSION [--json FILE]`: the relay analysis offline, from a session file.

With several sessions (one design for all of them) or `--gains FILE` (given gains judged on
the sessions) the work is in autotune.commands.sessions."""

from __future__ import annotations

import argparse
import dataclasses
import math
from pathlib import Path
from typing import Any

import numpy as np

from autotune.errors import EXIT_OK, UserError

HELP = ("analyse recorded relay sessions: ultimate gain and period, model, gain proposals "
        "(several sessions: one design for all; --gains: judge given gains)")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("session", metavar="SESSION", nargs="+",
                        help="session.jsonl written by `tune`; several sessions of one loop "
                             "get one design that holds on all of them")
    parser.add_argument("--json", metavar="FILE", default=None,
                        help="where to write result.json (default: result.json next to SESSION; "
                             "with several sessions or --gains: written only when given)")
    parser.add_argument("--gains", metavar="FILE", default=None,
                        help="a gains file written by the tool: judge those gains on the "
                             "session's model and measured points (Ms, margins, predicted "
                             "step and load response, verdict; exit 1 when they fail)")
    parser.add_argument("--deadband", metavar="U", type=float, default=None,
                        help="actuator dead zone to take out of the output before the analysis "
                             "(output units; default: the breakaway precheck's figure, as the "
                             "live run did; 0 = none)")


@dataclasses.dataclass(frozen=True)
class _Settings:
    centre: float
    bias: float
    amplitude: float
    hysteresis: float
    asymmetry: float = 0.0


def _get(d: Any, *keys: str) -> Any:
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return None
        d = d[k]
    return d


def _finite(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and math.isfinite(float(x)) else None


def session_inputs(session: Any) -> dict[str, Any]:
    """The analysis inputs from a recorder.Session: relay-phase arrays, settings, tick, noise.

    Relay samples: those recorded in phase "relay" (all samples when no phase was recorded).
    Settings: the last `relay_settings` / `settings_applied` event, else the header config's
    [relay]. PV is multiplied by the header's `sign` (the relay runs on the sign-normalised
    loop). deadband: the breakaway precheck's dead zone (output units), 0 when none.
    """
    header = session.header
    sign = _finite(header.get("sign")) or _finite(_get(header, "config", "connection", "sign"))
    sign = -1.0 if sign is not None and sign < 0 else 1.0
    mask = session.phase_mask("relay")
    if not mask.any():
        mask = np.ones(session.t.shape, dtype=bool)
    ok = mask & np.isfinite(session.t) & np.isfinite(session.pv) & np.isfinite(session.out)
    # The live run analyses from the first sample that carries the relay's state (the board
    # reports it only once in relay mode); the samples before it were recorded while the start
    # request was in flight and would look like rest.
    state = session.extra.get("state")
    if state is not None and state.dtype.kind == "f":
        with_state = np.flatnonzero(ok & np.isfinite(state))
        if with_state.size:
            ok &= np.arange(ok.size) >= with_state[0]
    t, y, u = session.t[ok], sign * session.pv[ok], session.out[ok]
    sp = session.sp[ok]
    events = [e for e in session.events
              if e.get("kind") in ("relay_settings", "settings_applied")]
    detail = events[-1].get("detail") if events else None
    cfg_relay = _get(header, "config", "relay") or {}
    src = detail if isinstance(detail, dict) else cfg_relay
    centre = _finite(src.get("centre"))
    if centre is None:
        finite_sp = sp[np.isfinite(sp)]
        centre = float(sign * np.median(finite_sp)) if finite_sp.size else float(np.median(y))
    hyst = _finite(src.get("hysteresis"))
    settings = _Settings(centre=centre, bias=_finite(src.get("bias")) or 0.0,
                         amplitude=_finite(src.get("amplitude")) or 0.0,
                         hysteresis=hyst if hyst is not None else 0.0,
                         asymmetry=_finite(src.get("asymmetry")) or 0.0)
    tick = _finite(_get(header, "device", "tick"))
    if tick is not None:  # the sample interval: the run streamed every Nth tick
        tick *= int(_finite(header.get("stream_decimation")) or 1)
    # noise: the rest precheck's own figure, as the live run uses it
    noise = None
    for e in session.events:
        det = e.get("detail")
        if e.get("kind") == "precheck" and e.get("check") == "rest" and isinstance(det, dict):
            noise = _finite(det.get("noise_std"))
    if noise is None:
        rest = session.phase_mask("precheck:rest") & np.isfinite(session.pv)
        if rest.sum() >= 3:
            from autotune.core.prechecks import assess_rest

            noise = assess_rest(session.t[rest], session.pv[rest], session.out[rest]).noise_std
    limit = _finite(_get(header, "config", "safety", "output_limit"))
    deadband = 0.0
    for e in session.events:
        det = e.get("detail")
        if e.get("kind") == "precheck" and isinstance(det, dict) and \
                (e.get("check") == "breakaway" or "deadband" in det):
            deadband = _finite(det.get("deadband")) or 0.0
    return {"t": t, "y": y, "u": u, "settings": settings, "ts": tick, "noise_std": noise,
            "output_limit": limit, "sign": sign, "deadband": deadband}


def run(args: argparse.Namespace) -> int:
    from autotune.core import analysis
    from autotune.recorder import check_target, read_session, write_result

    if len(args.session) > 1 or args.gains:
        from autotune.commands.sessions import run_several

        return run_several(args)
    args.session = args.session[0]
    if args.json:
        check_target(args.json)  # before the work: only a regular file or a new path
    # only the phases the analysis reads are kept in memory (the rest is streamed past)
    session = read_session(args.session, phases=("relay", "precheck:rest"))
    inp = session_inputs(session)
    if inp["t"].size < 10:
        raise UserError(f"{args.session}: no relay samples to analyse")
    db = inp["deadband"] if args.deadband is None else float(args.deadband)
    if db < 0:
        raise UserError(f"--deadband must be >= 0, got {db:g}")
    settings, u = inp["settings"], inp["u"]
    if db > 0:
        # as the live run: the plant sees the output minus the dead zone (u - sign(u) deadband)
        u = np.where(np.abs(u) <= db, 0.0, u - np.sign(u) * db)
        settings = dataclasses.replace(settings, amplitude=max(settings.amplitude - db, 1e-9))
    try:
        an = analysis.analyse_relay(inp["t"], inp["y"], u, settings,
                                    noise_std=inp["noise_std"], ts=inp["ts"],
                                    output_limit=inp["output_limit"])
    except analysis.AnalysisError as exc:
        raise UserError(f"{args.session}: {exc}") from None
    result: dict[str, Any] = {"source": str(args.session), **analysis.result_fields(an)}
    result["relay"]["centre"] = inp["settings"].centre
    if db > 0:
        result["relay"]["amplitude"] = inp["settings"].amplitude
        result["relay"]["effective_amplitude"] = settings.amplitude
        result["deadband"] = {"deadband": db, "correction": "analysis on the output minus the "
                              "dead zone (u - sign(u) deadband); --deadband 0 turns it off"}
    result["end_reason"] = session.reason or "cut-off"
    result["notes"] = list(session.warnings)
    from autotune.job.tune import propose_gains

    header = session.header
    result["proposals"] = propose_gains(
        an, _get(header, "config", "design") or {},
        _finite(_get(header, "config", "safety", "output_limit")),
        _finite(_get(header, "config", "relay", "target_amplitude")), an.ts, result["notes"])
    out = Path(args.json) if args.json else Path(args.session).with_name("result.json")
    write_result(out, result)
    unc = an.uncertainty
    print(f"ultimate gain   {an.ku:.5g} (+/- {100 * unc['ultimate_gain']:.1f}%)   "
          f"classic {an.ku_classic:.5g}")
    print(f"ultimate period {an.tu:.5g} s (+/- {100 * unc['ultimate_period']:.1f}%)   "
          f"classic {an.tu_classic:.5g} s")
    params = ", ".join(f"{k} {v:.4g}" for k, v in an.model.params.items())
    print(f"model           {an.model.kind}: {params}")
    print(f"cycles used     {an.cycles_used}{'' if an.converged else ' (not converged)'}")
    if db > 0:
        print(f"dead zone       {db:.4g} taken out of the output (--deadband 0: none)")
    for w in an.warnings:
        print(f"warning: {w}")
    print(f"wrote {out}")
    return EXIT_OK
