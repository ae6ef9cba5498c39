"""The built-in simulated board for `--port sim`: the mock device as its own process on a pty.

The board always ends with the tool: `close()` on every path out of a run, an exit handler for
anything that skips it, and the board's own `--exit-with-parent` for a tool that is killed.
A board that cannot start (a bad plant file or fault spec) is a bad input: exit 2.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import select
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from types import TracebackType

from autotune.errors import EXIT_USAGE, UserError

SIM = "sim"


@dataclass
class SimDevice:
    """A running `python -m mock_device` process; `url` is the pty path to open with pyserial."""

    process: subprocess.Popen[bytes]
    url: str
    plant: str
    speed: float
    stderr_file: object = field(default=None, repr=False)

    def stderr_text(self) -> str:
        """What the device process wrote to stderr so far."""
        f = self.stderr_file
        if f is None:
            return ""
        f.flush()
        f.seek(0)
        return f.read().decode(errors="replace")

    def close(self, timeout: float = 3.0) -> None:
        """Terminate the device process (SIGTERM, then SIGKILL); safe to call again."""
        _end_process(self.process, timeout)
        with contextlib.suppress(ValueError):
            atexit.unregister(self.close)
        if self.process.stdout is not None:
            self.process.stdout.close()

    def __enter__(self) -> SimDevice:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


def _end_process(proc: subprocess.Popen[bytes], timeout: float) -> None:
    if proc.poll() is None:
        with contextlib.suppress(OSError):
            proc.terminate()
        try:
            proc.wait(timeout)
        except subprocess.TimeoutExpired:
            with contextlib.suppress(OSError):
                proc.kill()
            proc.wait(timeout)


def start_sim_device(
    plant: str = "cart-wheel",
    speed: float = 1.0,
    faults: str | None = None,
    seed: int | None = None,
    baud: int | None = None,
    startup_timeout: float = 10.0,
) -> SimDevice:
    """Start the simulated board on a pseudo-terminal and return once its port is known.

    `plant` is a built-in scenario name or a plant TOML path; `speed` runs simulated time that many
    times faster than the wall clock.
    """
    cmd = [sys.executable, "-m", "mock_device", "--plant", plant, "--pty", "--speed", str(speed),
           "--exit-with-parent"]
    if faults:
        cmd += ["--faults", faults]
    if seed is not None:
        cmd += ["--seed", str(seed)]
    if baud is not None:
        cmd += ["--baud", str(baud)]
    return launch(cmd, plant, speed, startup_timeout)


def launch(cmd: list[str], plant: str, speed: float, startup_timeout: float = 10.0,
           what: str = "the simulated board") -> SimDevice:
    """Start a simulated board process `cmd` whose first stdout line is its port; return once
    the port is known (UserError with the process's last stderr line when it is not)."""
    errfile = tempfile.TemporaryFile()  # noqa: SIM115 (lives as long as the device)
    proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=errfile)
    assert proc.stdout is not None
    try:
        deadline = time.monotonic() + startup_timeout
        line = b""
        fd = proc.stdout.fileno()
        while not line.endswith(b"\n"):
            remaining = deadline - time.monotonic()
            if remaining <= 0 or proc.poll() is not None:
                break
            ready, _, _ = select.select([fd], [], [], remaining)
            if ready:
                chunk = os.read(fd, 1)
                if not chunk:
                    break
                line += chunk
    except BaseException:  # a signal while waiting: the board must not outlive this
        _end_process(proc, 3.0)
        raise
    url = line.decode(errors="replace").strip()
    if not url:
        _end_process(proc, 3.0)
        errfile.seek(0)
        reason = errfile.read().decode(errors="replace").strip().splitlines()
        raise UserError(
            f"{what} did not start"
            + (f": {reason[-1]}" if reason else " (no port announced within "
               f"{startup_timeout:.0f} s)"),
            exit_code=EXIT_USAGE,
        )
    sim = SimDevice(process=proc, url=url, plant=plant, speed=speed, stderr_file=errfile)
    atexit.register(sim.close)
    return sim
