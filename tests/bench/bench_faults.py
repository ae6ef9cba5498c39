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
The host's own failures (issue 18), read from the stop request on (device ticks):
  full disk       the session file hits a file-size limit (RLIMIT_FSIZE) during the relay: the
                  stop sequence still runs whole; zero output from the request.
  0.3 s latency   every frame from the board 0.3 s late (wall): Stop resent with one sequence
                  number, the late Stopped reply counts; no alarm.
  ignored Stop    the board ignores Stop: from the request on the host sends only Stop frames
                  (which do not feed the watchdog), so the board's watchdog zeroes the output;
                  goal: at most one watchdog period after the request.
  during a retry  the checks decide while the runner waits for a reply: "age" is how far the
                  sample decided on lags the newest sample the host had (goal: at most one tick).
"""

from __future__ import annotations

import contextlib
import resource
import signal
import sys
import time
from pathlib import Path
from tempfile import TemporaryDirectory
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from autotune.config import config_from_dict  # noqa: E402
from autotune.errors import UserError  # noqa: E402
from autotune.job.job import Quiet, TuningJob, tune_request  # noqa: E402
from autotune.job.powered import PoweredRun, RunOptions  # noqa: E402
from autotune.job.tune import TuneRun  # noqa: E402
from autotune.recorder import read_session  # noqa: E402

TICK = 0.01  # s


def ticks(dt: float | None) -> str:
    return "-" if dt is None else f"{dt / TICK:.0f}"


def run(faults: str, cfg: dict[str, Any], speed: float, tmp: Path, name: str
        ) -> tuple[Any, TuneRun, Any, dict[str, float]]:
    base: dict[str, Any] = {"safety": {"watchdog": 10.0}}
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
    s = None
    if outcome.session_path:
        with contextlib.suppress(Exception):
            s = read_session(outcome.session_path)
    return outcome, job.stages, s, marks


@contextlib.contextmanager
def file_size_limit(nbytes: int) -> Any:
    """Writes beyond `nbytes` fail with EFBIG (a full disk) while the block runs."""
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    old = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (nbytes, hard))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        signal.signal(signal.SIGXFSZ, old)


def stop_figures(tr: TuneRun) -> tuple[float | None, Any]:
    """(device time of the stop request, the StopOutcome) from the runner itself (the file
    may not hold them)."""
    req = tr.run._stop_req if tr.run is not None else None
    return (None if req is None else req.t), (tr.run.outcome.stop if tr.run else None)


def host_rows(speed: float, tmp: Path) -> list[tuple[str, str, str, str, str]]:
    """The rows of the host's own failures (issue 18)."""
    rows = []
    # full disk: 48 kB for the session file (filled during the relay)
    with file_size_limit(48 * 1024):
        o, tr, s, m = run("", {"connection": {"loop": "device"},
                               "relay": {"max_cycles": 60, "min_cycles": 55}},
                          speed, tmp, "full-disk")
    t_req, stop = stop_figures(tr)
    zero = None if stop is None or stop.t_zero is None or t_req is None else stop.t_zero - t_req
    rows.append(("full disk (session file at 48 kB)", "at the failed write",
                 ticks(zero) + (" (confirmed)" if stop and stop.confirmed else " NOT CONFIRMED"),
                 o.reason, f"cut at {s.t.size if s else '?'} samples; said: "
                 f"{tr.run.outcome.recording_error}; board ended: "
                 f"{tr.run.sim.process.poll() is not None}"))
    # 0.3 s of wall-clock latency on every frame from the board
    o, tr, s, m = run(f"latency={0.3 * speed:g}", {"connection": {"loop": "device"},
                                                   "relay": {"max_cycles": 3, "min_cycles": 3}},
                      speed, tmp, "latency")
    t_req, stop = stop_figures(tr)
    rtt = tr.run.link.stats().rtt_median
    rows.append((f"0.3 s latency (rtt {rtt:.2f} s wall)", "-",
                 ticks(stop.t_zero - t_req if stop and stop.t_zero is not None and t_req
                       is not None else None) + f" (samples {ticks(0.3 * speed)} late), "
                 f"{stop.attempts} Stop frame(s), {stop.seconds:.2f} s wall",
                 o.reason + (f", ALARM: {tr.run.alarm}" if tr.run.alarm else ", no alarm"),
                 holds(s, o)))
    # a board that ignores Stop: its watchdog (3 s device: long enough for a busy host to
    # feed it during the run) zeroes it
    wd = 3.0
    o, tr, s, m = run("ignore_stop=1", {"connection": {"loop": "device"},
                                        "relay": {"max_cycles": 3, "min_cycles": 3},
                                        "safety": {"watchdog": wd}}, speed, tmp, "ignore-stop")
    stop = tr.run.outcome.stop
    ev = next((e for e in s.events if e["kind"] == "stop_request"), None) if s else None
    after = (None if stop is None or stop.t_zero is None or ev is None
             else stop.t_zero - ev["t_at_request"])
    rows.append((f"device ignores Stop (watchdog {wd:g} s)",
                 f"{stop.attempts} Stop frames, none answered",
                 "-" if after is None else f"{after:.3f} s = {after / wd:.2f} watchdog "
                 f"periods ({ticks(after)} ticks)", f"{o.reason}, exit {o.exit_code}",
                 holds(s, o)))
    # the checks while a request is retried: 5% corruption, and a board that never answers
    # StartRelay (the duration limit falls during its retries)
    for faults, cfg, label in (
            ("corrupt=0.03,corrupt_rx=0.01,seed=7", {"connection": {"loop": "device"}},
             "3% corruption"),
            ("no_ack=StartRelay", {"connection": {"loop": "device"},
                                   "safety": {"max_duration": 6.0}},
             "StartRelay unanswered, duration limit")):
        try:
            o, tr, s, m = run(faults, cfg, speed, tmp, "retry-" + label.split()[0])
        except UserError as exc:  # the line too bad to arm: said, not a row
            rows.append((f"{label} (during a retry)", "-", "-", f"not armed: {exc}", "-"))
            continue
        ev = next((e for e in s.events if e["kind"] == "stop_request"), None) if s else None
        age = None if ev is None or "t_newest" not in ev else ev["t_newest"] - ev["t"]
        during = ev.get("during_request") if ev else None
        rows.append((f"{label} (during a retry)",
                     f"age {ticks(age)} ticks" + (f", during {during}" if during else
                                                   ", between requests"),
                     ticks(stopped_t(s) - ev["t"] if ev and stopped_t(s) else None),
                     o.reason, holds(s, o)))
    return rows


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
        long_relay = {"connection": {"loop": "device"},
                      "relay": {"max_cycles": 200, "min_cycles": 190}}
        for faults, label in (("reset_after=8", "device reset"),
                              ("disconnect_after=8", "disconnect (pty closed)")):
            o, tr, s, m = run(faults, long_relay, speed, tmp, label.split()[0])
            lat = None
            if "stop_wall" in m and "last_rx" in m:
                lat = (m["stop_wall"] - m["last_rx"]) * speed
            zero = "0 (restarts idle)" if "reset" in faults else "watchdog"
            rows.append((label, ticks(lat) + f" (~{lat / speed * 1000:.0f} ms wall)"
                         if lat is not None else "-", zero, o.reason, holds(s, o)))

        rows += host_rows(speed, tmp)

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
