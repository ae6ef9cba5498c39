"""`autotune ports`: list the serial ports of this machine."""

from __future__ import annotations

import argparse

from autotune.errors import EXIT_OK

HELP = "list the serial ports of this machine (device path, description, hardware id)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        "Only ports the operating system knows are listed: pseudo-terminals, socket:// and "
        "rfc2217:// URLs work with --port but never appear here."
    )


def describe_ports() -> list[tuple[str, str, str]]:
    """(device, description, hardware id) of every serial port, sorted by device."""
    from serial.tools import list_ports

    rows = []
    for p in list_ports.comports():
        desc = p.description if p.description and p.description != "n/a" else "-"
        hwid = p.hwid if p.hwid and p.hwid != "n/a" else "-"
        rows.append((p.device, desc, hwid))
    return sorted(rows)


def run(args: argparse.Namespace) -> int:
    rows = describe_ports()
    if not rows:
        print(
            "no serial ports found. Plug in the board's USB cable (or USB-serial adapter) and "
            "run this again; `autotune check --port sim` tries the built-in simulated board."
        )
        return EXIT_OK
    width = max(len(r[0]) for r in rows)
    dwidth = max(len(r[1]) for r in rows)
    print(f"{'port':<{width}}  {'description':<{dwidth}}  hardware id")
    for device, desc, hwid in rows:
        print(f"{device:<{width}}  {desc:<{dwidth}}  {hwid}")
    print(f"{len(rows)} port{'s' if len(rows) != 1 else ''}; use one with --port")
    return EXIT_OK
