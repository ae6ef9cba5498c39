"""`autotune check`: talk to a board without powering anything and report on the link.

Handshake and device info, round-trip time over a number of pings, the link budget (what the
sample stream needs against what the link carries, and whether a host or device loop fits),
achieved sample rate against the device tick, frames lost (and whether the cause is a stream
the link cannot carry or the wiring), and the sensor noise at rest. The output stays at zero the whole
time: the check sends Stop before and after and never sends an output, relay or PID command.
"""

from __future__ import annotations

import argparse
import contextlib
import math
import statistics
import time
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from autotune.errors import EXIT_FAILED, EXIT_LINK, EXIT_OK, EXIT_USAGE, UserError
from autotune.simdevice import SIM, start_sim_device
from protocol.budget import (
    SAMPLE_BYTES,
    check_loop_budget,
    describe_stream,
    heartbeat_rate,
    loop_budget,
)
from protocol.errors import LinkError, NakError
from protocol.link import Link, percentile
from protocol.messages import FLAG_FAULT, Stream

HELP = "check the link to a board: handshake, round-trip time, sample rate, noise (powers nothing)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--port", required=True, metavar="URL|sim",
        help="serial port: a device path, socket://HOST:PORT, rfc2217://..., loop://, or 'sim' "
             "for the built-in simulated board",
    )
    parser.add_argument("--baud", type=int, default=115200, metavar="N",
                        help="baud rate (ignored by pty and socket ports) (default: 115200)")
    parser.add_argument("--axis", type=int, default=0, metavar="N",
                        help="axis to stream (default: 0)")
    parser.add_argument("--pings", type=int, default=50, metavar="N",
                        help="round trips to time (default: 50)")
    parser.add_argument("--samples-time", type=float, default=2.0, metavar="S",
                        help="stream for S seconds of device time (default: 2)")
    parser.add_argument("--plant", default="cart-wheel", metavar="NAME",
                        help="for --port sim: scenario or plant TOML file (default: cart-wheel)")
    parser.add_argument("--speed", type=float, default=1.0, metavar="X",
                        help="for --port sim: simulated time runs X times faster (default: 1)")


@dataclass(frozen=True)
class RestStats:
    """Statistics of the PV at rest (PV units)."""

    count: int
    mean: float
    std: float
    peak_to_peak: float
    resolution: float | None  # smallest step between distinct readings; None if constant


def rest_stats(pv: list[float]) -> RestStats:
    """Mean, sample standard deviation, peak-to-peak and apparent resolution of ``pv``."""
    mean = statistics.fmean(pv)
    std = statistics.stdev(pv) if len(pv) > 1 else 0.0
    distinct = sorted(set(pv))
    steps = [b - a for a, b in zip(distinct, distinct[1:], strict=False) if b - a > 0]
    return RestStats(len(pv), mean, std, max(pv) - min(pv), min(steps) if steps else None)


def _with_port(port: str, exc: BaseException) -> str:
    text = str(exc)
    return text if port in text else f"{port}: {text}"


def _ms(x: float | None) -> str:
    return "-" if x is None else f"{x * 1000:.3f} ms"


@contextlib.contextmanager
def _resolve_port(args: argparse.Namespace) -> Iterator[str]:
    if args.port == SIM:
        with start_sim_device(args.plant, speed=args.speed) as sim:
            yield sim.url
    else:
        yield args.port


def run(args: argparse.Namespace) -> int:
    if args.pings < 1 or args.samples_time <= 0 or args.speed <= 0:
        raise UserError("--pings must be >= 1, --samples-time and --speed > 0",
                        exit_code=EXIT_USAGE)

    with _resolve_port(args) as url:
        try:
            link = Link.open(url, baudrate=args.baud, silence_timeout=None)
        except LinkError as exc:
            raise UserError(str(exc), exit_code=EXIT_LINK) from None
        try:
            return _check(link, args)
        except NakError as exc:
            raise UserError(_with_port(args.port, exc), exit_code=EXIT_FAILED) from None
        except LinkError as exc:
            raise UserError(_with_port(args.port, exc), exit_code=EXIT_LINK) from None
        finally:
            with contextlib.suppress(Exception):
                link.stop(timeout=0.5)
            link.close()


@dataclass
class StreamRun:
    """One stretch of streaming: the records of the axis, lost samples (expected from the
    device time span at ``decimation``) and rejected frames (CRC, framing, undecodable)."""

    records: list[Any]
    lost: int
    errors: tuple[int, int, int]


def _stream(link: Link, args: argparse.Namespace, info: Any, decimation: int) -> StreamRun:
    """Stream every ``decimation``-th sample for --samples-time s of device time; prints the
    rate and the losses."""

    link.drain_samples()
    before = link.stats()
    link.request(Stream(args.axis, 1, decimation))
    link.start_heartbeat()
    records: list[Any] = []
    interval = info.tick * decimation
    wall_limit = 3.0 * args.samples_time / args.speed + 2.0
    t_wall0 = time.monotonic()
    try:
        while time.monotonic() - t_wall0 < wall_limit:
            rec = link.next_sample(timeout=0.5)
            if rec is None:
                if not records and time.monotonic() - t_wall0 > 2.0:
                    break
                continue
            if rec.axis != args.axis:
                continue
            records.append(rec)
            if rec.t - records[0].t >= args.samples_time - 0.5 * interval:
                break
    finally:
        link.stop_heartbeat()
        link.request(Stream(args.axis, 0, 1))
    wall = time.monotonic() - t_wall0
    after = link.stats()
    if len(records) < 2:
        raise UserError(f"{args.port}: the device sent {len(records)} samples in {wall:.1f} s "
                        "after Stream on", exit_code=EXIT_FAILED)
    span = records[-1].t - records[0].t
    expected = round(span / interval) + 1
    lost = max(0, expected - len(records))
    rate = (len(records) - 1) / span if span > 0 else math.nan
    errors = (after.crc_errors - before.crc_errors, after.framing_errors - before.framing_errors,
              after.decode_errors - before.decode_errors)
    if decimation == 1:
        print(f"samples     {len(records)} in {span:.3f} s device time: {rate:.2f} Hz against "
              f"the tick's {1 / info.tick:g} Hz ({100 * rate * info.tick:.1f} %); device time "
              f"ran {span / wall:.2f}x the wall clock")
        print(f"lost        {lost} of {expected} samples (sequence gaps "
              f"{after.seq_gaps - before.seq_gaps}); rejected frames: {errors[0]} CRC, "
              f"{errors[1]} framing, {errors[2]} undecodable")
    return StreamRun(records, lost, errors)


