"""Device and plant faults against the mock device process over a real pty (issue 8): a stuck
sensor, PV spikes, a runaway plant (host guard and the device's own limits, with the host slow
or dead), and a device that ignores Stop."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np

from autotune.errors import EXIT_FAILED, EXIT_UNSAFE
from protocol.messages import FaultCode, GetLimits, SetLimits, SetOutput, Stream
from tests.integration.test_faults_link import (
    SPEED,
    TICK,
    assert_session_complete,
    run_faulty,
)

REPO = Path(__file__).resolve().parents[2]


def test_stuck_sensor_stops_with_no_response(tmp_path: Path) -> None:
    # The sensor freezes 10 s of device time after the handshake: normally during the relay,
    # where the no-response detector must stop the run; on a machine so busy that the
    # prechecks had not ended by then, the direction pulse meets the frozen sensor instead and
    # stop the run (either way nothing runs on a dead sensor).
    outcome, tr, s = run_faulty(tmp_path, "stuck_after=10",
                                {"connection": {"loop": "host"},
                                 "relay": {"max_cycles": 60, "min_cycles": 50}})
    moving = np.nonzero(np.diff(s.pv) != 0)[0]
    frozen_from = s.t[moving[-1] + 1] if moving.size else s.t[0]
    relay_ran = np.any(s.phase_mask("relay") & (s.t < frozen_from))
    if not relay_ran:  # frozen during the rest or the pulse: the prechecks stop the run
        assert outcome.reason.startswith("precheck:"), (outcome.reason, outcome.message)
        assert outcome.stop_confirmed
        assert_session_complete(s, outcome.reason)
        return
    assert outcome.reason == "fault:no_response", (outcome.reason, outcome.message)
    assert outcome.exit_code == EXIT_FAILED
    assert outcome.stop_confirmed
    assert_session_complete(s, "fault:no_response")
    assert "no response" in s.end["message"]
    # the PV was frozen for the last samples before the stop, with the output applied
    relay = s.phase_mask("relay")
    pv, out = s.pv[relay], s.out[relay]
    assert np.ptp(pv[-20:]) == 0.0 and np.all(np.abs(out[-20:]) > 0)


def test_spikes_cause_no_false_switches(tmp_path: Path) -> None:
    # one-sample spikes of 1.0 PV units on 1% of the ticks; the relay confirms a switch over
    # two samples, so a spike neither switches it nor trips the window (5 > 1.0 + swing);
    # the target stays well above what the spikes add to the noise the rest check measures
    outcome, tr, s = run_faulty(
        tmp_path, "spike_rate=0.01,spike_size=1.0,seed=3",
        {"connection": {"loop": "host"},
         "relay": {"target_amplitude": 1.5, "confirm_samples": 2, "max_cycles": 10,
                   "min_cycles": 10}})
    assert outcome.reason in ("converged", "max_cycles"), (outcome.reason, outcome.message)
    relay = s.phase_mask("relay")
    out = s.out[relay]
    t = s.t[relay]
    # switches between the two relay levels (not the step from the bias at the start)
    sw = np.nonzero((np.diff(out) != 0) & (out[1:] != 0) & (out[:-1] != 0))[0] + 1
    halves = np.diff(t[sw])
    assert halves.size >= 10
    # a switch a spike caused is undone within a few ticks (the PV is still on the other
    # side: two samples there confirm the switch back), while the loop's own half-period is
    # about 0.2 s (cart-wheel Tu ~ 0.42 s, its TOML). A busy host lengthens half-periods but
    # does not make them that short: none lasts 5 ticks or less (device time, from the record)
    assert halves.min() > 5 * TICK + 1e-9, halves
    spikes = np.sum(np.abs(np.diff(s.pv)) > 0.7)
    assert spikes > 0  # the spikes were there


def test_runaway_host_guard_trips_within_one_tick(tmp_path: Path) -> None:
    # 2 (e^{0.4 t} - 1) PV units: past the window (5) against the relay's push the other way
    # (up to 25 out x 0.25 PV/out) within about 4.5 s, well before the relay, stalled, would
    # give up (1.4 s at each of its amplitudes: about 6 s); gentle enough over the 1 s rest
    # check that its line fit still reads the noise
    outcome, tr, s = run_faulty(tmp_path, "unstable=0.4,unstable_size=2.0",
                                {"connection": {"loop": "host"},
                                 "relay": {"max_cycles": 50, "min_cycles": 40}})
    assert outcome.reason in ("limit:pv_window", "limit:pv_rate", "fault:pv_window"), \
        (outcome.reason, outcome.message)
    assert outcome.stop_confirmed
    assert_session_complete(s, outcome.reason)
    pv0 = s.header["pv_start"]
    window = s.header["config"]["safety"]["pv_window"]
    out_of = np.nonzero(np.abs(s.pv - pv0) > window)[0]
    assert out_of.size > 0
    i = out_of[0]
    # the device zeroes the output at the very tick its PV leaves the window (it checks the
    # limits loaded before the motion); the host's stop follows. At most one tick later:
    assert s.out[i] == 0.0 or s.out[i + 1] == 0.0
    assert np.all(s.out[i + 1:] == 0.0)


def _arm_host_output(link, pv_halfwidth: float, rate_limit: float, u: float) -> float:
    link.handshake()
    link.request(Stream(0, 1, 1))
    first = link.next_sample(timeout=2.0)
    assert first is not None
    lim = SetLimits(0, 30.0, first.pv - pv_halfwidth, first.pv + pv_halfwidth, rate_limit,
                    60000)
    link.request(lim)
    back = link.request(GetLimits(0))
    assert abs(back.pv_high - lim.pv_high) < 1e-5
    link.send(SetOutput(0, u))
    return first.pv


def test_runaway_device_limits_trip_with_a_slow_host(mock_device, open_link) -> None:
    """The host loads the limits, starts the output and then does nothing (no checks, no
    commands, a 60 s watchdog): the device's own PV window stops the runaway at the tick the PV
    leaves it."""
    # a slow runaway (0.2 (exp(0.3 t) - 1) PV units: out of the window 6 s of device time after
    # the handshake), so that even a host slowed down by a busy machine powers the output first
    dev = mock_device("cart-wheel", speed=SPEED, faults="unstable=0.3,unstable_size=0.2")
    link = open_link(dev.port, speed=SPEED)
    link.start_heartbeat()
    pv0 = _arm_host_output(link, 1.0, 0.0, 2.0)
    recs = []
    deadline = time.monotonic() + 10.0
    while time.monotonic() < deadline:
        rec = link.next_sample(timeout=1.0)
        assert rec is not None
        recs.append(rec)
        if rec.fault_latched and len(recs) > 3:
            break
    # the Fault frame follows the tick's Sample on the wire: give the reader a moment for it
    faults = link.poll_faults()
    until = time.monotonic() + 1.0
    while not faults and time.monotonic() < until:
        time.sleep(0.01)
        faults = link.poll_faults()
    assert [f.code for f in faults][:1] == [FaultCode.PV_WINDOW]
    pv = np.array([r.pv for r in recs])
    out = np.array([r.output for r in recs])
    i = np.nonzero(np.abs(pv - pv0) > 1.0)[0][0]
    assert out[i] == 0.0 and np.all(out[i:] == 0.0)  # zero at the offending tick itself
    assert np.all(out[:i][-5:] != 0.0)  # powered up to it


def test_runaway_device_rate_limit_trips(mock_device, open_link) -> None:
    dev = mock_device("cart-wheel", speed=SPEED, faults="unstable=3.0,unstable_size=0.2")
    link = open_link(dev.port, speed=SPEED)
    link.start_heartbeat()
    _arm_host_output(link, 50.0, 1.0, 2.0)  # a wide window: the rate limit (1 PV/s) trips
    deadline = time.monotonic() + 10.0
    faults = []
    while time.monotonic() < deadline and not faults:
        link.next_sample(timeout=1.0)
        faults = link.poll_faults()
    assert faults and faults[0].code == FaultCode.PV_RATE


def test_runaway_device_limits_trip_with_the_host_dead(mock_device, open_link) -> None:
    """A host process sets the limits and the output, then is killed (SIGKILL): the device
    trips its PV window on its own (the watchdog is 60 s, so it is not the watchdog)."""
    dev = mock_device("cart-wheel", speed=SPEED, faults="unstable=0.5")
    script = textwrap.dedent(f"""
        import os, signal, time
        from protocol.link import Link
        from protocol.messages import GetLimits, SetLimits, SetOutput, Stream
        link = Link.open({dev.port!r})
        link.handshake()
        link.request(Stream(0, 1, 1))
        first = link.next_sample(timeout=2.0)
        link.request(SetLimits(0, 30.0, first.pv - 1.0, first.pv + 1.0, 0.0, 60000))
        link.request(GetLimits(0))
        link.request(SetOutput(0, 2.0))
        print("powered", flush=True)
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    host = subprocess.run([sys.executable, "-c", script], cwd=REPO, capture_output=True,
                          text=True, timeout=30)
    assert host.returncode == -signal.SIGKILL and "powered" in host.stdout, host.stderr
    # a new host connects later: the device reports the fault it latched meanwhile
    time.sleep(0.5)  # wall; the runaway crosses the window within ~2 s of device time
    link = open_link(dev.port, speed=SPEED)
    link.handshake()
    link.request(Stream(0, 1, 1))
    rec = link.next_sample(timeout=2.0)
    assert rec is not None and rec.fault_latched and rec.output == 0.0
    deadline = time.monotonic() + 2.0
    faults = []
    while time.monotonic() < deadline and not faults:
        faults = link.poll_faults()
        link.next_sample(timeout=0.1)
    assert faults and faults[0].code == FaultCode.PV_WINDOW
    assert os.path.exists(dev.port)


