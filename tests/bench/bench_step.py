"""Confirmation step on a spread of loops: predicted, measured and reference figures, verdict.

Runs every loop of tests/steploops.py (and the deliberately too aggressive one) on the mock
device process, as the tests do, and prints one row a loop: the gains' name, the predicted
overshoot (autotune.core.design), the measured one and python-control's for the same sampled
loop (control.sample_system, control.step_response, control.step_info), the same three for the
settling time on the band used, the band, the record length, the verdict, and the device and
wall seconds the loop took.

    .venv/bin/python tests/bench/bench_step.py [--speed X] [NAME ...]
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.steploops import AGGRESSIVE, LOOPS, reference_figures, run_loop  # noqa: E402


def _f(v: object, nd: int = 1) -> str:
    if not isinstance(v, int | float) or isinstance(v, bool) or not math.isfinite(v):
        return "-"
    return f"{v:.{nd}f}"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("names", nargs="*", help="loops to run (default: all)")
    ap.add_argument("--speed", type=float, help="mock device speed (default: each loop's)")
    args = ap.parse_args(argv)
    loops = [lp for lp in (*LOOPS, AGGRESSIVE) if not args.names or lp.name in args.names]
    head = (f"{'loop':<17}{'gains':<11}{'Tu s':>6}  {'overshoot %: pred':>17}{'meas':>6}"
            f"{'ref':>6}  {'settling s: pred':>16}{'meas':>6}{'ref':>6}  {'band':<9}"
            f"{'record s':>8}  {'verdict':<34}{'dev s':>6}{'wall s':>7}")
    print(head)
    print("-" * len(head))
    for loop in loops:
        with tempfile.TemporaryDirectory() as d:
            w0 = time.monotonic()
            r = run_loop(loop, Path(d), speed=args.speed)
            wall = time.monotonic() - w0
            o = r.outcome
            if o is None:
                print(f"{loop.name:<17}stopped before the step: {r.run.outcome.message}")
                continue
            m = o.metrics
            ref = reference_figures(loop, o, o.plan.timeout)
            v = o.verdict
            verdict = (v.reason if v is not None and not v.passed else
                       "pass" if v is not None else o.message or o.end_reason)
            band = o.band_choice.label if o.band_choice is not None else "-"
            if o.band_choice is not None and o.band_choice.window > 1:
                band += f"/{o.band_choice.window}"
            pred_st = o.predicted_on_band.get("settling_time")
            dev = o.t[-1] - o.t[0] if o.t else 0.0
            print(f"{loop.name:<17}{r.name:<11}{r.tu:>6.2f}  "
                  f"{_f(r.predicted.get('overshoot')):>17}{_f(m.overshoot if m else None):>6}"
                  f"{_f(ref['overshoot']):>6}  {_f(pred_st, 2):>16}"
                  f"{_f(m.settling_time if m else None, 2):>6}{_f(ref['settling_time'], 2):>6}"
                  f"  {band:<9}{o.plan.timeout:>8.1f}  {verdict[:34]:<34}{dev:>6.0f}"
                  f"{wall:>7.1f}")
    print("\nref: python-control's sampled closed loop for the same gains and hold, on the same "
          "band;\nband/N: the PV smoothed over N samples; record: planned seconds after the "
          "step.")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
