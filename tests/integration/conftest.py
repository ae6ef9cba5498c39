"""Fixtures that run the mock device as its own process on a real pty (or loopback TCP).

``mock_device`` is a factory: ``dev = mock_device("cart-wheel", speed=10, faults="...")``
starts ``python -m mock_device --plant ... --pty`` and returns a MockProcess whose ``port`` is
the first stdout line. Every process started is terminated at teardown. ``open_link(port)``
opens a protocol.Link on it (closed at teardown too).
"""

from __future__ import annotations

import os
import select
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from protocol.link import Link

REPO = Path(__file__).resolve().parents[2]
START_TIMEOUT = 15.0  # s of wall clock to wait for the port line


@dataclass
class MockProcess:
    """A running ``python -m mock_device``: its port (first stdout line) and the process."""

    proc: subprocess.Popen
    port: str
    speed: float
    args: list[str] = field(default_factory=list)

    def stderr_text(self, timeout: float = 5.0) -> str:
        """Terminate (if still running) and return everything the device wrote to stderr."""
        self.terminate(timeout)
        assert self.proc.stderr is not None
        return self.proc.stderr.read()

    def terminate(self, timeout: float = 5.0) -> int:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout)
        return self.proc.returncode

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(5.0)


def start_mock_device(
    plant: str = "cart-wheel",
    *,
    speed: float = 10.0,
    tcp: str | None = None,
    baud: int | None = None,
    faults: str | None = None,
    seed: int | None = None,
    extra: list[str] | None = None,
) -> MockProcess:
    """Start the mock device process and wait for its port line."""
    args = [sys.executable, "-m", "mock_device", "--plant", plant, "--speed", str(speed)]
    args += ["--tcp", tcp] if tcp is not None else ["--pty"]
    if baud is not None:
        args += ["--baud", str(baud)]
    if faults is not None:
        args += ["--faults", faults]
    if seed is not None:
        args += ["--seed", str(seed)]
    args += extra or []
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    proc = subprocess.Popen(
        args,
        cwd=REPO,
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )
    assert proc.stdout is not None
    ready, _, _ = select.select([proc.stdout], [], [], START_TIMEOUT)
    line = proc.stdout.readline().strip() if ready else ""
    if not line:
        proc.kill()
        err = proc.stderr.read() if proc.stderr else ""
        raise RuntimeError(f"mock device did not start: {' '.join(args)}\n{err}")
    return MockProcess(proc, line, speed, args)


@pytest.fixture
def mock_device() -> Iterator[Callable[..., MockProcess]]:
    """Factory fixture: start mock device processes; all are terminated at teardown."""
    started: list[MockProcess] = []

    def factory(plant: str = "cart-wheel", **kwargs) -> MockProcess:
        dev = start_mock_device(plant, **kwargs)
        started.append(dev)
        return dev

    yield factory
    for dev in started:
        dev.terminate()
        for stream in (dev.proc.stdout, dev.proc.stderr):
            if stream is not None:
                stream.close()


@pytest.fixture
def open_link() -> Iterator[Callable[..., Link]]:
    """Factory fixture: ``open_link(port, speed=..., **Link kwargs)`` opens a protocol.Link.

    The heartbeat interval defaults to 0.05 s of *device* time (0.05 / speed wall seconds), so
    an accelerated device's watchdog sees the same host behaviour as at speed 1.
    """
    links: list[Link] = []

    def factory(port: str, speed: float = 1.0, **kwargs) -> Link:
        kwargs.setdefault("heartbeat_interval", 0.05 / speed)
        link = Link.open(port, **kwargs)
        links.append(link)
        return link

    yield factory
    for link in links:
        link.close()


def wait_for(predicate: Callable[[], bool], timeout: float = 5.0, step: float = 0.005) -> bool:
    """Poll ``predicate`` until true or ``timeout`` s of wall clock pass (a test guard only)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(step)
    return predicate()
