"""Benchmark: gain design from an identified model, evaluated on the true plant.

Test batch: Åström and Hägglund, "Revisiting the Ziegler-Nichols step response method for PID
control", J. Process Control 14 (2004); plant families and parameters as recalled from the
paper (from memory): FOPDT e^-s/(1+sT), SOPDT e^-s/(1+sT)^2, 1/(s+1)^n, four-pole lags
1/((1+s)(1+as)(1+a^2 s)(1+a^3 s)), integrator+lag+dead time e^-s/(s(1+sT)),
non-minimum phase (1-as)/(s+1)^3.

For each plant: a simulated relay experiment (tests/relaysim.py, no noise) analysed by
autotune.core.analysis.analyse_relay gives Ku, Tu and the fitted model (autotune.core.model.fit_models);
if that path fails for a plant, the "identified" model is instead the best FOPDT/SOPDT/
integrator-lag least-squares fit of the true frequency response around and below the ultimate
frequency plus the static gain (marked "fr-fit" in the table; --fr-fit forces it). All proposals are designed from the identified model
(continuous design, Ms target 1.4) and evaluated on the TRUE plant: Ms of every proposal, and
ki of the default proposal as a fraction of the true robust optimum of the same structure
(robust-pid or robust-pi, designed on the true plant).

Goal: default proposal Ms in 1.3..1.55 on every plant, ki >= 0.85 of the optimum.

Second table, designs held to the measured points: plants with a lightly damped mode (damping
0.15) at 2, 3 and 5 times the ultimate frequency of a first-order lag with dead time (a
compliant belt or a flexible mast), which the fitted models cannot hold. The relay run gives the
measured points (harmonics, autotune.core.conditions.measured_points); the default designed on
the model alone and the one also held to the points (autotune.core.design.design_proposals),
each with its Ms on the TRUE plant.

Third table, the detune sequence (autotune.core.design.detune_design): from the default, each
step re-designs at the next lower Ms target (1.4 -> 1.25 -> 1.15, then the derivative
removed), beside the old "all gains x 0.7"; Ms on the true plant and predicted overshoot.

Run: .venv/bin/python tests/bench/bench_design.py [--quick] [--fr-fit]
(--quick: every third plant; --fr-fit: use the frequency-response fit for every plant)
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

import numpy as np
from scipy import optimize

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.core import design, robust  # noqa: E402
from autotune.core.lti import DelayedTF, fopdt, integrator_lag, sopdt  # noqa: E402


def batch() -> list[tuple[str, DelayedTF]]:
    out: list[tuple[str, DelayedTF]] = []
    for t in (0.1, 0.5, 1.0, 2.0, 5.0, 10.0, 100.0):
        out.append((f"fopdt T={t:g}", fopdt(1.0, t, 1.0)))
    for t in (0.1, 0.5, 1.0, 2.0, 5.0, 10.0):
        out.append((f"sopdt T={t:g}", sopdt(1.0, t, t, 1.0)))
    for n in (3, 4, 6, 8):
        out.append((f"1/(s+1)^{n}", DelayedTF((1.0,), tuple(np.poly([-1.0] * n)))))
    for a in (0.2, 0.5, 0.8):
        den = np.poly([-1.0, -1 / a, -1 / a**2, -1 / a**3]) * a**6
        out.append((f"4-pole a={a:g}", DelayedTF((1.0,), tuple(den / den[-1]))))
    for t in (0.1, 1.0, 2.0, 5.0):
        out.append((f"int-lag T={t:g}", integrator_lag(1.0, t, 1.0)))
    for a in (0.1, 0.5, 1.0, 2.0):
        out.append((f"(1-{a:g}s)/(s+1)^3", DelayedTF((-a, 1.0), tuple(np.poly([-1.0] * 3)))))
    return out


# ------------------------------------------------------------------ identification


def identify_relay(plant: DelayedTF) -> tuple[float, float, DelayedTF, str]:
    """Ku, Tu and model from a simulated relay run through the project's analysis."""
    from autotune.core.analysis import analyse_relay
    from tests.relaysim import run_relay

    ku, tu = plant.ultimate_point()
    ts = tu / 100.0
    # integrating plants: relay around a centre, bias 0 works (the loop is closed by the relay)
    rec = run_relay(plant.num, plant.den, plant.delay, ts=ts, amplitude=1.0, hysteresis=0.0,
                    n_cycles=12, period_guess=tu)
    a = analyse_relay(rec.t, rec.pv, rec.out, rec.settings, ts=ts, noise_std=0.0)
    return a.ku, a.tu, a.model.tf, f"relay:{a.model.kind}"


def _fr_candidates(x: np.ndarray, kind: str) -> DelayedTF:
    e = np.exp(x)
    if kind == "fopdt":
        return fopdt(e[0], e[1], e[2])
    if kind == "sopdt":
        return sopdt(e[0], e[1], e[2], e[3])
    return integrator_lag(e[0], e[1], e[2])


