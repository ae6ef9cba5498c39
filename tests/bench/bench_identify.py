"""Benchmark: identification on real mechanisms, through the real relay state machine.

Each case runs the tune runner's pure path (tests/relaysim.simulate_tune: rest, direction pulse
and autotune.core.relay.RelayExperiment with the config's defaults, fed by the mock device's
plant, actuator and sensor classes), then the one analysis path (autotune.core.identify, as
the live run and `autotune analyze`), then the default proposal of autotune.core.design.propose
(through autotune.job.tune.propose_gains, as it stands).

Cases:
- the published batch: Åström and Hägglund, "Revisiting the Ziegler-Nichols step response
  method for PID control", J. Process Control 14 (2004) (parameters from memory, as in
  tests/bench/bench_analysis.py), tick Tu/100, PV noise 2 % of the target amplitude and a
  quantisation step of the same size, the config's default target amplitude (0.5) and output
  limit (30, start amplitude 7.5); each plant's gain is scaled so that the start amplitude
  gives 0.4, 1 or 2.5 times the target swing (cycling through the batch), so the first
  correction goes down, stays or goes up;
- the built-in scenarios (mock_device/scenarios: cart-wheel, mast-pan with its 3 % dead zone)
  and a slow loop (2 e^{-0.6 s} / (2.4 s + 1), 10 ms tick), all with the defaults;
- a dead zone of 10, 20 and 30 % of the relay amplitude (as it starts, the default) on the
  cart-wheel and mast-pan plants; a constant load on each; a lightly damped mode (damping 0.15) at 2, 3 and 5 times the
  cart-wheel's ultimate frequency; coarse encoders (step 5-15 % of the oscillation amplitude,
  no noise: the PV reads exactly constant at rest); a 10 Hz tick with one tick of delay.

Truth: Ku, Tu from python-control's frequency response with the exact dead time
(tests/relaysim.true_ultimate); static and velocity gain from the transfer function; Ms of the
default proposal on the TRUE plant with the tick's hold (autotune.core.robust.loop_margins,
the discrete PID at the device tick).

Columns: Ku, Tu, gain (static, or velocity for an integrating loop) and dead-zone error
(output units over the relay amplitude), first motion to the end of the relay in true Tu,
cycles, the default proposal's Ms on the true plant, warnings (short tags).
Goals (issue): Ku within 3 %, Tu within 2 %, gain within 5 %, at most 8 Tu, Ms at most 1.6.

Run: .venv/bin/python tests/bench/bench_identify.py [--quick] [--seeds N]
(--seeds N: every case on noise seeds 1..N, one row each, the worst over all; default seed 1)
"""

from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

from autotune.config import DesignConfig, RelayConfig  # noqa: E402
from autotune.core import robust  # noqa: E402
from autotune.core.identify import analysis_inputs, identify  # noqa: E402
from autotune.core.lti import DelayedTF  # noqa: E402
from autotune.core.pid import PidGains  # noqa: E402
from autotune.job.tune import propose_gains  # noqa: E402
from tests.relaysim import (  # noqa: E402
    BATCH,
    sim_record,
    simulate_tune,
    true_ultimate,
    with_mode,
)

TARGET = RelayConfig().target_amplitude
LIMIT = 30.0
START = 0.25 * LIMIT

CART = ([0.25], [0.048, 0.68, 1.0], 0.05)  # mock_device/scenarios/cart-wheel.toml
MAST = ([0.9], [0.25, 1.0, 0.0], 0.06)  # mock_device/scenarios/mast-pan.toml
SLOW = ([2.0], [2.4, 1.0], 0.6)  # the slow loop of the issue


@dataclass
class Case:
    name: str
    num: list
    den: list
    delay: float
    ts: float
    noise: float = 0.0
    resolution: float = 0.0
    deadband: float = 0.0
    load: float = 0.0
    out_delay: int = 0
    pv_window: float = 5.0


def _static(num, den) -> tuple[float | None, float | None]:
    """(static gain, velocity gain) of num/den (one of them None)."""
    if den[-1] != 0.0:
        return num[-1] / den[-1], None
    return None, num[-1] / den[-2]


def cases(quick: bool) -> list[Case]:
    out: list[Case] = []
    names = list(BATCH)[::4] if quick else list(BATCH)
    ratios = (0.4, 1.0, 2.5)
    for i, name in enumerate(names):
        num, den, delay = BATCH[name]
        ku, tu = true_ultimate(num, den, delay)
        # gain scale: the start amplitude gives ratio x the target swing (a = 4 d / (pi Ku))
        k = ratios[i % 3] * TARGET * math.pi * ku / (4.0 * START)
        out.append(Case(name, list(np.array(num) * k), den, delay, tu / 100.0,
                        noise=0.02 * TARGET, resolution=0.02 * TARGET))
    out.append(Case("cart-wheel", *CART, 0.01, noise=0.02, resolution=0.05))
    out.append(Case("mast-pan", *MAST, 0.01, noise=0.03, resolution=360 / 4096, deadband=3.0))
    out.append(Case("slow loop", *SLOW, 0.01))
    if not quick:
        for plant, pname, noise, res in ((CART, "cart", 0.02, 0.05),
                                         (MAST, "mast", 0.03, 360 / 4096)):
            for f in (0.1, 0.2, 0.3):  # of the relay amplitude as it starts (the default)
                out.append(Case(f"{pname} dz {100 * f:.0f}%", *plant, 0.01, noise=noise,
                                resolution=res, deadband=f * START))
        out.append(Case("cart load", *CART, 0.01, noise=0.02, resolution=0.05, load=5.0))
        out.append(Case("mast load", *MAST, 0.01, noise=0.03, resolution=360 / 4096,
                        load=1.0))
        for f in (2.0, 3.0, 5.0):
            out.append(Case(f"cart mode {f:g}x", *with_mode(*CART, f), 0.01, noise=0.02,
                            resolution=0.05))
        for plant, pname in ((CART, "cart"), (MAST, "mast")):
            for q in ((0.05, 0.15) if pname == "cart" else (0.1,)):
                out.append(Case(f"{pname} enc {100 * q:.0f}%", *plant, 0.01,
                                resolution=q * TARGET))
        out.append(Case("10 Hz +1 tick", *SLOW, 0.1, noise=0.01, resolution=0.01,
                        out_delay=1))
    return out


