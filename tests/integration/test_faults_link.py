"""Link faults against the mock device process over a real pty (issue 8): corrupted and garbage
frames are counted and never acted on; the run goes on below the loss threshold and stops with
`fault:link_quality` above it; a disconnect and a device reset stop the run and are recorded.

The runner is driven in-process (`TuneRun`), the device is its own process (`--port sim`, the
tool starts it with `--faults`). Simulated time runs `SPEED` times faster than the wall clock.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from autotune.config import config_from_dict
from autotune.errors import EXIT_LINK
from autotune.job.job import JobOutcome as TuneOutcome
from autotune.job.job import run_tune
from autotune.job.powered import RunOptions
from autotune.job.tune import TuneRun
from autotune.recorder import Session, read_session

SPEED = 20.0
TICK = 0.01  # s, the cart-wheel scenario's device tick
# A generous watchdog (device time): a busy test machine may starve the host (or the device
# process) for a tenth of a second of wall clock, which is 2 s of an accelerated device.
BASE_CFG: dict[str, Any] = {"safety": {"watchdog": 10.0}}
# a relay that runs on past the faults placed 8 s of device time after the handshake (late
# enough for a slow host to have armed, whatever the load of the machine)
LONG_RELAY: dict[str, Any] = {"connection": {"loop": "device"},
                              "relay": {"max_cycles": 200, "min_cycles": 190}}


def merged(cfg: dict[str, Any]) -> dict[str, Any]:
    out = {k: dict(v) for k, v in BASE_CFG.items()}
    for section, values in cfg.items():
        out.setdefault(section, {}).update(values)
    return out


def run_faulty(tmp_path: Path, faults: str | None, cfg: dict[str, Any] | None = None, *,
               plant: str = "cart-wheel", speed: float = SPEED, port: str = "sim",
               name: str = "out") -> tuple[TuneOutcome, TuneRun, Session]:
    """One `tune` run on the simulated board with `faults`; the outcome, the runner (for its
    link counters) and the session file read back."""
    config = config_from_dict(merged(cfg or {}), "test.toml")
    opts = RunOptions(port=port, yes=True, out_dir=tmp_path / name, plant=plant, speed=speed,
                      faults=faults, keys=False)
    outcome = run_tune(config, opts, say=lambda line: None, analyse=False)
    tr = outcome.stages
    assert tr is not None, outcome
    assert outcome.session_path is not None, outcome
    return outcome, tr, read_session(outcome.session_path)


def assert_session_complete(s: Session, reason: str) -> None:
    """Header, samples in time order, an end record with the reason, the stop recorded."""
    assert s.header["type"] == "header"
    assert s.end is not None and s.end["reason"] == reason, s.end
    assert s.t.size > 0 and np.all(np.diff(s.t) > 0)
    kinds = [e["kind"] for e in s.events]
    assert "stop_request" in kinds
    assert "stopped" in kinds or "stop_unconfirmed" in kinds
    assert not s.warnings, s.warnings


def test_corruption_below_threshold_counted_and_never_acted_on(tmp_path: Path) -> None:
    # 1% of the bytes to the host get a bit flipped (about a quarter of the sample frames are
    # lost), and 0.5% of the bytes to the device: the run goes on.
    outcome, tr, s = run_faulty(
        tmp_path, "corrupt=0.01,corrupt_rx=0.005,seed=4",
        {"connection": {"loop": "device"}, "relay": {"max_cycles": 6, "min_cycles": 6}})
    assert outcome.reason in ("converged", "max_cycles"), (outcome.reason, outcome.message)
    assert outcome.stop_confirmed
    assert_session_complete(s, outcome.reason)
    st = tr.run.link.stats()
    assert st.crc_errors + st.framing_errors > 0 and st.seq_gaps > 0
    # never acted on: every sample the CRC passed is in the session file (those still queued
    # when the link closed too) and no other; its applied output is zero or one of the relay
    # levels the host sent, and its PV is a plausible value
    assert s.t.size == st.samples_received
    relay = s.phase_mask("relay")
    settings = [e["detail"] for e in s.events if e["kind"] == "relay_settings"]
    levels = {0.0}
    for ev in s.events:
        d = ev.get("detail")
        if isinstance(d, dict) and "amplitude" in d and "bias" in d:
            settings.append(d)
    # the relay's levels: bias + d (1 + a) and bias - d (1 - a), a its asymmetry
    asym = settings[0].get("asymmetry", 0.0) if settings else 0.0
    for d in settings[:1]:  # the direction pulse (bias + the start amplitude by default) may
        levels.add(round(d["bias"] + d["amplitude"], 3))  # still show as the relay starts
    for d in settings:
        a = d.get("asymmetry", asym)
        levels.add(round(d["bias"] + d["amplitude"] * (1 + a), 3))
        levels.add(round(d["bias"] - d["amplitude"] * (1 - a), 3))
    changed = [e["detail"] for e in s.events if e["kind"] in ("amplitude_raised",
                                                              "amplitude_lowered")]
    for d in changed:
        for amp in (d["from"], d["to"]):
            levels.update({round(amp * (1 + asym), 3), round(-amp * (1 - asym), 3)})
    outs = {round(float(u), 3) for u in s.out[relay]}
    assert outs <= levels, outs - levels
    assert np.all(np.abs(s.pv) < 10.0)


def test_link_quality_above_threshold_stops(tmp_path: Path) -> None:
    # 2% of the bytes corrupted is about 40% of the sample frames lost: above a 20% limit
    outcome, tr, s = run_faulty(
        tmp_path, "corrupt=0.02,seed=5",
        {"connection": {"loop": "device"},
         "safety": {"max_frame_loss": 0.2, "frame_loss_window": 1.0}})
    assert outcome.reason == "fault:link_quality", (outcome.reason, outcome.message)
    assert outcome.exit_code == EXIT_LINK
    assert outcome.stop_confirmed
    assert_session_complete(s, "fault:link_quality")
    assert "link quality" in s.end["message"]


def test_disconnect_stops_and_is_recorded(tmp_path: Path) -> None:
    outcome, tr, s = run_faulty(tmp_path, "disconnect_after=8", LONG_RELAY)
    assert outcome.reason == "fault:link_lost", (outcome.reason, outcome.message)
    assert outcome.exit_code == EXIT_LINK
    # the port is gone: zero output cannot be confirmed; the operator is told (watchdog, cut
    # power) and the session holds everything up to the loss
    assert outcome.stop_confirmed is False
    assert_session_complete(s, "fault:link_lost")
    assert s.end["stop_confirmed"] is False
    assert "CUT THE MOTOR POWER" in (tr.run.alarm or "")


def test_device_reset_detected_by_boot_id(tmp_path: Path) -> None:
    outcome, tr, s = run_faulty(tmp_path, "reset_after=8", LONG_RELAY)
    assert outcome.reason == "fault:device_reset", (outcome.reason, outcome.message)
    assert outcome.exit_code != 0
    assert_session_complete(s, "fault:device_reset")
    assert "boot id" in s.end["message"] or "restarted" in s.end["message"]
    # the samples before the reset are all there and in order; none after it is taken for
    # one of the old run (device time starts afresh at a reset)
    assert s.header["device"]["boot_id"] == tr.run.info.boot_id


def test_garbage_bursts_never_acted_on(mock_device, open_link) -> None:
    """Bursts of random bytes between the frames (3 a second of device time): the host drops
    what fails the CRC and counts it; every sample it delivers carries the output the host
    commanded (or zero), so nothing garbled was taken for a frame."""
    from protocol.errors import LinkTimeout
    from protocol.messages import GetLimits, SetLimits, SetOutput, Stop, Stream

    # speed 2: before the stream starts a reply follows a long quiet spell in which a burst
    # is likely (each burst spoils the frame after it); short, repeated Hellos get through
    speed = 2.0
    dev = mock_device("cart-wheel", speed=speed, faults="garbage=3,garbage_len=24,seed=6")
    link = open_link(dev.port, speed=speed, retries=6)
    for _ in range(40):
        try:
            link.handshake(timeout=0.05, retries=0)
            break
        except LinkTimeout:
            continue
    else:
        raise AssertionError("no handshake through the garbage")
    link.start_heartbeat()
    link.request(Stream(0, 1, 1))
    first = link.next_sample(timeout=2.0)
    assert first is not None
    link.request(SetLimits(0, 30.0, first.pv - 5.0, first.pv + 5.0, 0.0, 2000))
    link.request(GetLimits(0))
    commanded = {0.0}
    got = []
    for k in range(200):
        u = float((k % 5) - 2)  # -2..2 output units, a new value every sample
        commanded.add(u)
        link.send(SetOutput(0, u))
        rec = link.next_sample(timeout=1.0)
        assert rec is not None
        got.append(rec)
    assert link.stop(timeout=2.0)
    link.send(Stop())
    st = link.stats()
    assert st.framing_errors + st.crc_errors > 0
    assert {r.output for r in got} <= commanded
    assert all(abs(r.pv) < 10.0 for r in got)
    ts = [r.t for r in got]
    assert all(b > a for a, b in zip(ts, ts[1:], strict=False))
