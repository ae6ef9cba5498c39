"""One protocol contract, two boards: the Python mock device and board-sim (the C library).

Every test that takes the ``board`` fixture runs twice, once against ``python -m mock_device``
and once against ``protocol/board/build/board-sim``, each its own process behind a real
pseudo-terminal, reached through pyserial (protocol.Link). ``board(...)`` starts one with the
plant K / (T s + 1) exp(-L s) and the given tick, speed, sensor and watchdog.

The C code is built once per session with the system C compiler (``make -C protocol/board``);
a missing compiler or a build error fails the tests that need it, with the cause.
"""

from __future__ import annotations

import struct
import sys
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import pytest

from autotune.boardsim import BuildError, board_sim_command, build
from autotune.simdevice import SimDevice, launch
from protocol import messages as m
from protocol.link import Link

REPO = Path(__file__).resolve().parents[2]
BOARDS = ("mock", "board-sim")


@pytest.fixture(scope="session")
def c_build() -> None:
    """Build board-sim, the spec vectors, the fuzz harness and the library with room for
    several axes once (fails with the cause)."""
    try:
        build("sim", "fuzz", "build/spec-vectors", "build/atboard-axes.o")
    except BuildError as exc:
        pytest.fail(f"the C code of protocol/board could not be built: {exc}", pytrace=False)


@dataclass
class Board:
    """A running board process: ``kind`` ("mock" or "board-sim"), its pty ``url``, ``speed``
    and the plant it simulates (gain, lag s, delay s, period s)."""

    kind: str
    sim: SimDevice
    speed: float
    gain: float
    lag: float
    delay: float
    period: float
    resolution: float

    @property
    def url(self) -> str:
        return self.sim.url

    def counters_at_exit(self) -> str:
        """Terminate the process and return its stderr (the reception counters line)."""
        self.sim.close()
        return self.sim.stderr_text()


def _mock_plant_file(path: Path, gain: float, lag: float, delay: float, period: float,
                     resolution: float, noise: float, watchdog: float, integrating: bool) -> Path:
    den = f"[{lag!r}, 1.0, 0.0]" if integrating else f"[{lag!r}, 1.0]"
    path.write_text(
        f"[plant]\nnum = [{gain!r}]\nden = {den}\ndelay = {delay!r}\n"
        f"[sensor]\nnoise = {noise!r}\nresolution = {resolution!r}\n"
        f"[device]\nperiod = {period!r}\nname = \"conformance\"\nmax_output = 100.0\n"
        f"watchdog = {watchdog!r}\n")
    return path


@pytest.fixture(params=BOARDS)
def board(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Callable[..., Board]]:
    """Factory: ``board(gain=2, lag=0.5, delay=0.05, period=0.01, speed=10, ...)`` starts the
    parametrised kind of board; every process is terminated at teardown."""
    kind: str = request.param
    if kind == "board-sim":
        request.getfixturevalue("c_build")
    started: list[SimDevice] = []

    def start(gain: float = 2.0, lag: float = 0.5, delay: float = 0.05, period: float = 0.01,
              speed: float = 10.0, resolution: float = 0.0, noise: float = 0.0,
              watchdog: float = 0.25, integrating: bool = False, baud: int | None = None
              ) -> Board:
        if kind == "mock":
            plant = _mock_plant_file(tmp_path / f"plant{len(started)}.toml", gain, lag, delay,
                                     period, resolution, noise, watchdog, integrating)
            cmd = [sys.executable, "-m", "mock_device", "--plant", str(plant), "--pty",
                   "--speed", repr(speed)]
            if baud is not None:
                cmd += ["--baud", str(baud)]
        else:
            cmd = board_sim_command(gain, lag, delay, period=period, speed=speed,
                                    resolution=resolution, noise=noise, watchdog=watchdog,
                                    integrating=integrating, baud=baud)
        sim = launch(cmd, kind, speed, startup_timeout=20.0, what=kind)
        started.append(sim)
        return Board(kind, sim, speed, gain, lag, delay, period, resolution)

    yield start
    for sim in started:
        sim.close()


@pytest.fixture
def open_link() -> Iterator[Callable[..., Link]]:
    """``open_link(board)``: a Link on the board's pty (heartbeat every 0.05 s device time,
    not started); closed at teardown."""
    links: list[Link] = []

    def factory(b: Board, **kwargs: Any) -> Link:
        kwargs.setdefault("heartbeat_interval", 0.05 / b.speed)
        link = Link.open(b.url, **kwargs)
        links.append(link)
        return link

    yield factory
    for link in links:
        link.close()


def raw_request(msg_type: int, payload: bytes = b"") -> m.Message:
    """A request of any type id and payload (to provoke UNKNOWN_TYPE and BAD_LENGTH): a
    Message whose pack() returns ``payload``."""

    class Raw(m.Message):
        TYPE: ClassVar[int] = msg_type

        def pack(self) -> bytes:
            return payload

    return Raw()


def f32(x: float) -> float:
    """``x`` rounded to IEEE-754 single precision (what the wire carries)."""
    return struct.unpack("<f", struct.pack("<f", x))[0]
