"""The pieces of the stop path one by one (issue 18): Stop on the board (idempotent, never
feeds the watchdog), the link's stop-only mode and its one-sequence-number Stop, the checks
that run on every sample (where the safety guard really runs in a powered run), the signal
router. The mock device state machine is driven directly; the link runs over pyserial's
loop:// port with scripted replies (as in test_link_unit)."""

from __future__ import annotations

import math
import os
import signal
import threading
import time
from dataclasses import dataclass

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.config import config_from_dict
from autotune.core.safety import SafetyGuard, SafetyLimits
from autotune.job import signals
from autotune.job.checks import SampleChecks
from autotune.job.powered import PoweredRun, RunOptions
from autotune.job.stop import stop_deadline
from mock_device.faults import FaultSpec, parse_fault_spec
from protocol import messages as m
from protocol.errors import StopOnly
from protocol.framing import FrameDecoder
from protocol.link import Link
from tests.test_device_unit import Host, make_device, of_type, samples


# ------------------------------------------------------------------ the board
def test_stop_is_idempotent_and_answered_every_time() -> None:
    """The same Stop resent (same seq) is answered each time; the device stays idle."""
    host = Host(make_device())
    host.armed()
    host.one(m.Stream(0, 1, 1))
    host.one(m.SetOutput(0, 10.0))
    host.tick(3)
    for _ in range(3):
        assert host.dev.handle(m.Stop(), 7) == []  # answered after the next tick
        out = host.tick()
        assert [o.seq for o in of_type(out, m.Stopped)] == [7]
        assert samples(out)[-1].output == 0.0
    assert host.dev.mode == m.Mode.IDLE and host.dev.fault is None


def test_stop_frames_do_not_feed_the_watchdog() -> None:
    """A board that ignores Stop still latches its watchdog one period after the host's last
    other frame, however many Stop frames keep coming (SPEC section 8)."""
    host = Host(make_device(faults=FaultSpec(ignore_stop=True)))
    host.armed(watchdog_ms=100)  # 10 ticks of 10 ms
    host.one(m.Stream(0, 1, 1))
    host.one(m.SetOutput(0, 5.0))
    stop_frame = m.encode(m.Stop(), 9)
    dec = FrameDecoder()
    (raw,) = dec.feed(stop_frame)
    outs = []
    for _ in range(15):
        host.dev.handle_frame(raw)  # a Stop every tick, ignored
        outs += host.tick()
    s = samples(outs)
    zero = [k for k, x in enumerate(s) if x.output == 0.0]
    assert zero and zero[0] <= 10  # the watchdog period plus the latching tick at most
    assert of_type(outs, m.Fault)[0].msg.code == m.FaultCode.WATCHDOG


def test_no_ack_fault_acts_without_answering() -> None:
    spec = parse_fault_spec("no_ack=StartRelay")
    host = Host(make_device(faults=spec))
    host.armed()
    (raw,) = FrameDecoder().feed(m.encode(m.StartRelay(0, 0.0, 0.0, 2.0, 2.0, 0.0), 5))
    assert host.dev.handle_frame(raw) == []
    assert host.dev.mode == m.Mode.RELAY
    (raw,) = FrameDecoder().feed(m.encode(m.Ping(1, 2), 6))
    assert [type(o.msg) for o in host.dev.handle_frame(raw)] == [m.Pong]


# ------------------------------------------------------------------ the link
@pytest.fixture
def link():
    lk = Link("loop://", reply_timeout=0.1, retries=2, silence_timeout=None)
    yield lk
    lk.close()


def test_stop_only_refuses_every_frame_but_stop(link: Link) -> None:
    link.enter_stop_only()
    with pytest.raises(StopOnly):
        link.send(m.SetOutput(0, 1.0))
    with pytest.raises(StopOnly):
        link.send(m.Ping(0, 0))
    link.send(m.Stop())  # still goes out
    link.leave_stop_only()
    link.send(m.SetOutput(0, 0.0))


def test_heartbeat_falls_silent_in_stop_only_mode() -> None:
    master, slave = os.openpty()
    lk = Link(os.ttyname(slave), heartbeat_interval=0.01, silence_timeout=None)
    os.set_blocking(master, False)

    def pings(seconds: float) -> int:
        dec, n, end = FrameDecoder(), 0, time.monotonic() + seconds
        while time.monotonic() < end:
            try:
                n += sum(f.type == m.Ping.TYPE for f in dec.feed(os.read(master, 4096)))
            except BlockingIOError:
                time.sleep(0.005)
        return n

    try:
        lk.start_heartbeat()
        assert pings(0.3) > 3
        lk.enter_stop_only()
        pings(0.05)  # a Ping already written before the switch may still be in the pty
        assert pings(0.3) == 0
        lk.leave_stop_only()
        assert pings(0.3) > 3
    finally:
        lk.close()
        os.close(master)
        os.close(slave)


def test_stop_resends_one_sequence_number_and_takes_a_late_reply(link: Link) -> None:
    """Stop is resent with the same seq; a Stopped reply later than the resend interval still
    matches (the slow-link case)."""
    seq = link._seq
    sent: list[int] = []
    orig = link._write

    def spy(frame: bytes, msg_type: int) -> float:
        if msg_type == m.Stop.TYPE:
            sent.append(FrameDecoder().feed(frame)[0].seq)
        return orig(frame, msg_type)

    link._write = spy  # type: ignore[method-assign]

    def late_reply() -> None:
        time.sleep(0.35)  # later than several resends of 0.05 s
        link._ser.write(m.encode(m.Stopped(), seq))

    threading.Thread(target=late_reply, daemon=True).start()
    assert link.stop(timeout=2.0, resend=0.05) is True
    assert len(sent) >= 3 and set(sent) == {seq}