def default_ms(props, plant: DelayedTF, ts: float) -> float | None:
    d = next((p for p in props if p.get("default")), None)
    if d is None:
        return None
    g = PidGains(d["kp"], d["ki"], d["kd"])
    if not robust.is_stable(plant, g, ts=ts):
        return math.inf
    return robust.loop_margins(plant, g, ts=ts).ms


def tags(warnings) -> str:
    keys = (("dead zone", "dz"), ("no model", "nomodel"), ("third harmonic", "h3"),
            ("noise", "noise"), ("not settled", "unsettled"), ("still differ", "unsettled"),
            ("drift", "drift"), ("saturation", "sat"), ("hysteresis", "hyst"),
            ("misses", "miss"), ("unreliable", "unrel"))
    out = []
    for w in warnings:
        for k, tag in keys:
            if k in w and tag not in out:
                out.append(tag)
    return ",".join(out) or "-"


def main() -> None:
    quick = "--quick" in sys.argv
    print(f"{'case':16s} | {'Ku err':>7s} {'Tu err':>7s} {'K err':>7s} {'dz err':>7s} | "
          f"{'Tu run':>6s} {'cyc':>3s} {'end':>9s} | {'Ms':>5s} | {'model':14s} warnings")
    worst = {"ku": 0.0, "tu": 0.0, "k": 0.0, "time": 0.0, "ms": 0.0}
    fails = []
    t_all = time.perf_counter()
    n_seeds = int(sys.argv[sys.argv.index("--seeds") + 1]) if "--seeds" in sys.argv else 1
    runs = [(c, seed) for c in cases(quick) for seed in range(1, n_seeds + 1)]
    for c, seed in runs:
        row = c.name if n_seeds == 1 else f"{c.name} #{seed}"
        ku, tu = true_ultimate(c.num, c.den, c.delay)
        k_true, kv_true = _static(c.num, c.den)
        rc = RelayConfig(max_time=max(120.0, 30.0 * tu))
        sim = simulate_tune(c.num, c.den, c.delay, ts=c.ts, relay_cfg=rc, output_limit=LIMIT,
                            pv_window=c.pv_window, noise=c.noise, resolution=c.resolution,
                            deadband=c.deadband, load=c.load, out_delay=c.out_delay, seed=seed)
        exp = sim.experiment
        t_run = (sim.t[sim.phase == "relay"][-1] - sim.t_pulse) / tu
        try:
            ident = identify(analysis_inputs(sim_record(sim, rc, LIMIT)))
        except Exception as exc:  # noqa: BLE001 - a benchmark row, not a crash
            print(f"{row:16s} | analysis failed: {exc}")
            fails.append(row)
            continue
        an = ident.analysis
        e_ku, e_tu = an.ku / ku - 1, an.tu / tu - 1
        if k_true is not None:
            e_k = (ident.static_gain / k_true - 1) if ident.static_gain is not None else math.nan
        else:
            e_k = (ident.velocity_gain / kv_true - 1) if ident.velocity_gain is not None \
                else math.nan
        d_fin = exp.settings.amplitude
        e_dz = (ident.dead_zone_used - c.deadband) / d_fin
        notes: list[str] = []
        props = propose_gains(ident, DesignConfig().__dict__, LIMIT, TARGET, c.ts, notes)
        plant = DelayedTF(tuple(c.num), tuple(c.den), c.delay)
        ms = default_ms(props, plant, c.ts)
        ms_s = "-" if ms is None else ("unst" if math.isinf(ms) else f"{ms:.2f}")
        print(f"{row:16s} | {100 * e_ku:+6.2f}% {100 * e_tu:+6.2f}% {100 * e_k:+6.2f}% "
              f"{100 * e_dz:+6.2f}% | {t_run:6.2f} {len(exp.cycles):3d} "
              f"{exp.end_reason:>9s} | {ms_s:>5s} | {an.model.kind:14s} "
              f"{tags(list(ident.warnings) + notes)}")
        worst["ku"] = max(worst["ku"], abs(e_ku))
        worst["tu"] = max(worst["tu"], abs(e_tu))
        if math.isfinite(e_k):
            worst["k"] = max(worst["k"], abs(e_k))
        worst["time"] = max(worst["time"], t_run)
        if ms is not None:
            worst["ms"] = max(worst["ms"], ms)
        if exp.end_reason != "converged":
            fails.append(f"{row} ({exp.end_reason})")
    print()
    print(f"worst |error|: Ku {100 * worst['ku']:.2f}% (goal 3), Tu {100 * worst['tu']:.2f}% "
          f"(goal 2), gain {100 * worst['k']:.2f}% (goal 5); longest run {worst['time']:.2f} "
          f"Tu (goal 8); highest default Ms {worst['ms']:.2f} (goal 1.6)")
    print(f"not converged: {', '.join(fails) if fails else 'none'}")
    print(f"total time {time.perf_counter() - t_all:.0f} s")


if __name__ == "__main__":
    main()
