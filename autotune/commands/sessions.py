"""Several recorded sessions of one loop, offline: read and analyse each, then compare them
(`autotune compare`), design one set of gains for all of them (`autotune analyze S S...`) or
judge given gains on them (`autotune analyze S --gains FILE`). Shows only; the work is in
autotune.core.conditions and autotune.core.design.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from autotune.core import analysis, design, identify
from autotune.core.conditions import (
    FIGURES,
    Comparison,
    LoopFigures,
    LoopIdentity,
    compare_figures,
    condition_of_identification,
    figures_of_identification,
    loop_mismatch,
)
from autotune.core.session_record import RECORD_PHASES, finite, get_path, session_record
from autotune.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE, UserError
from autotune.gainsfile import GainsFileError, GainsRecord, read_gains_file
from autotune.recorder import Session, read_session, write_result

# ---------------------------------------------------------------- reading sessions


@dataclass
class LoadedSession:
    """One session file read and analysed: its label, the session, the loop it belongs to,
    its figures, the design's condition (None when the relay did not converge) and the
    analysis' result.json fields (empty when it failed)."""

    name: str
    path: str
    session: Session
    loop: LoopIdentity
    figures: LoopFigures
    condition: design.Condition | None
    analysis: analysis.RelayAnalysis | None = None
    fields: dict[str, Any] = field(default_factory=dict)


def loop_of(header: dict[str, Any]) -> LoopIdentity:
    """The loop a session header names: axis, units (header `units`: {"pv", "output"}, where
    recorded) and the device tick (s)."""
    axis = header.get("axis", get_path(header, "config", "connection", "axis"))
    units = header.get("units") if isinstance(header.get("units"), dict) else {}
    return LoopIdentity(axis=int(axis) if isinstance(axis, int) else 0,
                        pv_units=units.get("pv"), output_units=units.get("output"),
                        tick=finite(get_path(header, "device", "tick")))


def _labels(paths: Sequence[str]) -> list[str]:
    """Short labels: the directory of a `session.jsonl`, else the file name; the path where
    two would be the same."""
    short = [Path(p).parent.name if Path(p).name == "session.jsonl" and Path(p).parent.name
             else Path(p).name for p in paths]
    return [s if short.count(s) == 1 else str(p) for s, p in zip(short, paths, strict=True)]


def load_session(path: str, name: str, deadband: float | None = None) -> LoadedSession:
    """Read and analyse one session as `autotune analyze` does (the one run-record builder,
    autotune.core.session_record, and the identification; `deadband` output units overrides
    the dead zone the run decided, 0 = none). Unreadable files raise SessionFileError (exit 2,
    naming the file); a session whose relay cannot be analysed or did not converge is
    returned with `condition` None and the reason in its figures."""
    session = read_session(path, phases=RECORD_PHASES)
    loop = loop_of(session.header)
    record = session_record(session, deadband)
    if int(np.sum(record.phase == "relay")) < 10:
        return LoadedSession(name, path, session, loop,
                             LoopFigures(name, False, "no relay samples to analyse"), None)
    try:
        ident = identify.identify(identify.analysis_inputs(record))
    except analysis.AnalysisError as exc:
        return LoadedSession(name, path, session, loop, LoopFigures(name, False, str(exc)), None)
    an = ident.analysis
    figs = figures_of_identification(name, ident)
    cond = condition_of_identification(name, ident) if figs.converged else None
    return LoadedSession(name, path, session, loop, figs, cond, an,
                         {"source": path, **identify.result_fields(ident)})


def load_sessions(paths: Sequence[str], deadband: float | None = None) -> list[LoadedSession]:
    """Every session, labelled; refuses (exit 2) sessions of different loops with the reason."""
    if deadband is not None and deadband < 0:
        raise UserError(f"--deadband must be >= 0, got {deadband:g}", EXIT_USAGE)
    loaded = [load_session(p, n, deadband) for p, n in zip(paths, _labels(paths), strict=True)]
    why = loop_mismatch([s.name for s in loaded], [s.loop for s in loaded])
    if why:
        raise UserError(why, EXIT_USAGE)
    return loaded


def spec_of(s: LoadedSession, **extra: Any) -> design.DesignSpec:
    """The DesignSpec a session's own run used: its config's [design], output limit, target
    amplitude and tick (extra: further DesignSpec fields)."""
    h = s.session.header
    return design.spec_from_config(get_path(h, "config", "design") or {},
                                   finite(get_path(h, "config", "safety", "output_limit")),
                                   finite(get_path(h, "config", "relay", "target_amplitude")),
                                   s.loop.tick, **extra)


# ---------------------------------------------------------------- formatting


def _num(x: float | None, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, float) and math.isinf(x):
        return "inf"
    return f"{x:.{digits}g}"


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h)
              for i, h in enumerate(header)]
    fmt = "  ".join(f"{{:<{w}}}" if i == 0 else f"{{:>{w}}}" for i, w in enumerate(widths))
    return [fmt.format(*header)] + [fmt.format(*r) for r in rows]