def test_stop_deadline_grows_with_the_round_trip_and_the_watchdog() -> None:
    base = stop_deadline(0.0, 0.01, 1.0, 0.5)
    assert stop_deadline(0.3, 0.01, 1.0, 0.5) == pytest.approx(base + 1.2)
    assert stop_deadline(0.0, 0.01, 10.0, 0.5) == pytest.approx(1.0 + 0.054)
    assert base >= 0.5 + 1.0  # always long enough for the watchdog to act


# ------------------------------------------------------------------ the checks
@dataclass(frozen=True)
class Rec:
    t: float
    pv: float
    output: float
    fault_latched: bool = False


finite = st.floats(min_value=-50.0, max_value=50.0, allow_nan=False)
any_pv = st.one_of(finite, finite, finite, st.sampled_from([math.nan, math.inf]))


@settings(max_examples=200, deadline=None)
@given(window=st.floats(1.0, 20.0), out_limit=st.floats(1.0, 50.0),
       duration=st.floats(0.05, 2.0),
       seq=st.lists(st.tuples(st.floats(0.001, 0.05), any_pv, finite), min_size=1, max_size=80))
def test_a_violation_always_stops_the_run_at_its_sample(window, out_limit, duration,
                                                        seq) -> None:
    """Where the guard runs in a powered run (SampleChecks, called on every sample as it
    arrives): the first sample that breaks a limit gives the stop cause with that sample's
    time, and every later sample gives the same cause (the run cannot go on)."""
    limits = SafetyLimits(output_limit=out_limit, pv_window=window, max_duration=duration,
                          max_sample_gap=0.04)
    checks = SampleChecks(SafetyGuard(limits, 0.0, 0.0), None)
    reference = SafetyGuard(limits, 0.0, 0.0)
    t = 0.0
    first = None
    for k, (dt, pv, out) in enumerate(seq):
        t += dt
        cause = checks.check(Rec(t, pv, out))
        v = reference.check(t, pv, out)
        if first is None and v is not None:
            first = (k, t, f"limit:{v.which}")
        if first is None:
            assert cause is None
        else:
            assert cause is not None
            assert (cause.reason, cause.t) == (first[2], first[1])
            assert cause.exit_code != 0


def test_device_fault_flag_stops_after_host_limits() -> None:
    limits = SafetyLimits(output_limit=10.0, pv_window=1.0)
    checks = SampleChecks(SafetyGuard(limits, 0.0, 0.0), None)
    assert checks.check(Rec(0.01, 0.1, 1.0)) is None
    # the same sample beyond the window and latched: the host's limit names the cause
    cause = checks.check(Rec(0.02, 1.5, 0.0, fault_latched=True))
    assert cause is not None and cause.reason == "limit:pv_window"
    checks = SampleChecks(SafetyGuard(limits, 0.0, 0.0), None)
    cause = checks.check(Rec(0.01, 0.5, 0.0, fault_latched=True))
    assert cause is not None and cause.reason == "fault:latched"


# ------------------------------------------------------------------ signals
def test_signal_outside_a_run_raises_interrupted_after_saving() -> None:
    saved: list[str] = []
    with (pytest.raises(signals.Interrupted) as err, signals.routed(),
          signals.keep_on_interrupt(lambda: saved.append("x") or "result.json kept")):
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(1.0)  # the handler runs here
    assert saved == ["x"]
    assert err.value.name == "SIGTERM" and err.value.kept == ["result.json kept"]
    assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL  # restored


def test_signal_during_a_run_is_a_stop_request() -> None:
    got: list[str] = []
    with signals.routed(), signals.diverted(lambda name: got.append(name) or True):
        os.kill(os.getpid(), signal.SIGINT)
        time.sleep(0.2)
    assert got == ["SIGINT"]


def test_signal_not_consumed_by_the_run_ends_the_verb_afterwards() -> None:
    with pytest.raises(signals.Interrupted), signals.routed():
        with signals.diverted(lambda name: False):  # already stopping for another reason
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(0.2)
        raise AssertionError("not reached: the block's end raises")  # pragma: no cover


@pytest.mark.timeout(30)
def test_a_signal_while_the_main_thread_holds_the_locks_does_not_hang() -> None:
    """A signal's handler runs between two bytecodes of the main thread, which may be inside
    the link's write lock (sending an output), the recorder's or the run's own stop lock: the
    handler takes none of them, and the stop request follows once they are free."""
    run = PoweredRun(config_from_dict({}, "t.toml"), RunOptions(port="loop://", keys=False))
    run.link = Link("loop://", reply_timeout=0.1, retries=0, silence_timeout=None)
    try:
        with signals.routed(), run._signal_watcher(), signals.diverted(run._on_signal):
            with run.link._write_lock, run._stop_lock, run.recording._lock:
                os.kill(os.getpid(), signal.SIGINT)
                deadline = time.monotonic() + 0.3
                while time.monotonic() < deadline:  # the handler runs in here
                    time.sleep(0.01)
                assert not run.stop_requested  # the watcher waits for the locks
            deadline = time.monotonic() + 5.0
            while not run.stop_requested and time.monotonic() < deadline:
                time.sleep(0.01)
            assert run.stop_requested and run.link.stop_only
    finally:
        run.link.close()
