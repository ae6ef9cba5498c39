"""``python -m mock_device``: run the simulated controller board as its own process.

    python -m mock_device --plant FILE.toml|cart-wheel|mast-pan (--pty | --tcp HOST:PORT)
                          [--speed X] [--baud N] [--faults SPEC] [--seed N] [--period S]
                          [--protocol-version N] [--exit-with-parent]

The first stdout line is the port to open (pty path or socket:// URL); logs go to stderr.
Exit codes: 0 after SIGTERM/SIGINT or a disconnect fault, 2 for bad arguments or plant file.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import re
import sys

from mock_device import faults as faults_module
from mock_device.config import SCENARIOS, MockConfigError, load_config
from mock_device.device import Device
from mock_device.faults import FaultSpecError, LinkFaults, parse_fault_spec
from mock_device.server import (
    PtyTransport,
    Server,
    TcpTransport,
    Transport,
    install_signal_handlers,
)
from protocol import messages as m


def _host_port(text: str) -> tuple[str, int]:
    host, sep, port = text.rpartition(":")
    if not sep:
        host, port = "127.0.0.1", text
    try:
        number = int(port)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"expected HOST:PORT, got {text!r}") from exc
    if not 0 <= number <= 65535:
        raise argparse.ArgumentTypeError(f"port out of range: {number}")
    return host or "127.0.0.1", number


def _positive(text: str) -> float:
    try:
        v = float(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from exc
    if not v > 0 or v == float("inf"):
        raise argparse.ArgumentTypeError(f"must be > 0, got {text}")
    return v


def _baud(text: str) -> int:
    try:
        v = int(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from exc
    if v < 300:
        raise argparse.ArgumentTypeError(f"baud rate must be >= 300, got {v}")
    return v


def fault_help() -> str:
    """The fault keys for --help: the list in the faults module's docstring (one source)."""
    doc = faults_module.__doc__ or ""
    start = doc.find("Link faults")
    if start < 0:
        return ""
    keys = re.sub(r"; see \w+\)", ")", doc[start:].rstrip())
    return "--faults keys (times are device seconds):\n" + keys


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m mock_device",
        description="Simulated motor controller board speaking the autotune wire protocol.",
        epilog=fault_help(),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument(
        "--plant",
        required=True,
        help=f"plant file (TOML) or a built-in scenario: {', '.join(SCENARIOS)}",
    )
    where = p.add_mutually_exclusive_group(required=True)
    where.add_argument("--pty", action="store_true", help="serve on a new pseudo-terminal")
    where.add_argument(
        "--tcp",
        type=_host_port,
        metavar="HOST:PORT",
        help="serve on a TCP socket (port 0 = any free port); use 127.0.0.1 unless you "
        "really want the device reachable from other machines",
    )
    p.add_argument("--speed", type=_positive, default=1.0, help="simulated s per wall s (default 1)")
    p.add_argument("--baud", type=_baud, default=None, help="pace output like a UART at N baud")
    p.add_argument(
        "--faults",
        default="",
        metavar="SPEC",
        help="fault injection: comma-separated KEY=VALUE pairs, e.g. "
        "corrupt=0.01,jitter=0.002,seed=3 (the keys are listed below)",
    )
    p.add_argument("--seed", type=int, default=None, help="sensor noise seed (default: plant file)")
    p.add_argument("--period", type=_positive, default=None, metavar="S",
                   help="device tick, s (default: the plant file's [device] period)")
    p.add_argument("--protocol-version", type=int, default=m.PROTOCOL_VERSION, metavar="N",
                   choices=(m.PROTOCOL_VERSION, *m.OLDER_VERSIONS),
                   help="wire protocol version to speak: an older one emulates an older board "
                        f"(default: {m.PROTOCOL_VERSION})")
    p.add_argument("--exit-with-parent", action="store_true",
                   help="end when the process that started this one ends (for tools that "
                        "start a simulated board of their own)")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        config = load_config(args.plant)
        spec = config.faults.merged(parse_fault_spec(args.faults))
    except MockConfigError as exc:
        print(f"mock_device: {exc}", file=sys.stderr)
        return 2
    except FaultSpecError as exc:
        print(f"mock_device: --faults: {exc}", file=sys.stderr)
        return 2
    if args.seed is not None and args.seed < 0:
        print("mock_device: --seed must be >= 0", file=sys.stderr)
        return 2
    if args.period is not None:
        if not 1e-5 <= args.period <= 1.0:
            print("mock_device: --period must be within 1e-5 .. 1 s", file=sys.stderr)
            return 2
        config = dataclasses.replace(
            config, device=dataclasses.replace(config.device, period=args.period))

    def log(line: str) -> None:
        print(f"mock_device: {line}", file=sys.stderr, flush=True)

    device = Device(config, faults=spec, seed=args.seed, log=log,
                    protocol_version=args.protocol_version)
    transport: Transport
    try:
        if args.pty:
            transport = PtyTransport()
        else:
            host, port = args.tcp
            transport = TcpTransport(host, port)
    except OSError as exc:
        print(f"mock_device: cannot open the port: {exc}", file=sys.stderr)
        return 2
    server = Server(
        device,
        transport,
        speed=args.speed,
        baud=args.baud,
        link_faults=LinkFaults(spec) if spec.any_link else None,
        parent=os.getppid() if args.exit_with_parent else None,
    )
    install_signal_handlers(server)
    sys.stdout.write(transport.url() + "\n")
    sys.stdout.flush()
    try:
        return server.run()
    finally:
        transport.close()
        d = server.decoder
        log(f"frames received: {d.frames_good} good, {d.crc_errors} CRC errors, "
            f"{d.framing_errors} framing errors")


if __name__ == "__main__":
    sys.exit(main())