# ---------------------------------------------------------------- compare


def comparison_lines(cmp: Comparison) -> list[str]:
    """The compare table (value and change from the reference per figure; "*" marks a change
    beyond the uncertainty, "?" one whose uncertainty is unknown) and the sentence."""
    header = ["session", *(label for _, label in FIGURES), "model"]
    rows = []
    for i, f in enumerate(cmp.figures):
        if not f.converged:
            rows.append([f.name, *(["-"] * len(FIGURES)), f"not converged: {f.reason}"])
            continue
        cells = [f.name]
        changes = {c.figure: c for c in cmp.changes[i]}
        for name, _ in FIGURES:
            v = getattr(f, name)
            c = changes.get(name)
            cell = _num(v)
            if c is not None and c.relative is not None:
                mark = "?" if c.exceeds is None else ("*" if c.exceeds else "")
                cell += f" ({c.relative * 100:+.0f}%{mark})"
            elif c is not None and c.difference is not None:
                mark = "?" if c.exceeds is None else ("*" if c.exceeds else "")
                cell += f" ({c.difference:+.3g}{mark})"
            cells.append(cell)
        model = f.model or "-"
        if cmp.model_changed[i]:
            model += " (changed)"
        cells.append(model + (" (reference)" if i == cmp.reference else ""))
        rows.append(cells)
    lines = _table(header, rows)
    lines.append("changes from the reference; * beyond twice the combined uncertainty, "
                 "? uncertainty unknown")
    lines.append(cmp.sentence)
    return lines


def comparison_json(cmp: Comparison) -> dict[str, Any]:
    return {
        "reference": None if cmp.reference is None else cmp.figures[cmp.reference].name,
        "sessions": [{**dataclasses.asdict(f),
                      "changes": [dataclasses.asdict(c) for c in cmp.changes[i]],
                      "model_changed": cmp.model_changed[i]}
                     for i, f in enumerate(cmp.figures)],
        "sentence": cmp.sentence,
    }


def run_compare(paths: Sequence[str], json_out: str | None, deadband: float | None = None
                ) -> int:
    """`autotune compare`: print the comparison; exit 0 when it could compare."""
    if len(paths) < 2:
        raise UserError("compare needs at least two sessions", EXIT_USAGE)
    loaded = load_sessions(paths, deadband)
    cmp = compare_figures([s.figures for s in loaded])
    for line in comparison_lines(cmp):
        print(line)
    if json_out:
        write_result(json_out, comparison_json(cmp))
        print(f"wrote {json_out}")
    return EXIT_OK


# ---------------------------------------------------------------- one design for all


def _designed_on(loaded: Sequence[LoadedSession]) -> list[LoadedSession]:
    used = [s for s in loaded if s.condition is not None]
    if not used:
        raise UserError("no session has a converged relay: nothing to design on or judge "
                        "gains with; tune again",
                        EXIT_FAILED)
    return used


def joint_lines(res: design.DesignResult, used: Sequence[LoadedSession],
                skipped: Sequence[LoadedSession], spec: design.DesignSpec) -> list[str]:
    """Each proposal's figures per session: Ms, overshoot (%), settling time (s); "!" marks a
    session where it breaks the Ms target, "x" one where it is not runnable."""
    lines = [f"one design for {len(used)} sessions: {', '.join(s.name for s in used)} "
             f"(Ms target {spec.ms_target:g})"]
    header = ["proposal", "kp", "ki", "kd"] + [f"{s.name}: Ms/os%/ts" for s in used]
    rows = []
    for p in res.proposals:
        cells = [("* " if p.default else "  ") + p.name, _num(p.gains.kp), _num(p.gains.ki),
                 _num(p.gains.kd)]
        for f in p.per_condition:
            pr = f.predicted
            mark = "" if f.meets_target else ("x" if not pr["stable"] else "!")
            ms = float(pr["ms"])
            if not math.isnan(float(pr["ms_points"])):
                ms = max(ms, float(pr["ms_points"]))
            cells.append(f"{_num(ms, 3)}/{_num(float(pr['overshoot']), 3)}/"
                         f"{_num(float(pr['settling_time']), 3)}{mark}")
        rows.append(cells)
    lines += _table(header, rows)
    lines.append("* default; Ms the larger of the model's and the measured points'; "
                 "! breaks the Ms target there, x unstable there")
    lines.append(res.note)
    lines += [f"warning: {w}" for w in res.warnings]
    lines += [f"not designed on: {s.name} ({s.figures.reason})" for s in skipped]
    return lines


