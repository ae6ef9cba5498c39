"""Benchmark: one design for several conditions of one loop, against designs for each alone.

Plants (INVENTED DEMO DATA, the cart-wheel loop and variants of it): `cart-wheel` (K 0.25
rad/s per %, lags 0.6 and 0.08 s, dead time 0.05 s), `cart-wheel-loaded` (K 0.18, lags 1.0 and
0.08 s, 0.075 s) and two test variants with the same lags as `cart-wheel`: `slip` (K 0.125, 2x
lower gain, dead time 0.075 s, 1.5x) and `grip` (K 0.5, 2x higher gain, dead time 0.075 s).
Each is recorded as a real session: `autotune tune --port sim` runs the mock device process
behind a real pty, the relay converges, the session is written; then the sessions are read and
analysed offline (autotune.commands.sessions.load_session) as `autotune analyze` does.

For every set of sessions: the default proposal designed on each session alone and the joint
default (`autotune.core.design.design_proposals` on all of them), each evaluated on every TRUE
plant: Ms of the sampled loop (python-control: ZOH-sampled plant, the DiscretePid, see
tests/pctruth.py), and the joint default's ki against the joint optimum computed on the true
plants (same structure, autotune.core.robust.robust_pid_set/robust_pi_set, its own Ms checked
with python-control).

Goal (issue): joint default Ms <= 1.5 on every true plant, ki >= 0.85 of the joint optimum.
Run: .venv/bin/python tests/bench/bench_conditions.py [--seed N]
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.commands.sessions import load_session  # noqa: E402
from autotune.core import design, robust  # noqa: E402
from autotune.core.lti import DelayedTF  # noqa: E402
from tests.pctruth import sampled_ms  # noqa: E402

TS = 0.01
SPEC = design.DesignSpec(ts=TS, output_limit=30.0, step_size=0.5)  # the tune defaults' spec

PLANTS: dict[str, tuple[str, DelayedTF]] = {
    "cart-wheel": ("cart-wheel", DelayedTF((0.25,), (0.048, 0.68, 1.0), 0.05)),
    "loaded": ("cart-wheel-loaded", DelayedTF((0.18,), (0.08, 1.08, 1.0), 0.075)),
    "slip": ("", DelayedTF((0.125,), (0.048, 0.68, 1.0), 0.075)),
    "grip": ("", DelayedTF((0.5,), (0.048, 0.68, 1.0), 0.075)),
}
# within the range (gain up to 2x, dead time up to 1.5x apart); the last set spans
# 2.8x in gain (loaded against grip), beyond it, for information
SETS = (("cart-wheel", "loaded"), ("cart-wheel", "slip"), ("cart-wheel", "grip"),
        ("cart-wheel", "loaded", "slip"), ("cart-wheel", "loaded", "grip"))
IN_RANGE = SETS[:4]


def plant_file(directory: Path, name: str, plant: DelayedTF) -> str:
    """A plant TOML for a variant: the cart-wheel sensor and tick, this transfer function."""
    path = directory / f"{name}.toml"
    path.write_text(
        f"[plant]\nnum = {list(plant.num)}\nden = {list(plant.den)}\ndelay = {plant.delay}\n"
        "[sensor]\nnoise = 0.02\nresolution = 0.05\n[device]\nperiod = 0.01\n"
        f'name = "{name}"\n', encoding="utf-8")
    return str(path)


def record(directory: Path, name: str, seed: int) -> str:
    """Run `autotune tune --port sim` on the plant; returns the session path. The board's
    watchdog is 2 s of device time (a busy machine at --speed 10 must not trip it)."""
    scenario, plant = PLANTS[name]
    where = scenario or plant_file(directory, name, plant)
    out = directory / name
    config = directory / "watchdog.toml"
    config.write_text("[safety]\nwatchdog = 2.0\n", encoding="utf-8")
    proc = subprocess.run([sys.executable, "-m", "autotune", "tune", "--port", "sim", "--plant",
                           where, "--config", str(config), "--yes", "--no-step", "--speed",
                           "10", "--seed", str(seed), "--out", str(out)],
                          capture_output=True, text=True, timeout=300, cwd=ROOT)
    if proc.returncode != 0:
        raise RuntimeError(f"tune on {name} failed: {proc.stderr[-500:]}")
    return str(out / "session.jsonl")


def true_ms(name: str, g) -> float:
    p = PLANTS[name][1]
    return sampled_ms(p.num, p.den, p.delay, g, TS, SPEC.n)


def main() -> None:
    seed = int(sys.argv[sys.argv.index("--seed") + 1]) if "--seed" in sys.argv else 2
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        t0 = time.perf_counter()
        conds = {}
        for name in PLANTS:
            s = load_session(record(d, name, seed), name)
            assert s.condition is not None, f"{name}: {s.figures.reason}"
            conds[name] = s.condition
        print(f"recorded and analysed {len(conds)} sessions in "
              f"{time.perf_counter() - t0:.1f} s (seed {seed})")
    print("identification (relative error against the true plant):")
    for name, c in conds.items():
        ku_t, tu_t = PLANTS[name][1].ultimate_point()
        print(f"  {name:<11} Ku {100 * (c.ku / ku_t - 1):+5.1f} %  Tu {100 * (c.tu / tu_t - 1):+5.1f} %"
              f"  model static gain {100 * (c.model.static_gain / PLANTS[name][1].static_gain - 1):+5.0f} %"
              f"  model {'fits' if c.model_valid else 'does NOT fit'} the measured points")
    single = {}
    for name, c in conds.items():
        res = design.design_proposals([c], SPEC)
        single[name] = res.get(res.default) if res.default else None
    ok_all = True
    for names in SETS:
        print(f"\nsessions {' + '.join(names)}"
              f"{'' if names in IN_RANGE else ' (beyond the 2x gain range)'}")
        hdr = f"  {'design':<32}{'ki':>8}" + "".join(f"{'Ms on ' + n:>19}" for n in names)
        print(hdr)
        for n in names:
            p = single[n]
            if p is None:
                print(f"  {'alone on ' + n:<32}   (no default)")
                continue
            cells = "".join(f"{true_ms(m, p.gains):>19.3f}" for m in names)
            print(f"  {'alone on ' + n + ' ' + p.name:<32}{p.gains.ki:>8.2f}{cells}")
        t1 = time.process_time()
        res = design.design_proposals([conds[n] for n in names], SPEC)
        cpu = time.process_time() - t1
        if res.default is None:
            print(f"  joint: no default ({res.note})")
            ok_all = False
            continue
        p = res.get(res.default)
        assert p is not None
        ms = [true_ms(m, p.gains) for m in names]
        truths = [PLANTS[m][1] for m in names]
        if p.gains.kd > 0:
            opt = robust.robust_pid_set(truths, (), SPEC.ms_target, SPEC.n, TS)
        else:
            opt = robust.robust_pi_set(truths, (), SPEC.ms_target, TS)
        opt_ms = max(true_ms(m, opt.gains) for m in names)
        frac = p.gains.ki / opt.gains.ki
        good = max(ms) <= 1.5 and frac >= 0.85
        if names in IN_RANGE:
            ok_all &= good
        cells = "".join(f"{v:>19.3f}" for v in ms)
        print(f"  {'joint ' + p.name:<32}{p.gains.ki:>8.2f}{cells}")
        print(f"  {'joint optimum on the truth':<32}{opt.gains.ki:>8.2f}  (its Ms {opt_ms:.3f})")
        print(f"  joint default ki / optimum {frac:.3f}; max Ms {max(ms):.3f}; design "
              f"{cpu:.2f} s cpu -> {'ok' if good else 'MISSES the goal'}")
    print(f"\ngoal (Ms <= 1.5 on every true plant, ki >= 0.85 of the joint optimum): "
          f"{'met on every set in range' if ok_all else 'NOT met on every set in range'}")


if __name__ == "__main__":
    main()