def _check(link: Link, args: argparse.Namespace) -> int:
    """The check proper, on an open link; returns the exit code."""

    info = link.handshake()
    caps = [name for name, on in (("host loop", info.has_host_loop),
                                  ("device relay", info.has_device_relay),
                                  ("device PID", info.has_device_pid),
                                  ("store gains", info.has_store_gains)) if on]
    print(f"device      {info.device_name or '-'} (firmware {info.firmware or '-'}), "
          f"protocol {info.protocol_version}, boot id {info.boot_id:08x}")
    print(f"            {info.axis_count} {'axis' if info.axis_count == 1 else 'axes'}, tick "
          f"{info.tick_us / 1000:g} ms ({1e6 / info.tick_us:g} Hz), max output "
          f"{info.max_output:g}, offers: {', '.join(caps) or 'nothing'}")
    declared = f"{info.pv_resolution:g} PV units" if info.pv_resolution > 0 else "not declared"
    print(f"            PV resolution {declared}")
    if not 0 <= args.axis < info.axis_count:
        raise UserError(f"--axis {args.axis}: the device has {info.axis_count} axis(es)",
                        exit_code=EXIT_USAGE)
    if not link.stop(timeout=1.0):  # make sure nothing is powered before we listen
        raise UserError(f"{args.port}: the device did not confirm zero output; cut the power",
                        exit_code=EXIT_FAILED)

    rtts = [link.ping() for _ in range(args.pings)]
    print(f"round trip  min {_ms(min(rtts))}, median {_ms(statistics.median(rtts))}, "
          f"p99 {_ms(percentile(rtts, 99))} over {len(rtts)} pings")

    budget = loop_budget(info.tick, args.baud, "device")
    overflow = budget.full_stream + heartbeat_rate() > budget.capacity
    print(f"link        the stream needs {budget.full_stream:,.0f} B/s (a {SAMPLE_BYTES}-byte "
          f"sample every tick), the link carries {budget.capacity:,.0f} B/s at {args.baud:g} "
          f"baud (10 bits a byte; {budget.usable:,.0f} B/s usable)")
    for mode, offered in (("device", info.has_device_relay or info.has_device_pid),
                          ("host", info.has_host_loop)):
        if offered:
            ok, line = check_loop_budget(info.tick, args.baud, mode)
            print(f"            {mode} loop: {'ok' if ok else 'DOES NOT FIT'}: {line}")

    run = _stream(link, args, info, 1)
    lost, errors = run.lost, run.errors
    if lost and overflow:
        print(f"cause       the stream needs {budget.full_stream + heartbeat_rate():,.0f} B/s, the "
              f"link carries {budget.capacity:,.0f} B/s: the samples are lost because the board "
              "sends more than the line carries, not because of the wiring")
    elif lost or any(errors):
        print("cause       frames lost or rejected below the link's capacity: check the cable, "
              "connectors, baud rate and electrical noise")
    records = run.records
    if overflow and budget.decimation > 1:
        thin = _stream(link, args, info, budget.decimation)
        print(f"            with {describe_stream(budget)}, as tune and step ask for it in a "
              f"device loop: {len(thin.records)} samples, {thin.lost} lost")
        lost, errors = thin.lost, thin.errors
        records = records + thin.records
    host_only = not (info.has_device_relay or info.has_device_pid)
    nonzero = [r for r in records if r.output != 0.0]
    if nonzero:
        link.stop(timeout=1.0)
        raise UserError(f"{args.port}: the device reported a non-zero output "
                        f"({nonzero[0].output:g}) while idle; it was sent Stop, check the board",
                        exit_code=EXIT_FAILED)
    rs = rest_stats([r.pv for r in records])
    res = "none seen (constant)" if rs.resolution is None else f"{rs.resolution:.6g}"
    print(f"at rest     PV mean {rs.mean:.6g}, noise (std) {rs.std:.4g}, peak-to-peak "
          f"{rs.peak_to_peak:.4g}, apparent resolution {res} (PV units; output 0 throughout)")
    latched = any(r.flags & FLAG_FAULT for r in records)
    faults = link.poll_faults()
    problems = []
    if lost or any(errors):
        problems.append(f"{lost} samples lost, {sum(errors)} frames rejected")
    if host_only and not check_loop_budget(info.tick, args.baud, "host")[0]:
        problems.append("the board offers only the host loop, which this link cannot carry at "
                        "its tick")
    if latched or faults:
        names = ", ".join(sorted({f.name for f in faults})) or "see the board"
        problems.append(f"a fault is latched on the device ({names})")
    if problems:
        print("result      PROBLEM: " + "; ".join(problems))
        return EXIT_FAILED
    print("result      ok")
    return EXIT_OK
