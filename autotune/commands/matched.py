"""Plans on the terminal (`tune` and `demo` with a [[loop]] plan) and the matched loops of a plan
(the two wheels of a drive base): what was identified on each, side
by side, and one design for all of them, with the choice between one common set of gains and
each loop's own. The work is the offline one of `autotune compare` and `autotune analyze S S...`
(autotune.commands.sessions: the same session reading, comparison and joint design); only the
loops here sit on different axes, by design.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from autotune.commands.options import terminal_for
from autotune.commands.sessions import (
    comparison_json,
    comparison_lines,
    joint_lines,
    load_session,
    spec_of,
)
from autotune.config import LoopConfig
from autotune.core import design
from autotune.core.conditions import compare_figures, loop_mismatch
from autotune.core.matching import RISE_MATCH, match_rise_times, rise_spread
from autotune.errors import EXIT_OK
from autotune.job.job import JobOutcome
from autotune.job.plan import PlanOutcome, run_plan
from autotune.job.powered import Connection
from autotune.job.requests import JobRequest
from autotune.recorder import write_atomic, write_result
from autotune.ui.app import Terminal, TerminalOperator, run_job


def _rise_times(p: design.Proposal) -> dict[str, float]:
    return {f.name: float(f.predicted["rise_time"]) for f in p.per_condition}


def matched_report(names: Sequence[str], paths: Sequence[str | Path]
                   ) -> tuple[dict[str, Any], list[str]]:
    """The matched loops `names`, whose sessions are `paths`: (the report for summary.json,
    its lines for the operator).

    The report holds the comparison of the identified figures (Ku, Tu, static gain, dead time,
    dead zone, each model's parameters: its time constants), the joint design's proposals on
    all loops, and the choice: "common" when the joint default keeps the Ms target on every
    loop and its predicted rise times agree within RISE_MATCH, else "per-loop" (each loop's
    own gains, with the reason). The per-loop gains are those of `matching.match_rise_times`:
    the slowest loop keeps its own default, each faster one is slowed along its own robust
    designs until the predicted rise times agree (report["per_loop"]: each loop's gains, rise
    time (s), overshoot (%), Ms; report["match"]: which gains ("common" or "per-loop"), whether
    they are alike, the predicted rise-time spread and the reason, also when they cannot
    be matched)."""
    loaded = [load_session(str(p), n) for n, p in zip(names, paths, strict=True)]
    # different axes by design; the units and the tick must agree
    why = loop_mismatch(list(names), [dataclasses.replace(s.loop, axis=0) for s in loaded])
    if why:
        return {"loops": list(names), "choice": None, "reason": why}, [why]
    cmp = compare_figures([s.figures for s in loaded])
    report: dict[str, Any] = {
        "loops": list(names),
        "comparison": comparison_json(cmp),
        "models": {s.name: (s.fields.get("model") or {}).get("params") for s in loaded},
    }
    lines = [f"matched loops: {', '.join(names)}", *comparison_lines(cmp)]
    for s in loaded:
        params = report["models"][s.name] or {}
        text = ", ".join(f"{k} {v:.4g}" for k, v in params.items() if isinstance(v, float))
        lines.append(f"{s.name}: model {s.figures.model or '-'} ({text or 'no parameters'})")
    used = [s for s in loaded if s.condition is not None]
    if len(used) < 2:
        report.update(choice=None, reason="fewer than two loops with a converged relay")
        return report, [*lines, report["reason"]]
    spec = spec_of(used[0])
    res = design.design_proposals([s.condition for s in used if s.condition], spec)
    lines += joint_lines(res, used, [s for s in loaded if s.condition is None], spec)
    report["joint"] = {"proposals": [p.as_dict(spec.n) for p in res.proposals],
                       "default": res.default, "note": res.note,
                       "warnings": list(res.warnings)}
    common = res.get(res.default) if res.default else None
    if common is None:
        choice, reason = "per-loop", f"no common design is safe on every loop: {res.note}"
    else:
        rise = _rise_times(common)
        spread = rise_spread(list(rise.values()))
        report["common"] = {"proposal": common.name, "kp": common.gains.kp,
                            "ki": common.gains.ki, "kd": common.gains.kd,
                            "rise_time": rise, "rise_spread": spread}
        keeps = common.runnable and all(f.meets_target for f in common.per_condition)
        if not keeps:
            choice, reason = "per-loop", (f"the common {common.name} breaks the Ms target "
                                          "on a loop")
        elif not spread <= RISE_MATCH:
            choice, reason = "per-loop", (
                f"with the common {common.name} the predicted rise times differ by "
                f"{spread * 100:.1f} % (more than {RISE_MATCH * 100:g} %): the wheels would "
                "not answer alike")
        else:
            choice, reason = "common", (
                f"the common {common.name} (kp {common.gains.kp:.4g}, ki {common.gains.ki:.4g}"
                f"/s, kd {common.gains.kd:.4g} s) keeps the Ms target on every loop and their "
                f"predicted rise times agree within {spread * 100:.1f} %")
    if choice == "per-loop":  # each loop's own gains, matched where they can be
        match = match_rise_times([dataclasses.replace(s.condition, name=s.name)
                                  for s in used if s.condition], [spec_of(s) for s in used])
        report["per_loop"] = {lp.name: lp.as_dict(sp) for lp, sp in
                              zip(match.loops, [spec_of(s) for s in used], strict=True)}
        report["match"] = {"gains": "per-loop", "matched": match.matched,
                           "reference": match.reference, "rise_time": match.rise_time,
                           "rise_spread": match.spread, "tolerance": match.tolerance,
                           "reason": match.reason}
        for lp in match.loops:
            p = lp.proposal
            if p is None:
                lines.append(f"{lp.name}: no safe design of its own")
                continue
            role = "reference" if lp.reference else ("matched" if lp.matched else "own")
            lines.append(f"{lp.name}: {role} {p.name}: kp {p.gains.kp:.4g}, ki "
                         f"{p.gains.ki:.4g}/s, kd {p.gains.kd:.4g} s, b "
                         f"{p.setpoint_weight:g}; predicted rise time {lp.rise_time:.3g} s, "
                         f"overshoot {lp.overshoot:.3g} %, Ms {lp.ms:.3g}")
        spread = "-" if math.isnan(match.spread) else f"{match.spread * 100:.1f} %"
        lines.append(f"per-loop rise-time spread: {spread}: {match.reason}")
        if match.matched:
            reason += f"; {match.reason}"
        else:
            reason += f"; per-loop gains not matched: {match.reason}"
    elif choice == "common":
        report["match"] = {"gains": "common", "matched": True, "reference": None,
                           "rise_time": max(report["common"]["rise_time"].values()),
                           "rise_spread": report["common"]["rise_spread"],
                           "tolerance": RISE_MATCH, "reason": reason}
    report.update(choice=choice, reason=reason)
    lines.append(f"choice: {choice}: {reason}")
    return report, lines


def run_plan_verb(args: argparse.Namespace, req: JobRequest) -> int:
    """A verb's plan (`tune`, `demo`): each loop on the terminal as that verb runs one loop,
    then the matched loops' report into summary.json and summary.txt; the exit code."""

    def run_loop(r: JobRequest, conn: Connection, loop: LoopConfig) -> JobOutcome:
        return run_job(r, term=terminal_for(args), connection=conn)

    def confirm(info: Any) -> bool:
        """A heading loop's confirmation: --yes, else the operator types yes (line mode)."""
        if req.yes:
            return True
        term = Terminal(stdin=sys.stdin, rich=False)
        with term:
            return TerminalOperator(term, unattended=False).confirm_power(
                "run the heading loop: both wheels turn together and the base steers")

    outcome = run_plan(req, run_loop, say=print, confirm=confirm)
    if outcome.exit_code == EXIT_OK:
        _matched(outcome)
    if outcome.summary_path is not None:
        print(f"summary: {outcome.summary_path}")
    if outcome.exit_code != EXIT_OK:
        print(f"autotune {req.verb}: {outcome.message or outcome.reason}", file=sys.stderr)
    return outcome.exit_code


def _matched(outcome: PlanOutcome) -> None:
    """The matched loops' report into summary.json and summary.txt, and on the screen."""
    runs = [r for r in outcome.loops if r.loop.role == "matched" and r.outcome is not None
            and r.outcome.session_path is not None]
    if len(runs) < 2 or outcome.summary_path is None:
        return
    report, lines = matched_report([r.loop.name for r in runs],
                                   [str(r.outcome.session_path) for r in runs if r.outcome])
    summary = json.loads(outcome.summary_path.read_text(encoding="utf-8"))
    summary["matched"] = report
    write_result(outcome.summary_path, summary)
    write_atomic(outcome.summary_path.with_suffix(".txt"), "\n".join(lines) + "\n")
    for line in lines:
        print(line)
