"""Benchmark of protocol.Link against the mock device paced at 115200 baud (prints figures).

1. Throughput: several threads keep Ping requests in flight, so the device's paced output
   (the Pongs) is the bottleneck; the figure is wire bytes received per second as a fraction of
   the baud-limited maximum (8N1: baud / 10 bytes per second). Goal: >= 0.9.
2. Host turnaround in a host loop: the device streams samples, the host answers every sample
   with a SetOutput (a relay on the PV); turnaround is from the sample's bytes being read
   (SampleRecord.received_at) to the SetOutput frame written. Goal: p99 < 2 ms.

Run: .venv/bin/python tests/bench/bench_link.py [--baud 115200] [--seconds 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import threading
import time
from typing import Any

from autotune.simdevice import start_sim_device
from protocol import messages as m
from protocol.errors import LinkError
from protocol.link import Link, SampleRecord, percentile


def bench_throughput(url: str, baud: int, seconds: float, threads: int) -> dict[str, float]:
    with Link.open(url, baudrate=baud, reply_timeout=2.0, silence_timeout=None) as link:
        link.handshake()
        stop = threading.Event()
        done = [0]

        def worker() -> None:
            while not stop.is_set():
                try:
                    link.request(m.Ping(1, 2), retries=0)
                    done[0] += 1
                except LinkError:
                    return

        pool = [threading.Thread(target=worker, daemon=True) for _ in range(threads)]
        for t in pool:
            t.start()
        time.sleep(0.5)  # reach steady state
        s0, t0 = link.stats(), time.monotonic()
        time.sleep(seconds)
        s1, t1 = link.stats(), time.monotonic()
        stop.set()
        for t in pool:
            t.join(timeout=5.0)
        rate = (s1.bytes_received - s0.bytes_received) / (t1 - t0)
        frames = (s1.frames_good - s0.frames_good) / (t1 - t0)
        return {
            "bytes_per_s": rate,
            "max_bytes_per_s": baud / 10,
            "fraction": rate / (baud / 10),
            "frames_per_s": frames,
            "errors": float(s1.errors),
            "timeouts": float(s1.timeouts),
        }


def bench_turnaround(url: str, baud: int, seconds: float, in_reader: bool) -> dict[str, Any]:
    """Host loop; ``in_reader``: answer in the reader thread (set_sample_handler), else from
    a consumer thread through the sample queue (next_sample)."""
    with Link.open(url, baudrate=baud, silence_timeout=None) as link:
        link.handshake()
        link.request(m.SetLimits(0, 50.0, -1e6, 1e6, 0.0, 500))
        link.start_heartbeat()
        turnaround: list[float] = []
        state = {"high": True}

        def answer(rec: SampleRecord) -> None:
            # a two-level relay around PV = 1.0 (the answer depends on the sample)
            if rec.pv > 1.05:
                state["high"] = False
            elif rec.pv < 0.95:
                state["high"] = True
            link.send(m.SetOutput(0, 20.0 if state["high"] else -20.0))
            turnaround.append(time.monotonic() - rec.received_at)

        if in_reader:
            link.set_sample_handler(answer)
        link.request(m.Stream(0, 1, 1))
        t_end = time.monotonic() + seconds
        try:
            while time.monotonic() < t_end:
                rec = link.next_sample(timeout=1.0)
                if rec is None:
                    raise RuntimeError("no samples")
                if not in_reader:
                    answer(rec)
        finally:
            link.set_sample_handler(None)
            stopped = link.stop()
        stats = link.stats()
        faults = sorted({f.name for f in link.poll_faults()})
        nak = link.last_nak
        return {
            "faults": ",".join(faults) or "none",  # type: ignore[dict-item]
            "last_nak": "none" if nak is None else str(nak[1]),  # type: ignore[dict-item]
            "samples": float(len(turnaround)),
            "p50_ms": 1e3 * statistics.median(turnaround),
            "p99_ms": 1e3 * percentile(turnaround, 99),
            "max_ms": 1e3 * max(turnaround),
            "over_2ms": float(sum(x > 2e-3 for x in turnaround)),
            "seq_gaps": float(stats.seq_gaps),
            "naks": float(stats.naks),
            "stopped": float(stopped),
        }


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baud", type=int, default=115200)
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--threads", type=int, default=12)
    ap.add_argument("--speed", type=float, default=2.0, help="device speed for the host loop")
    a = ap.parse_args()
    load = os.getloadavg()
    print(f"machine: {os.cpu_count()} CPUs, load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} "
          "(the turnaround tail is sensitive to other processes)")
    with start_sim_device("cart-wheel", speed=1.0, baud=a.baud) as sim:
        th = bench_throughput(sim.url, a.baud, a.seconds, a.threads)
    print(f"throughput: {th['bytes_per_s']:.0f} B/s of {th['max_bytes_per_s']:.0f} B/s "
          f"baud-limited maximum at {a.baud} baud = {th['fraction']:.3f} "
          f"(goal >= 0.9); {th['frames_per_s']:.0f} frames/s, rejected frames "
          f"{th['errors']:.0f}, timeouts {th['timeouts']:.0f}")
    for in_reader, how in ((False, "consumer thread, next_sample"),
                           (True, "reader thread, set_sample_handler")):
        with start_sim_device("cart-wheel", speed=a.speed, baud=a.baud) as sim:
            tu = bench_turnaround(sim.url, a.baud, a.seconds, in_reader)
        print(f"host turnaround ({how}; sample read -> SetOutput written) over "
              f"{tu['samples']:.0f} samples at {100 * a.speed:g} samples/s: p50 "
              f"{tu['p50_ms']:.3f} ms, p99 {tu['p99_ms']:.3f} ms (goal < 2 ms), max "
              f"{tu['max_ms']:.3f} ms, {tu['over_2ms']:.0f} over 2 ms; sequence gaps {tu['seq_gaps']:.0f}, naks "
              f"{tu['naks']:.0f}, stop confirmed {bool(tu['stopped'])}, faults {tu['faults']}"
              + (f", last nak {tu['last_nak']}" if tu["naks"] else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
