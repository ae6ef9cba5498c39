"""The abort-key watcher on a real pseudo-terminal: every abort key calls back at once, other
keys do not, and the terminal settings are restored."""

from __future__ import annotations

import os
import pty
import termios
import threading

import pytest

from autotune.keys import AbortKeys


@pytest.fixture
def terminal():
    master, slave = pty.openpty()
    f = os.fdopen(slave, "rb", buffering=0)
    yield master, f
    f.close()
    os.close(master)


@pytest.mark.parametrize(("key", "name"), [(b" ", "space"), (b"\x1b", "esc"), (b"q", "q"),
                                           (b"\x03", "ctrl-c")])
def test_abort_keys_call_back(terminal, key: bytes, name: str) -> None:
    master, f = terminal
    before = termios.tcgetattr(f.fileno())
    hit = threading.Event()
    got: list[str] = []

    def on_abort(k: str) -> None:
        got.append(k)
        hit.set()

    with AbortKeys(on_abort, stream=f) as keys:
        assert keys.active
        during = termios.tcgetattr(f.fileno())
        assert not during[3] & termios.ICANON and not during[3] & termios.ISIG
        os.write(master, b"x1")  # not abort keys
        os.write(master, key)
        assert hit.wait(5.0)
    assert got == [name]
    assert termios.tcgetattr(f.fileno()) == before  # restored


def test_no_terminal_is_a_no_op(tmp_path) -> None:
    with open(tmp_path / "in.txt", "w+b") as f, AbortKeys(lambda k: None, stream=f) as keys:
        assert not keys.active
