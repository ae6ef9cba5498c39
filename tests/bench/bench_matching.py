"""Benchmark: per-loop gains that make two wheel loops alike (autotune.core.matching).

Pairs of wheel models (INVENTED DEMO DATA: the drive-base scenario's two wheels,
mock_device/scenarios/drive-base.toml, and spread variants of the left one; see
tests/test_matching.py). For each pair: every loop's own default design and its predicted rise
time, the spread of those, then the matched per-loop gains: predicted rise time, overshoot, Ms,
the Ms target each was designed for, and the rise time and Ms computed independently with
python-control (the continuous stand-in with a Padé dead time, control.step_info; the sampled
loop's max |1/(1 + L)|, tests/pctruth.py), with both spreads.

Goal (issue 17): the matched predicted rise times within 5 % of each other.
Run: .venv/bin/python tests/bench/bench_matching.py
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.core import design  # noqa: E402
from autotune.core.design import Condition  # noqa: E402
from autotune.core.lti import DelayedTF  # noqa: E402
from autotune.core.matching import match_rise_times, rise_spread  # noqa: E402
from tests.pctruth import sampled_ms  # noqa: E402
from tests.test_matching import (  # noqa: E402
    LEFT,
    RIGHT,
    SLOW30,
    SLUGGISH,
    SPEC,
    TS,
    WEAK,
    _pc_rise_time,
)

PAIRS: dict[str, tuple[DelayedTF, DelayedTF]] = {
    "drive-base": (LEFT, RIGHT),
    "30% slower": (LEFT, SLOW30),
    "half gain": (WEAK, RIGHT),
    "2x dead time": (LEFT, DelayedTF(LEFT.num, LEFT.den, 0.08)),
    "sluggish (impossible)": (LEFT, SLUGGISH),
}


def main() -> None:
    for label, (a, b) in PAIRS.items():
        t0 = time.perf_counter()
        conds = [Condition("left", a), Condition("right", b)]
        own = []
        for c in conds:
            res = design.design_proposals([c], SPEC)
            p = res.get(res.default) if res.default else None
            own.append(math.nan if p is None else float(p.predicted["rise_time"]))
        m = match_rise_times(conds, SPEC)
        dt = time.perf_counter() - t0
        print(f"\n{label}: own defaults rise {own[0]:.3f} / {own[1]:.3f} s, spread "
              f"{rise_spread(own) * 100:.1f} %  ({dt:.1f} s)")
        truth = []
        for lp, plant in zip(m.loops, (a, b), strict=True):
            p = lp.proposal
            if p is None:
                print(f"  {lp.name}: no design")
                continue
            t_pc = _pc_rise_time(plant, p.gains, p.setpoint_weight)
            ms_pc = sampled_ms(plant.num, plant.den, plant.delay, p.gains, TS)
            truth.append(t_pc)
            tag = "ref" if lp.reference else ("ok " if lp.matched else "no ")
            print(f"  {lp.name:5s} {tag} {p.name:18s} kp {p.gains.kp:7.3f} ki {p.gains.ki:7.2f}"
                  f" kd {p.gains.kd:6.3f} b {p.setpoint_weight:4.2f}  rise {lp.rise_time:.3f} s"
                  f" (pc {t_pc:.3f})  os {lp.overshoot:5.1f} %  Ms {lp.ms:.3f} (pc {ms_pc:.3f},"
                  f" designed {lp.ms_design:.3g})")
        print(f"  matched {m.matched}: predicted spread {m.spread * 100:.1f} %, python-control "
              f"spread {rise_spread(truth) * 100:.1f} %")
        print(f"  {m.reason}")


if __name__ == "__main__":
    main()