def identify_fr(plant: DelayedTF) -> tuple[float, float, DelayedTF, str]:
    """Least-squares fit (relative error) of the true frequency response on 0.3..1.2 w180
    and of its static (or velocity) gain, as a biased relay would measure it."""
    ku, tu = plant.ultimate_point()
    w180 = 2 * math.pi / tu
    w = np.linspace(0.3, 1.2, 40) * w180
    g = plant.freq_response(w)
    kinds = ["integrator_lag"] if plant.is_integrating else ["fopdt", "sopdt"]
    best = None
    for kind in kinds:
        k0 = plant.velocity_gain if plant.is_integrating else plant.static_gain
        starts = {"fopdt": [k0, 1.0 / w180, 0.5 / w180], "sopdt": [k0, 1.0 / w180, 0.3 / w180,
                                                                    0.5 / w180],
                  "integrator_lag": [k0, 0.5 / w180, 0.5 / w180]}[kind]
        for scale in (0.3, 1.0, 3.0):
            x0 = np.log(np.array(starts) * np.r_[1.0, [scale] * (len(starts) - 1)])

            def res(x: np.ndarray, kind: str = kind, k0: float = k0) -> np.ndarray:
                m = _fr_candidates(x, kind)
                r = m.freq_response(w) / g - 1.0
                km = m.velocity_gain if m.is_integrating else m.static_gain
                return np.r_[r.real, r.imag, km / k0 - 1.0]

            sol = optimize.least_squares(res, x0)
            if best is None or sol.cost < best[0]:
                best = (sol.cost, _fr_candidates(sol.x, kind), kind)
    assert best is not None
    return ku, tu, best[1], f"fr-fit:{best[2]}"


# ------------------------------------------------------------------ main


def main() -> None:
    quick = "--quick" in sys.argv
    force_fr = "--fr-fit" in sys.argv  # skip the relay+analysis path
    plants = batch()[::3] if quick else batch()
    rows = []
    names = ["robust-pid", "robust-pi", "zn-p", "zn-pi", "zn-pid", "tl-pi", "tl-pid", "ah-pm",
             "simc-pi", "simc-pid", "amigo-pi", "amigo-pid"]
    t_design: list[float] = []
    c_design: list[float] = []
    c_opt: list[float] = []
    for label, plant in plants:
        try:
            if force_fr:
                raise RuntimeError("--fr-fit")
            ku, tu, model, how = identify_relay(plant)
        except Exception as exc:  # the analysis path is another helper's; fall back
            ku, tu, model, how = identify_fr(plant)
            if not force_fr:
                how += f" ({type(exc).__name__})"
        t0, c0 = time.perf_counter(), time.process_time()
        props = design.propose(ku, tu, model, design.DesignSpec())
        t_design.append(time.perf_counter() - t0)
        c_design.append(time.process_time() - c0)
        ms_true = {p.name: robust.loop_margins(plant, p.gains).ms
                   if robust.is_stable(plant, p.gains) else math.inf for p in props}
        dflt = next(p for p in props if p.default)
        t1, c1 = time.perf_counter(), time.process_time()
        opt = robust.robust_pid(plant) if dflt.name == "robust-pid" else robust.robust_pi(plant)
        t_opt = time.perf_counter() - t1
        c_opt.append(time.process_time() - c1)
        frac = dflt.gains.ki / opt.gains.ki
        rows.append((label, how, dflt.name, ms_true, frac, t_opt))
    # table
    short = {n: n.replace("robust-", "r-").replace("amigo-", "am-") for n in names}
    head = f"{'plant':20s} {'identified':22s} {'default':10s} {'Ms':>5s} {'ki/opt':>6s} | " + \
        " ".join(f"{short[n]:>7s}" for n in names)
    print("Ms on the TRUE plant of every proposal designed from the identified model "
          "(inf = unstable)")
    print(head)
    print("-" * len(head))
    ok_ms = ok_ki = 0
    for label, how, dname, ms_true, frac, _ in rows:
        ms_d = ms_true[dname]
        ok_ms += 1.3 <= ms_d <= 1.55
        ok_ki += frac >= 0.85
        cells = " ".join(f"{ms_true.get(n, math.nan):7.2f}" for n in names)
        print(f"{label:20s} {how[:22]:22s} {dname:10s} {ms_d:5.2f} {frac:6.2f} | {cells}")
    print("-" * len(head))
    print("nan = rule not offered for that model (SIMC PID needs a second lag; SIMC and "
          "AMIGO need a recognised FOPDT/SOPDT/integrator-lag model)")
    print(f"default Ms in 1.3..1.55: {ok_ms}/{len(rows)}; ki >= 0.85 of optimum: "
          f"{ok_ki}/{len(rows)}")
    print(f"propose() per model (all proposals with predictions): wall median "
          f"{np.median(t_design):.3f} s, max {np.max(t_design):.3f} s; CPU median "
          f"{np.median(c_design):.3f} s, max {np.max(c_design):.3f} s")
    t_opts = [r[5] for r in rows]
    print(f"robust optimum (true plant) per model: wall median {np.median(t_opts):.3f} s, "
          f"max {np.max(t_opts):.3f} s; CPU median {np.median(c_opt):.3f} s, "
          f"max {np.max(c_opt):.3f} s")