def test_device_ignoring_stop_is_zeroed_by_its_watchdog_and_said(tmp_path: Path,
                                                                 capfd) -> None:
    """The device ignores Stop: from the stop request on the host sends nothing but Stop
    frames (which do not feed the watchdog), so the device's own watchdog zeroes the output
    within one watchdog period of the request (device time, from the session record); the
    host says in capitals what happened, and the run's exit code is EXIT_UNSAFE (what
    `autotune tune` exits with)."""
    watchdog = 4.0  # device s
    outcome, tr, s = run_faulty(tmp_path, "ignore_stop=1",
                                {"connection": {"loop": "device"},
                                 "relay": {"max_cycles": 3, "min_cycles": 3},
                                 "safety": {"watchdog": watchdog}})
    assert outcome.exit_code == EXIT_UNSAFE, (outcome.reason, outcome.message)
    err = capfd.readouterr().err
    assert "THE DEVICE IGNORED STOP" in err and "CUT THE MOTOR POWER NOW" in err
    assert "ignored Stop" in outcome.message
    assert s.end is not None and s.end["exit_code"] == EXIT_UNSAFE
    stop = next(e for e in s.events if e["kind"] == "stop_request")
    done = next(e for e in s.events if e["kind"] == "stopped")
    assert done["answered"] is False and done["by_watchdog"] is True
    assert done["attempts"] >= 2  # Stop was repeated
    # the device's own account (its Fault report, in the record): it latched WATCHDOG after
    # one period of host silence, and it last heard a frame that feeds the watchdog no later
    # than the host's stop request (device time of the sample it decided on; a quarter of a
    # period allows for a busy host's reaction): from the request on, only Stop frames went out
    wd = next(f for f in done["device_faults"] if f["name"] == "watchdog")
    assert watchdog - 1e-6 <= wd["value"] <= watchdog + TICK + 1e-6
    last_heard = wd["t"] - wd["value"]
    assert last_heard - stop["t"] <= 0.25 * watchdog
    zero = s.t[(s.t >= stop["t"]) & (s.out == 0.0)]
    assert zero.size > 0 and zero[0] == done["t_zero"] and zero[0] <= wd["t"] + 1e-9
    assert np.all(s.out[s.t >= zero[0]] == 0.0)
