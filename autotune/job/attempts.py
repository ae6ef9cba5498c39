"""The confirmation-step attempt loop shared by `autotune step` and `autotune tune`.

One attempt = one powered batch (`autotune.commands.step.run_batch`: connect, arm, one step, with
automatic detuned repeats under --yes), then the figures and the verdict are shown and the
operator picks accept / detune / other proposal / repeat / quit (line mode; `--yes` accepts when
the step meets the spec). The UI can drive the same pieces: `run_batch`, `describe`, `accept`,
`write_outputs` in autotune.commands.step, and `proposal_choice` / `pick_interactively` here.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from autotune.config import Config
from autotune.core.pid import PidGains
from autotune.errors import EXIT_FAILED, EXIT_OK

__all__ = ["AttemptsResult", "ask", "pick_interactively", "proposal_choice", "run_attempts",
           "step_namespace"]


@dataclass
class AttemptsResult:
    """What the attempt loop produced: exit code (0 accepted / meets the spec), end reason of
    the last powered batch, every step outcome in order, the accepted gains file (or None), the
    session files, and the last verdict's reason."""

    exit_code: int
    end_reason: str
    outcomes: list[Any] = field(default_factory=list)
    gains_file: Path | None = None
    sessions: list[Path] = field(default_factory=list)
    reason: str = ""


def ask(stdout: TextIO, stdin: Any, prompt: str) -> str:
    """Print `prompt`, read one line, return it stripped and lower-cased ("" at end of input)."""
    stdout.write(prompt)
    stdout.flush()
    return stdin.readline().strip().lower()


def proposal_choice(prop: dict[str, Any], pool: list[dict[str, Any]],
                    model: dict[str, Any] | None = None) -> Any:
    """A `Choice` (autotune.commands.step) for one proposal dict of a result.json."""
    from autotune.commands.step import Choice

    extra = {k: float(prop[k]) for k in ("deriv_filter_n", "setpoint_weight", "tracking_time")
             if isinstance(prop.get(k), int | float) and not isinstance(prop.get(k), bool)}
    return Choice(str(prop["name"]), PidGains(float(prop["kp"]), float(prop.get("ki", 0.0)),
                                              float(prop.get("kd", 0.0))),
                  dict(prop.get("predicted") or {}), pool, model, extra)


def pick_interactively(pool: list[dict[str, Any]], answer: str) -> dict[str, Any] | None:
    """The proposal named `answer` or numbered `answer` (1-based) in `pool`; with an empty
    answer the default one (flag `default`, else the first); None when nothing matches."""
    if not pool:
        return None
    a = answer.strip().lower()
    if not a:
        return next((p for p in pool if p.get("default")), pool[0])
    if a.isdigit():
        k = int(a)
        return pool[k - 1] if 1 <= k <= len(pool) else None
    return next((p for p in pool if str(p.get("name", "")).lower() == a), None)


def step_namespace(**overrides: Any) -> argparse.Namespace:
    """The `autotune step` options with their defaults (for running the step from another
    verb); keyword arguments replace values."""
    from autotune.commands.step import DEFAULT_MAX_SATURATION
    from autotune.core.verdict import DEFAULT_DETUNE

    ns = argparse.Namespace(size=None, load_offset=0.0, filter_n=10.0, setpoint_weight=None,
                            tracking_time=None, max_overshoot=None, max_settling_time=None,
                            max_saturation=DEFAULT_MAX_SATURATION, detune=DEFAULT_DETUNE,
                            retries=0, gains_file=None, store=False, yes=False, faults=None,
                            seed=None)
    for k, v in overrides.items():
        setattr(ns, k, v)
    return ns


def run_attempts(cfg: Config, args: argparse.Namespace, choice: Any, spec: Any,
                 out_root: Path, stdout: TextIO, stdin: Any) -> AttemptsResult:
    """Run confirmation steps until the operator accepts or quits (or, with args.yes, once).

    args: the `autotune step` options (see `step_namespace`); choice: the gains to try first
    (autotune.commands.step.Choice, whose `pool` holds the other proposals); out_root: the first
    batch writes there, later ones in out_root/attempt-N; the gains file goes to
    args.gains_file or out_root/gains.toml on accept. Writes nothing else: the caller writes
    result.json (`autotune.commands.step.write_outputs` or its own).
    """
    from autotune.commands.step import accept, describe, run_batch, store_later
    from autotune.core.verdict import detune

    res = AttemptsResult(EXIT_FAILED, "unknown")
    n_batch = 0
    while True:
        n_batch += 1
        out_dir = out_root if n_batch == 1 else out_root / f"attempt-{n_batch}"
        batch = run_batch(cfg, args, choice, out_dir, spec, stdout,
                          args.retries if args.yes else 0)
        res.outcomes += batch.outcomes
        if batch.session is not None and batch.session.exists():
            res.sessions.append(batch.session)
        ro = batch.run_outcome
        res.end_reason = ro.reason
        for o in batch.outcomes:
            text = describe(o)
            if text:
                print(text, file=stdout)
        last = batch.outcomes[-1] if batch.outcomes else None
        if ro.reason != "completed" or last is None or last.verdict is None:
            res.exit_code = ro.exit_code if ro.exit_code != EXIT_OK else EXIT_FAILED
            res.reason = ro.message or ro.reason
            return res
        verdict = last.verdict
        res.reason = verdict.reason
        device = dict(batch.device, axis=cfg.connection.axis)
        gpath = Path(args.gains_file) if args.gains_file else out_root / "gains.toml"
        if args.yes:
            if verdict.passed:
                res.gains_file = accept(last, gpath, batch.session, stdout, device)
                res.exit_code = EXIT_OK
            else:
                res.exit_code = EXIT_FAILED
            return res
        action = ask(stdout, stdin, f"suggested: {verdict.action.value}. [a]ccept, "
                     f"[d]etune x{args.detune:g}, [o]ther proposal, [r]epeat, [q]uit: ")
        if action in ("a", "accept"):
            res.gains_file = accept(last, gpath, batch.session, stdout, device)
            if args.store:
                store_later(cfg, args, last.candidate.gains, stdout)
            res.exit_code = EXIT_OK
            return res
        if action in ("d", "detune"):
            from autotune.commands.step import Choice

            g = detune(last.candidate.gains, args.detune)
            choice = Choice(f"{choice.name} x{args.detune:g}", g, {}, choice.pool, choice.model,
                            choice.pid_extra)
            continue
        if action in ("r", "repeat"):
            continue
        if action in ("o", "other"):
            if not choice.pool:
                print("no other proposals (use --from-result FILE)", file=stdout)
                continue
            names = ", ".join(f"{k}:{p.get('name')}" for k, p in enumerate(choice.pool, 1))
            p = pick_interactively(choice.pool, ask(stdout, stdin,
                                                    f"proposal ({names}; name or number): "))
            if p is None:
                print("no such proposal", file=stdout)
                continue
            choice = proposal_choice(p, choice.pool, choice.model)
            continue
        res.exit_code = EXIT_FAILED if not verdict.passed else EXIT_OK
        return res
