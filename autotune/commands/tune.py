"""`autotune tune`: prechecks and a bounded relay experiment on one loop, then gain proposals."""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from autotune.commands.options import (
    add_connection_options,
    add_safety_options,
    add_sim_options,
    common_overrides,
)
from autotune.config import (
    Config,
    ConnectionConfig,
    PrecheckConfig,
    RelayConfig,
    SafetyConfig,
    load_config,
    with_overrides,
)
from autotune.errors import EXIT_OK, UserError
from autotune.job.powered import RunOptions

HELP = "run the relay experiment on one loop and propose PID gains (powers the motor)"

_S, _R, _C, _P = SafetyConfig(), RelayConfig(), ConnectionConfig(), PrecheckConfig()


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.formatter_class = argparse.RawDescriptionHelpFormatter
    p.epilog = (
        "Options override the config file, which overrides the built-in defaults shown.\n"
        "Abort at any time with Space, Esc, q or Ctrl-C; keep a physical power cut-off within\n"
        "reach. Exit codes: 0 converged (and the confirmation step, when run, accepted or\n"
        "within the spec), 1 limit/fault/failed check, no convergence or a step off the spec,\n"
        "2 usage or configuration, 3 aborted, 4 link lost, 5 zero output not confirmed."
    )
    add_connection_options(p)
    p.add_argument("--yes", action="store_true",
                   help="do not ask for confirmation (for scripts; the cautions still apply)")
    p.add_argument("--out", metavar="DIR",
                   help="directory for session.jsonl and result.json (default: "
                        "./autotune-sessions/tune-YYYYmmdd-HHMMSS)")
    p.add_argument("--loop", choices=("host", "device"),
                   help="where the relay runs: on the board (device) or here (host) (default: "
                        "device when the board offers it and sign is +1, else host)")
    add_safety_options(p)
    p.add_argument("--target-amplitude", type=float, metavar="A",
                   help=f"PV oscillation peak amplitude to aim for, PV units "
                        f"(default: {_R.target_amplitude:g})")
    p.add_argument("--amplitude", type=float, metavar="D",
                   help="relay start amplitude, output units (default: a quarter of the "
                        "output limit)")
    p.add_argument("--hysteresis", type=float, metavar="EPS",
                   help="relay hysteresis, PV units (default: from the rest check, "
                        "max(3 x noise, resolution))")
    p.add_argument("--max-cycles", type=int, metavar="N",
                   help=f"stop the relay after N cycles (default: {_R.max_cycles})")
    p.add_argument("--max-time", type=float, metavar="S",
                   help=f"stop the relay after S seconds (default: {_R.max_time:g})")
    add_sim_options(p)
    p.add_argument("--csv", action="store_true",
                   help="also write the samples as session.csv next to session.jsonl")
    p.add_argument("--view", choices=("auto", "screen", "lines"), default="auto",
                   help="screen: the full-screen bench view; lines: one plain line per event "
                        "(default auto: the bench view when both stdin and stdout are terminals "
                        "and neither --csv, --faults nor --no-step is given)")
    p.add_argument("--no-step", action="store_true",
                   help="do not offer the confirmation step after the proposals (default: with "
                        "--yes the step runs with the default proposal; otherwise you are asked "
                        "which proposal to try and whether to run it)")


def _overrides(args: argparse.Namespace) -> dict[str, object]:
    return {
        **common_overrides(args),
        "relay.target_amplitude": args.target_amplitude,
        "relay.start_amplitude": args.amplitude,
        "relay.hysteresis": args.hysteresis,
        "relay.max_cycles": args.max_cycles,
        "relay.max_time": args.max_time,
    }


def default_out_dir(verb: str) -> Path:
    """./autotune-sessions/<verb>-YYYYmmdd-HHMMSS (made unique with a suffix)."""
    base = Path("autotune-sessions") / f"{verb}-{time.strftime('%Y%m%d-%H%M%S')}"
    p, n = base, 1
    while p.exists():
        n += 1
        p = base.with_name(f"{base.name}-{n}")
    return p


def run(args: argparse.Namespace) -> int:
    from autotune.job.tune import LinePrinter, run_tune

    cfg = with_overrides(load_config(args.config), _overrides(args))
    port = cfg.connection.port
    if not port:
        raise UserError("no port given: use --port URL (or --port sim), or set "
                        "connection.port in the config")
    out_dir = Path(args.out) if args.out else default_out_dir("tune")
    if _bench_view(args):
        return _run_bench_view(cfg, args, port, out_dir)
    options = RunOptions(port=port, yes=args.yes, out_dir=out_dir, plant=cfg.connection.plant,
                         speed=cfg.connection.speed, faults=args.faults, seed=args.seed,
                         verb="tune")
    printer = LinePrinter(sys.stdout)
    outcome = run_tune(cfg, options, on_update=printer, csv=args.csv)
    res = outcome.result
    if res is not None:
        ku, tu = res.get("ultimate_gain"), res.get("ultimate_period")
        if ku is not None and tu is not None:
            print(f"ultimate gain Ku = {ku:.4g} (output units per PV unit), "
                  f"ultimate period Tu = {tu:.4g} s")
        kc, tc = res.get("ultimate_gain_df"), res.get("ultimate_period_df")
        if kc is not None and tc is not None:
            print(f"plain describing function: Ku = {kc:.4g}, Tu = {tc:.4g} s")
        for prop in res.get("proposals", []) or []:
            print(f"  {prop['name']:<12} kp {prop['kp']:.4g}  ki {prop['ki']:.4g}/s  "
                  f"kd {prop['kd']:.4g} s  b {float(prop.get('setpoint_weight', 1.0)):.2f}")
        for note in res.get("notes", []) or []:
            print(f"note: {note}")
    if outcome.session_path is not None:
        print(f"session: {outcome.session_path}")
    if outcome.result_path is not None:
        print(f"result: {outcome.result_path}")
    if outcome.exit_code != EXIT_OK:
        print(f"autotune tune: {outcome.reason}: {outcome.message}", file=sys.stderr)
        return outcome.exit_code
    if res is not None and res.get("proposals") and not args.no_step:
        return confirmation_step(cfg, args, res, out_dir, outcome.result_path)
    return outcome.exit_code


