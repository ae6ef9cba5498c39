"""Session reading: time per million samples and peak memory, and `autotune analyze` on a large
session (issue 18: a 200 MB session analysed in under a minute, memory proportional to the
samples kept).

`python tests/bench/bench_session_read.py [MB]` (default 200) writes a session file of about MB
megabytes in a temporary directory: a header as `tune` writes it, 300 rest samples, then the
relay records of a simulated cart-wheel-like loop (tests/relaysim.py, invented demo data)
repeated, with the keys the runner records (phase, flags, state). Each measurement runs in a
fresh process, so that its peak resident memory (ru_maxrss) is its own:
  read all      recorder.read_session(path)
  read relay    recorder.read_session(path, phases={"relay", "precheck:rest"}) (what analyze does)
  read rest     recorder.read_session(path, phases={"precheck:rest"}): a few samples kept of
                the whole file, so its memory is the reader's own floor
  analyze       `autotune analyze SESSION --json ...` end to end
Peak memory is shown with the interpreter and its imports (numpy, scipy) included; the
"baseline" row is a process that only imports them.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path
from tempfile import TemporaryDirectory

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.config import Config  # noqa: E402
from tests.relaysim import run_relay  # noqa: E402

TICK = 0.01


def write_session(path: Path, megabytes: float) -> int:
    """A session of about `megabytes` MB; returns the number of samples."""
    rec = run_relay([0.25], [0.048, 0.68, 1.0], 0.05, ts=TICK, amplitude=20.0, hysteresis=0.05,
                    n_cycles=20, period_guess=0.42, noise=0.02, resolution=0.05, seed=3)
    t0 = rec.t[rec.out != 0][0]
    relay = [(float(p), float(u)) for t, p, u in zip(rec.t, rec.pv, rec.out, strict=True)
             if t >= t0]
    header = {"type": "header", "format": "autotune-session", "version": 1,
              "tool": "autotune bench", "verb": "tune", "config": Config().to_dict(),
              "device": {"name": "bench", "tick": TICK}, "sign": 1, "pv_start": 0.0,
              "loop_mode": "device"}
    target = megabytes * 1e6
    n = 0
    with open(path, "w", encoding="utf-8") as f:
        f.write(json.dumps(header) + "\n")
        f.write(json.dumps({"type": "event", "t": 0.0, "kind": "precheck", "check": "rest",
                            "detail": {"noise_std": 0.02}}) + "\n")
        for k in range(300):
            f.write(f'{{"type":"sample","t":{k * TICK:.2f},"pv":{0.02 * ((k * 7) % 5 - 2):.4f},'
                    f'"out":0.0,"sp":0.0,"phase":"precheck:rest","flags":195}}\n')
            n += 1
        f.write(json.dumps({"type": "event", "t": 3.0, "kind": "relay_settings",
                            "detail": {"centre": 0.0, "bias": 0.0, "amplitude": 20.0,
                                       "hysteresis": 0.05}}) + "\n")
        k = 300
        while f.tell() < target:
            for pv, u in relay:
                f.write(f'{{"type":"sample","t":{k * TICK:.2f},"pv":{pv:.6g},"out":{u:.6g},'
                        f'"sp":0.0,"phase":"relay","flags":451,"state":{1 if u > 0 else -1}}}\n')
                k += 1
                n += 1
        f.write(json.dumps({"type": "end", "reason": "max_time"}) + "\n")
    return n


def measure(code: list[str]) -> tuple[float, float, str]:
    """Wall seconds and peak RSS (MB) of a fresh process running `code`, and its stdout."""
    t0 = time.monotonic()
    proc = subprocess.Popen(code, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.monotonic() - t0
    out = proc.stdout.read() if proc.stdout else ""
    err = proc.stderr.read() if proc.stderr else ""
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(code)} failed: {err}")
    return wall, usage.ru_maxrss / 1024.0, out


def reader(path: Path, phases: str) -> list[str]:
    return [sys.executable, "-c",
            "import sys, time\n"
            "from autotune.recorder import read_session\n"
            "t0 = time.monotonic()\n"
            f"s = read_session({str(path)!r}, phases={phases})\n"
            "print(time.monotonic() - t0, s.t.size)\n"]


def main() -> None:
    mb = float(sys.argv[1]) if len(sys.argv) > 1 else 200.0
    if resource.getrlimit(resource.RLIMIT_AS)[0] != resource.RLIM_INFINITY:
        print("note: an address-space limit is set")
    with TemporaryDirectory() as d:
        path = Path(d) / "session.jsonl"
        t0 = time.monotonic()
        n = write_session(path, mb)
        size = path.stat().st_size / 1e6
        print(f"session: {size:.0f} MB, {n / 1e6:.2f} M samples (written in "
              f"{time.monotonic() - t0:.0f} s)")
        base_wall, base_rss, _ = measure([sys.executable, "-c",
                                          "import numpy, scipy.signal, autotune.recorder"])
        rows = [("baseline (imports only)", "-", "-", f"{base_rss:.0f}")]
        for label, phases in (("read all", "None"),
                              ("read relay + rest (analyze)", "('relay', 'precheck:rest')"),
                              ("read rest only", "('precheck:rest',)")):
            wall, rss, out = measure(reader(path, phases))
            secs, kept = out.split()
            rows.append((label, f"{float(secs) / (n / 1e6):.2f} s", f"{int(kept) / 1e6:.2f} M",
                         f"{rss:.0f}"))
        wall, rss, _ = measure([sys.executable, "-m", "autotune", "analyze", str(path),
                                "--json", str(Path(d) / "result.json")])
        rows.append(("autotune analyze (total)", f"{wall:.1f} s in all", "-", f"{rss:.0f}"))
        head = ("step", "time per M samples", "samples kept", "peak RSS MB")
        widths = [max(len(r[i]) for r in [*rows, head]) for i in range(4)]
        for r in [head, tuple("-" * w for w in widths), *rows]:
            print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)))
        result = json.loads((Path(d) / "result.json").read_text())
        print(f"analyze: Ku {result['ultimate_gain']:.4g}, Tu {result['ultimate_period']:.4g} s, "
              f"cycles used {result['cycles_used']}")


if __name__ == "__main__":
    main()