def resonant(ratio: float, damping: float = 0.15) -> DelayedTF:
    """e^-0.2s/(s + 1) times a lightly damped mode wn^2/(s^2 + 2 z wn s + wn^2) at `ratio`
    times the lag's ultimate frequency."""
    base = fopdt(1.0, 1.0, 0.2)
    _, tu = base.ultimate_point()
    wn = ratio * 2 * math.pi / tu
    den = np.polymul([1.0, 1.0], [1.0, 2 * damping * wn, wn * wn])
    return DelayedTF((wn * wn,), tuple(den), 0.2)


def constrained_table() -> None:
    from autotune.core.analysis import analyse_relay
    from autotune.core.conditions import measured_points, model_fits_points
    from tests.relaysim import run_relay

    print("\nDesigns held to the measured points: Ms on the TRUE plant (continuous loop, "
          "Ms target 1.4)")
    head = (f"{'plant':22s} {'model':8s} {'fits':>4s} {'points (rad/s)':>20s} | "
            f"{'model only: Ms at w':>26s} | {'held to points: Ms at w':>26s}")
    print(head)
    print("-" * len(head))
    for ratio in (2.0, 3.0, 5.0):
        plant = resonant(ratio)
        up = plant.ultimate_point()
        assert up is not None
        ku, tu = up
        ts = tu / 100.0
        rec = run_relay(plant.num, plant.den, plant.delay, ts=ts, amplitude=1.0,
                        hysteresis=0.0, n_cycles=12, period_guess=tu)
        a = analyse_relay(rec.t, rec.pv, rec.out, rec.settings, ts=ts, noise_std=0.0)
        pts = measured_points(a.fourier)
        fits = model_fits_points(a.model.tf, pts)
        cells = []
        for use in ((), pts):
            res = design.design_proposals(
                [design.Condition("relay", a.model.tf, a.ku, a.tu, tuple(use),
                                  fits or not use)], design.DesignSpec())
            p = res.get(res.default) if res.default else None
            if p is None:
                cells.append(f"{'no default':>16s}")
                continue
            m = robust.loop_margins(plant, p.gains)
            ms = m.ms if robust.is_stable(plant, p.gains) else math.inf
            cells.append(f"{p.name:>10s} {ms:6.2f} at {m.w_ms:5.2f}")
        where = ",".join(f"{q.w:.3g}" for q in pts)
        print(f"{f'mode at {ratio:g} w180':22s} {a.model.kind:8s} {'yes' if fits else 'no':>4s} "
              f"{where:>20s} | {cells[0]:>26s} | {cells[1]:>26s}")
    print("Ms at w: the true loop's peak sensitivity and its frequency (rad/s). Where it lies "
          "below the lowest measured point the model's low-frequency gain is wrong, which the "
          "harmonics cannot show (the static gain measurement can).")


def detune_table(plants: list[tuple[str, DelayedTF]]) -> None:
    print("\nDetune sequence (a new design each step) against all gains x 0.7: Ms on the TRUE "
          "plant / predicted overshoot % (b chosen for 10 %)")
    for label, plant in plants:
        up = plant.ultimate_point()
        assert up is not None
        spec = design.DesignSpec(ts=up[1] / 100.0)
        cond = design.Condition(label, plant, up[0], up[1])
        res = design.design_proposals([cond], spec)
        cur = res.get(res.default) if res.default else None
        steps = []
        while cur is not None and len(steps) < 6:
            ms = robust.loop_margins(plant, cur.gains, spec.n, spec.ts).ms
            steps.append(f"{cur.name} {ms:.2f}/{float(cur.predicted['overshoot']):.1f} "
                         f"ki {cur.gains.ki:.3g}")
            cur = design.detune_design([cond], cur, spec)
        d0 = res.get(res.default) if res.default else None
        if d0 is not None:
            g07 = d0.gains.scaled(0.7)
            old = design.evaluate([cond], "x0.7", g07, spec)
            steps.append(f"[x0.7 {float(old.predicted['ms']):.2f}/"
                         f"{float(old.predicted['overshoot']):.1f} ki {g07.ki:.3g}]")
        print(f"  {label:16s} " + "  ->  ".join(steps))


if __name__ == "__main__":
    main()
    constrained_table()
    detune_table([(label, p) for label, p in batch() if label in (
        "fopdt T=1", "sopdt T=2", "1/(s+1)^4", "int-lag T=1", "(1-0.5s)/(s+1)^3")])
