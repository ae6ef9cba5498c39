"""Benchmark: relay analysis over the test batch at three noise levels (prints a table).

Columns: relative error of the classic (plain describing function) and the refined ultimate
gain and period against the truth (python-control frequency response with the exact dead time,
see tests/relaysim.true_ultimate), the reported uncertainty, the winning model, the cycles
from the relay start until the last two agreed (converged_cycles), and the analysis time. Then the analysis
time of a 10,000-sample session (goal: under 50 ms). Asserts nothing.

Run: .venv/bin/python tests/bench/bench_analysis.py [--quick]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

from autotune.core.analysis import analyse_relay, extract_cycles  # noqa: E402
from autotune.core.convergence import cycles_to_converge  # noqa: E402
from tests.relaysim import BATCH, batch_run  # noqa: E402

NOISE_LEVELS = (0.0, 0.02, 0.05)


def _rest_noise(rec) -> float:
    """PV noise as the rest precheck measures it: sensor noise and quantisation together."""
    return float(np.sqrt(rec.noise**2 + rec.resolution**2 / 12))


def main() -> None:
    quick = "--quick" in sys.argv
    names = list(BATCH)[::3] if quick else list(BATCH)
    print(f"{'plant':13s} {'noise':>5s} | {'Ku cls':>7s} {'Ku ref':>7s} {'unc':>6s} | "
          f"{'Tu cls':>7s} {'Tu ref':>7s} {'unc':>6s} | {'model':14s} {'conv':>4s} {'ms':>5s}")
    worst: dict[float, list[float]] = {nf: [0.0, 0.0, 0.0, 0.0] for nf in NOISE_LEVELS}
    for name in names:
        for nf in NOISE_LEVELS:
            rec, ku, tu = batch_run(name, nf)
            t0 = time.perf_counter()
            an = analyse_relay(rec.t, rec.pv, rec.out, rec.settings, ts=rec.ts,
                               noise_std=_rest_noise(rec) if nf else None)
            ms = 1e3 * (time.perf_counter() - t0)
            # cycles from the relay start until the last two agree within 2% (+ the widening
            # for noise that analyse_relay applies)
            every = extract_cycles(rec.t, rec.pv, rec.out, drop_transient=0)
            tol = max(0.02, 6 * an.noise_std / an.amplitude / np.sqrt(every[-1].i_end -
                                                                     every[-1].i_start))
            conv = cycles_to_converge(every, tol)
            e = (an.ku_df / ku - 1, an.ku / ku - 1, an.tu_df / tu - 1, an.tu / tu - 1)
            worst[nf] = [max(w, abs(x)) for w, x in zip(worst[nf], e, strict=True)]
            print(f"{name:13s} {100 * nf:4.0f}% | {100 * e[0]:+6.1f}% {100 * e[1]:+6.2f}% "
                  f"{100 * an.uncertainty['ultimate_gain']:5.1f}% | {100 * e[2]:+6.1f}% "
                  f"{100 * e[3]:+6.2f}% {100 * an.uncertainty['ultimate_period']:5.1f}% | "
                  f"{an.model.kind:14s} {conv if conv else '-':>4} {ms:5.0f}")
    print()
    for nf, w in worst.items():
        print(f"worst |error| at noise {100 * nf:.0f}%: Ku classic {100 * w[0]:.1f}%, refined "
              f"{100 * w[1]:.2f}%; Tu classic {100 * w[2]:.1f}%, refined {100 * w[3]:.2f}%")
    # a 10,000-sample session
    rec, ku, tu = batch_run("sopdt T=1", 0.02, cycles=95)
    n = rec.t.size
    times = []
    for _ in range(7):
        t0 = time.perf_counter()
        analyse_relay(rec.t, rec.pv, rec.out, rec.settings, ts=rec.ts,
                      noise_std=_rest_noise(rec))
        times.append(time.perf_counter() - t0)
    print(f"\nanalysis of a {n}-sample session: {1e3 * min(times):.0f} ms (best of 7, median "
          f"{1e3 * float(np.median(times)):.0f} ms; goal 50 ms)")
    print(f"numpy {np.__version__}")


if __name__ == "__main__":
    main()
