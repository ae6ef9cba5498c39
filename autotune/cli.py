"""The `autotune` command line: one sub-command per verb (see autotune/commands/)."""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from autotune import __version__
from autotune.commands import VERBS
from autotune.errors import EXIT_ABORTED, UserError
from autotune.job.signals import Interrupted, routed


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="autotune",
        description="Relay-feedback PID autotuning for a motor loop over a serial link.",
    )
    parser.add_argument("--version", action="version", version=f"autotune {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True
    for verb in VERBS:
        module = importlib.import_module(f"autotune.commands.{verb}")
        p = sub.add_parser(verb, help=module.HELP, description=module.HELP)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run one verb. SIGINT, SIGTERM and SIGHUP end it with exit 3 (the README's "aborted") at
    any phase: during a powered run through its stop path, elsewhere after saving what was
    measured (see autotune.job.signals); the last stderr line says what was kept."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with routed():
            return int(args._run(args))
    except UserError as exc:
        print(f"autotune {args.verb}: {exc}", file=sys.stderr)
        return exc.exit_code
    except Interrupted as exc:
        kept = "; ".join(exc.kept) if exc.kept else "the files written so far are kept"
        print(f"autotune {args.verb}: {exc.name} received: stopped; {kept}", file=sys.stderr)
        return EXIT_ABORTED
    except KeyboardInterrupt:
        print(f"autotune {args.verb}: interrupted: stopped", file=sys.stderr)
        return EXIT_ABORTED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
