"""Fault table: each injected fault, how long until the host detects it and until the output is
zero (device ticks), and what the session file holds afterwards. Prints the table.

Every row is one `tune` run (in-process runner, mock device process on a pty via `--port sim`,
`--faults`), except the host-silent row (a plain Link that stops talking). Speed 10 unless
given: `python tests/bench/bench_faults.py [SPEED]`.

How the figures are read (device ticks of the cart-wheel board, 10 ms):
  onset      stuck sensor: first sample of the frozen PV; runaway: first sample outside the
             PV window; link quality: first supervised sample (the loss is there from the
             start); reset / disconnect: the last sample before the fault (the device's clock
             restarts or the port closes, so the host's wall-clock latency from that sample's
             arrival is converted with the speed); host silent: the last frame the host sent.
  detect     the host's stop request (its device time is the sample it decided on), or the
             device's Fault report for the host-silent row.
  zero       the first sample showing zero applied output (from the stop path's record).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from tempfile import TemporaryDirectory
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.config import config_from_dict  # noqa: E402
from autotune.job.job import Quiet, TuningJob, tune_request  # noqa: E402
from autotune.job.powered import PoweredRun, RunOptions  # noqa: E402
from autotune.job.tune import TuneRun  # noqa: E402
from autotune.recorder import read_session  # noqa: E402

TICK = 0.01  # s


def ticks(dt: float | None) -> str:
    return "-" if dt is None else f"{dt / TICK:.0f}"


def run(faults: str, cfg: dict[str, Any], speed: float, tmp: Path, name: str
        ) -> tuple[Any, TuneRun, Any, dict[str, float]]:
    base = {"safety": {"watchdog": 10.0}}
    for k, v in cfg.items():
        base.setdefault(k, {}).update(v)
    config = config_from_dict(base, f"{name}.toml")
    opts = RunOptions(port="sim", yes=True, out_dir=tmp / name, plant="cart-wheel",
                      speed=speed, faults=faults, keys=False)
    job = TuningJob(tune_request(config, opts), Quiet(), analyse=False)
    marks: dict[str, float] = {}
    orig = PoweredRun.request_stop

    def request_stop(self: PoweredRun, *a: Any, **k: Any) -> None:
        marks.setdefault("stop_wall", time.monotonic())
        if self.last_sample is not None:
            marks.setdefault("last_rx", self.last_sample.received_at)
        orig(self, *a, **k)

    PoweredRun.request_stop = request_stop  # type: ignore[method-assign]
    try:
        outcome = job.run()
    finally:
        PoweredRun.request_stop = orig  # type: ignore[method-assign]
    s = read_session(outcome.session_path) if outcome.session_path else None
    assert job.stages is not None
    return outcome, job.stages, s, marks


def event_t(s: Any, kind: str) -> float | None:
    for e in s.events:
        if e["kind"] == kind:
            return e.get("t")
    return None


def stopped_t(s: Any) -> float | None:
    for e in s.events:
        if e["kind"] == "stopped":
            return e.get("t_zero")
    return None


def holds(s: Any, outcome: Any) -> str:
    if s is None:
        return "no session file"
    kinds = {e["kind"] for e in s.events}
    stop = "stop confirmed" if s.end and s.end.get("stop_confirmed") else "stop NOT confirmed"
    return (f"{s.t.size} samples, end reason {s.reason}, {stop}"
            + (", stop_request event" if "stop_request" in kinds else ""))


def main() -> None:
    speed = float(sys.argv[1]) if len(sys.argv) > 1 else 10.0
    rows: list[tuple[str, str, str, str, str]] = []
    with TemporaryDirectory() as d:
        tmp = Path(d)
        host = {"connection": {"loop": "host"}, "relay": {"max_cycles": 50}}
        dev = {"connection": {"loop": "device"}, "relay": {"max_cycles": 50}}

        # stuck sensor
        o, tr, s, m = run("stuck_after=6", host, speed, tmp, "stuck")
        relay = s.phase_mask("relay") | s.phase_mask("stopping")
        pv = s.pv
        i = len(pv) - 1
        while i > 0 and pv[i - 1] == pv[-1]:
            i -= 1
        onset = s.t[i]
        rows.append(("stuck sensor (host loop)", ticks(event_t(s, "stop_request") - onset),
                     ticks(stopped_t(s) - onset if stopped_t(s) else None), o.reason,
                     holds(s, o)))
        assert relay.any()

        # runaway, host loop and device loop
        for loop, cfg in (("host", host), ("device", dev)):
            o, tr, s, m = run("unstable=0.4", cfg, speed, tmp, f"runaway-{loop}")
            pv0 = s.header["pv_start"]
            win = s.header["config"]["safety"]["pv_window"]
            out_idx = np.nonzero(np.abs(s.pv - pv0) > win)[0]
            onset = s.t[out_idx[0]] if out_idx.size else None
            zero = None
            if onset is not None:
                z = np.nonzero((s.t >= onset) & (s.out == 0.0))[0]
                zero = s.t[z[0]] - onset if z.size else None
            det = event_t(s, "stop_request")
            rows.append((f"runaway plant ({loop} loop)",
                         ticks(det - onset if det is not None and onset is not None else None),
                         ticks(zero), o.reason, holds(s, o)))

        # link quality: 2% byte corruption (about 40% of the frames) against a 20% limit
        o, tr, s, m = run("corrupt=0.02,seed=5", {**dev, "safety": {"max_frame_loss": 0.2,
                                                                    "frame_loss_window": 1.0}},
                          speed, tmp, "link-quality")
        sup = np.nonzero(s.extra["phase"] != "connect")[0]
        onset = s.t[sup[0]] if sup.size else s.t[0]
        det = event_t(s, "stop_request")
        rows.append(("2% byte corruption, limit 20%",
                     ticks(det - onset if det is not None else None),
                     ticks(stopped_t(s) - onset if stopped_t(s) else None), o.reason,
                     holds(s, o)))

        # 1% corruption under the default limit: runs on
        o, tr, s, m = run("corrupt=0.01,corrupt_rx=0.005,seed=4",
                          {"connection": {"loop": "device"},
                           "relay": {"max_cycles": 8, "min_cycles": 8}}, speed, tmp, "corrupt")
        st = tr.run.link.stats()
        rows.append((f"1% byte corruption (lost {st.seq_gaps} of "
                     f"{st.seq_gaps + st.samples_received} samples)", "not a fault", "-",
                     o.reason, holds(s, o)))

        # device reset and disconnect: wall latency from the last sample's arrival
        for faults, label in (("reset_after=4", "device reset"),
                              ("disconnect_after=4", "disconnect (pty closed)")):
            o, tr, s, m = run(faults, dev, speed, tmp, label.split()[0])
            lat = None
            if "stop_wall" in m and "last_rx" in m:
                lat = (m["stop_wall"] - m["last_rx"]) * speed
            zero = "0 (restarts idle)" if "reset" in faults else "watchdog"
            rows.append((label, ticks(lat) + f" (~{lat / speed * 1000:.0f} ms wall)"
                         if lat is not None else "-", zero, o.reason, holds(s, o)))

        # device ignoring Stop
        t0 = time.monotonic()
        o, tr, s, m = run("ignore_stop=1", {"connection": {"loop": "device"},
                                            "relay": {"max_cycles": 3, "min_cycles": 3}},
                          speed, tmp, "ignore-stop")
        ev = [e for e in s.events if e["kind"] == "stop_unconfirmed"]
        wall = time.monotonic() - m.get("stop_wall", t0)
        rows.append(("device ignores Stop",
                     f"{ev[0]['attempts'] if ev else '?'} Stop rounds, {wall:.1f} s wall",
                     "never: CUT POWER told, exit 5", o.reason, holds(s, o)))

        # host silent: the device watchdog (a Link that stops sending)
        rows.append(host_silent_row(speed))

    widths = [max(len(r[i]) for r in rows + [HEAD]) for i in range(5)]
    print(f"fault table (speed {speed:g}, cart-wheel board, 1 tick = {TICK * 1000:g} ms)")
    for r in [HEAD, tuple("-" * w for w in widths)] + rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)))


HEAD = ("fault", "detect (ticks)", "zero output (ticks)", "end reason", "session file holds")


def host_silent_row(speed: float) -> tuple[str, str, str, str, str]:
    sys.path.insert(0, str(ROOT / "tests" / "integration"))
    from conftest import start_mock_device

    from protocol.link import Link
    from protocol.messages import GetLimits, SetLimits, SetOutput, Stream

    dev = start_mock_device("cart-wheel", speed=speed)
    try:
        link = Link.open(dev.port)
        link.handshake()
        link.request(Stream(0, 1, 1))
        first = link.next_sample(timeout=2.0)
        link.request(SetLimits(0, 30.0, first.pv - 5.0, first.pv + 5.0, 0.0, 250))
        link.request(GetLimits(0))
        link.request(SetOutput(0, 2.0))
        last = link.next_sample(timeout=1.0)  # the host falls silent after this
        recs = []
        deadline = time.monotonic() + 5.0
        faults = []
        while time.monotonic() < deadline and not faults:
            r = link.next_sample(timeout=0.5)
            if r is not None:
                recs.append(r)
            faults = link.poll_faults()
        link.close()
    finally:
        dev.terminate()
    if not faults:
        return ("host silent (watchdog 250 ms)", "no fault", "-", "-", "-")
    f = faults[0]
    z = [r.t for r in recs if r.output == 0.0 and r.t >= f.t - TICK / 2]
    return ("host silent (watchdog 250 ms)", ticks(f.t - last.t),
            ticks(z[0] - last.t if z else None), f"device fault {f.name}",
            "(no session: plain Link)")


if __name__ == "__main__":
    main()