def _bench_view(args: argparse.Namespace) -> bool:
    """Whether this run uses the full-screen bench view (see --view)."""
    if args.view == "lines":
        return False
    if args.view == "screen":
        return True
    return (sys.stdin.isatty() and sys.stdout.isatty() and not args.csv and not args.faults
            and not args.no_step)


def _run_bench_view(cfg: Config, args: argparse.Namespace, port: str, out_dir: Path) -> int:
    """The whole job (start screen, relay, proposals, step, accept) in the bench view."""
    from autotune.simdevice import SIM
    from autotune.ui.app import JobSettings, run_job

    if args.csv or args.faults or args.no_step:
        raise UserError("--csv, --faults and --no-step work with --view lines only")
    simulated = port == SIM
    out_dir.mkdir(parents=True, exist_ok=True)
    settings = JobSettings(port=port, out_dir=out_dir, yes=args.yes, label=port,
                           simulated=simulated, speed=cfg.connection.speed,
                           plant=cfg.connection.plant, seed=args.seed,
                           device=f"simulated {cfg.connection.plant} board" if simulated
                           else port)
    result = run_job(cfg, settings)
    if result.exit_code != EXIT_OK:
        print(f"autotune tune: {result.message}", file=sys.stderr)
    return result.exit_code


def confirmation_step(cfg: Config, args: argparse.Namespace, res: dict[str, Any],
                      out_dir: Path, result_path: Path | None,
                      stdout: TextIO | None = None, stdin: Any = None) -> int:
    """The confirmation step after the proposals (line mode): with --yes the default proposal,
    else the operator picks one (name or number; Enter: the default) and confirms; then the
    same attempt loop as `autotune step` (autotune.job.attempts.run_attempts) in OUT/step. Adds
    `step`, `step_attempts`, `step_end_reason` and `gains_file` to result.json. Returns 0 when
    the step was skipped or accepted / meets the spec, else the step's exit code."""
    from autotune.core.verdict import StepSpec
    from autotune.job.attempts import (
        ask,
        pick_interactively,
        proposal_choice,
        run_attempts,
        step_namespace,
    )
    from autotune.recorder import write_result

    stdout = stdout if stdout is not None else sys.stdout
    stdin = stdin if stdin is not None else sys.stdin
    pool = [p for p in res.get("proposals") or [] if isinstance(p, dict)]
    default = pick_interactively(pool, "")
    if default is None:
        return EXIT_OK
    if args.yes:
        prop = default
    else:
        for k, p in enumerate(pool, 1):
            print(f"  {k:>2}. {p.get('name')}", file=stdout)
        prop = None
        while prop is None:
            answer = ask(stdout, stdin, f"proposal for the confirmation step (name or number; "
                                        f"Enter: {default.get('name')}): ")
            prop = pick_interactively(pool, answer)
            if prop is None:
                print(f"no proposal {answer!r}", file=stdout)
        go = ask(stdout, stdin, f"run the confirmation step with {prop.get('name')} now "
                                "(powers the motor)? [Y/n]: ")
        if go in ("n", "no", "q", "quit"):
            print("no confirmation step: try the gains later with `autotune step "
                  f"--from-result {result_path} --proposal {prop.get('name')}`", file=stdout)
            return EXIT_OK
    choice = proposal_choice(prop, pool, res.get("model") if isinstance(res.get("model"),
                                                                      dict) else None)
    ns = step_namespace(yes=args.yes, faults=args.faults, seed=args.seed)
    spec = StepSpec(max_overshoot=cfg.design.max_overshoot,
                    max_settling_time=cfg.design.max_settling_time,
                    max_time_saturated=ns.max_saturation)
    print(f"confirmation step with {choice.name}", file=stdout)
    att = run_attempts(cfg, ns, choice, spec, out_dir / "step", stdout, stdin)
    res["step"] = att.outcomes[-1].step_field() if att.outcomes else None
    res["step_attempts"] = [o.step_field() for o in att.outcomes]
    res["step_end_reason"] = att.end_reason
    res["step_sessions"] = [str(p) for p in att.sessions]
    res["gains_file"] = None if att.gains_file is None else str(att.gains_file)
    path = write_result(result_path or out_dir / "result.json", res)
    print(f"result: {path}", file=stdout)
    if att.exit_code != EXIT_OK:
        print(f"autotune tune: confirmation step: {att.reason}", file=sys.stderr)
    return att.exit_code