def run_joint(paths: Sequence[str], json_out: str | None, deadband: float | None = None) -> int:
    """`autotune analyze S S...`: every proposal designed on all converged sessions together."""
    loaded = load_sessions(paths, deadband)
    used = _designed_on(loaded)
    skipped = [s for s in loaded if s.condition is None]
    spec = spec_of(used[0])
    res = design.design_proposals([s.condition for s in used if s.condition], spec)
    for line in joint_lines(res, used, skipped, spec):
        print(line)
    if json_out:
        result = {**used[0].fields,
                  "source": [s.path for s in loaded],
                  "proposals": [p.as_dict(spec.n) for p in res.proposals],
                  "default": res.default, "default_note": res.note,
                  "warnings": [*used[0].fields.get("warnings", []), *res.warnings],
                  "sessions": [{"name": s.name, "designed_on": s.condition is not None,
                                "reason": s.figures.reason or None,
                                **{k: v for k, v in s.fields.items() if k != "proposals"}}
                               for s in loaded]}
        write_result(json_out, result)
        print(f"wrote {json_out}")
    return EXIT_OK


# ---------------------------------------------------------------- given gains


def _read_gains(path: str) -> GainsRecord:
    try:
        return read_gains_file(path)
    except GainsFileError as exc:
        raise UserError(str(exc), EXIT_USAGE) from None


def gains_lines(rec: GainsRecord, p: design.Proposal, passed: bool, sentence: str,
                spec: design.DesignSpec) -> list[str]:
    g = rec.gains
    lines = [f"gains kp {_num(g.kp)}  ki {_num(g.ki)}/s  kd {_num(g.kd)} s  "
             f"(b {rec.setpoint_weight:g}, N {rec.deriv_filter_n:g}, period {rec.period:g} s)"]
    header = ["session", "Ms", "Ms points", "gain margin", "phase margin", "overshoot %",
              "settling s", "load IAE", "target"]
    rows = []
    for f in p.per_condition:
        pr = f.predicted
        rows.append([f.name, _num(float(pr["ms"]), 3), _num(float(pr["ms_points"]), 3),
                     _num(float(pr["gain_margin"]), 3),
                     _num(float(pr["phase_margin_deg"]), 3) + " deg",
                     _num(float(pr["overshoot"]), 3), _num(float(pr["settling_time"]), 3),
                     _num(float(pr["iae_load"]), 3),
                     "kept" if f.meets_target else "broken"])
    lines += _table(header, rows)
    if not p.predicted.get("reliable", True):
        lines.append("warning: the model does not reproduce the measured response: the "
                     "predicted figures are unreliable")
    lines += [f"flag: {v}" for v in p.violations]
    lines.append(("PASS: " if passed else "FAIL: ") + sentence)
    return lines


def run_gains(paths: Sequence[str], gains_path: str, json_out: str | None,
              deadband: float | None = None) -> int:
    """`autotune analyze S --gains FILE`: the given gains on each session's model and measured
    points; exit 0 when they meet the design target and the spec, 1 when not."""
    rec = _read_gains(gains_path)
    loaded = load_sessions(paths, deadband)
    for s in loaded:
        if rec.axis != s.loop.axis:
            raise UserError(f"{gains_path} holds gains for axis {rec.axis}, but {s.name} is "
                            f"axis {s.loop.axis}: judge gains only on their own loop",
                            EXIT_USAGE)
    used = _designed_on(loaded)
    lim = rec.output_limit
    spec = spec_of(used[0], n=rec.deriv_filter_n, setpoint_weight=rec.setpoint_weight,
                   tracking_time=rec.tracking_time)
    spec = dataclasses.replace(spec, ts=rec.period,
                               output_limit=lim if lim is not None else spec.output_limit)
    p = design.evaluate([s.condition for s in used if s.condition], "given", rec.gains, spec,
                        rec.setpoint_weight, source=str(gains_path))
    passed, sentence = design.gains_verdict(p, spec)
    for line in gains_lines(rec, p, passed, sentence, spec):
        print(line)
    if used[0].loop.tick is not None and abs(used[0].loop.tick - rec.period) > 1e-9:
        print(f"note: the gains are for a {rec.period:g} s loop, the session ran at a "
              f"{used[0].loop.tick:g} s tick; judged at the gains' period")
    for s in loaded:
        if s.condition is None:
            print(f"not judged on: {s.name} ({s.figures.reason})")
    if json_out:
        write_result(json_out, {"source": [s.path for s in loaded], "gains_file": gains_path,
                                "gains": p.as_dict(spec.n),
                                "verdict": {"passed": passed, "sentence": sentence,
                                            "ms_target": spec.ms_target,
                                            "max_overshoot": spec.max_overshoot,
                                            "max_settling_time": spec.max_settling_time}})
        print(f"wrote {json_out}")
    return EXIT_OK if passed else EXIT_FAILED


def run_several(args: Any) -> int:
    """`autotune analyze` with several sessions or --gains (called by analyze.run)."""
    if args.gains:
        return run_gains(args.session, args.gains, args.json, args.deadband)
    return run_joint(args.session, args.json, args.deadband)
