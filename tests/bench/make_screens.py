"""Regenerate the README screenshots in docs/screens/ from a demo run (simulated board).

    .venv/bin/python tests/bench/make_screens.py [--plant cart-wheel] [--speed 5] [--out DIR]
        [--check DIR]

Runs `autotune demo --yes` in-process on an in-memory terminal, keeps the last frame of each
screen and writes them with rich's SVG export. With --check DIR it also writes every captured
screen as plain text at 80x24 and 120x40 (the smallest and a large terminal) into DIR, to look
at. Prints the files written. Asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.commands import demo  # noqa: E402
from autotune.job.requests import BoardRequest, JobRequest  # noqa: E402
from autotune.simdevice import SIM  # noqa: E402
from autotune.ui.export import export_svgs, export_texts, record_demo  # noqa: E402

CHECK_SIZES = ((80, 24), (120, 40))


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--plant", default="cart-wheel", choices=demo.PLANTS)
    p.add_argument("--speed", type=float, default=5.0)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--width", type=int, default=100)
    p.add_argument("--height", type=int, default=32)
    p.add_argument("--out", default=str(ROOT / "docs" / "screens"))
    p.add_argument("--check", metavar="DIR", help="also write every screen as text at "
                   "80x24 and 120x40 into DIR")
    args = p.parse_args()
    ns = argparse.Namespace(plant=args.plant, config=None, loop=None, speed=args.speed,
                            seed=args.seed)
    cfg = demo.build_config(ns)
    out = Path(args.out).resolve()
    here = Path.cwd()
    with tempfile.TemporaryDirectory() as tmp:
        os.chdir(tmp)  # the finish screen then shows the short relative paths a user would see
        req = JobRequest(cfg=cfg, board=BoardRequest(SIM, args.plant, args.speed, None,
                                                     args.seed),
                         out_dir=Path("autotune-sessions/demo"), verb="demo", yes=True)
        try:
            code, captured = record_demo(req, args.width, args.height)
        finally:
            os.chdir(here)
    print(f"demo exit code {code}; screens captured: {', '.join(sorted(captured))}")
    for path in export_svgs(captured, out, args.width, args.height):
        print(f"wrote {path.relative_to(ROOT) if path.is_relative_to(ROOT) else path}")
    if args.check:
        for w, h in CHECK_SIZES:
            for path in export_texts(captured, Path(args.check), w, h):
                print(f"wrote {path}")
    return 0 if code == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
