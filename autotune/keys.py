"""Abort keys: a thread that watches the terminal for Space, Esc, q or Ctrl-C.

The terminal goes into cbreak mode with signal keys off (so Ctrl-C arrives as a byte and is seen
by this thread at once, not as a signal in whatever the main thread is doing); output processing
stays on so printing is unchanged. The previous terminal state is restored on `stop()` (and at
interpreter exit). When stdin is not a terminal the watcher does nothing.
"""

from __future__ import annotations

import atexit
import contextlib
import os
import select
import sys
import threading
from collections.abc import Callable
from types import TracebackType
from typing import Any

ABORT_KEYS: dict[bytes, str] = {b" ": "space", b"\x1b": "esc", b"q": "q", b"Q": "q",
                                b"\x03": "ctrl-c"}


class AbortKeys:
    """Calls `on_abort(key_name)` from its own thread as soon as an abort key is pressed, and
    `on_key(character)` (if given) for every other key: the one key thread of a run.

    Use as a context manager or call `start()` / `stop()`. `active` tells whether it is
    watching a terminal. The callback is called once per key press; it must be quick and
    thread-safe (the runner's stop request is).
    """

    def __init__(self, on_abort: Callable[[str], None], stream: Any = None,
                 on_key: Callable[[str], None] | None = None) -> None:
        self.on_abort = on_abort
        self.on_key = on_key
        self._stream = stream if stream is not None else sys.stdin
        self._fd: int | None = None
        self._saved: list[Any] | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self.pressed: list[str] = []

    @property
    def active(self) -> bool:
        return self._thread is not None

    def start(self) -> AbortKeys:
        """Enter cbreak mode and start the thread (no-op when stdin is not a tty)."""
        try:
            fd = self._stream.fileno()
        except (AttributeError, OSError, ValueError):
            return self
        if not os.isatty(fd):
            return self
        import termios

        self._fd = fd
        self._saved = termios.tcgetattr(fd)
        new = termios.tcgetattr(fd)
        # lflag: no canonical mode, no echo, no signal keys; min 1 byte, no timer.
        new[3] &= ~(termios.ICANON | termios.ECHO | termios.ISIG | termios.IEXTEN)
        new[6][termios.VMIN] = 1
        new[6][termios.VTIME] = 0
        termios.tcsetattr(fd, termios.TCSADRAIN, new)
        atexit.register(self._restore)
        self._stop.clear()
        self._thread = threading.Thread(target=self._watch, name="abort-keys", daemon=True)
        self._thread.start()
        return self

    def _watch(self) -> None:
        assert self._fd is not None
        fd = self._fd
        while not self._stop.is_set():
            try:
                ready, _, _ = select.select([fd], [], [], 0.05)
            except (OSError, ValueError):
                return
            if not ready:
                continue
            try:
                data = os.read(fd, 64)
            except OSError:
                return
            if not data:
                return
            # A read that holds an abort key anywhere calls `on_abort` once and drops the rest
            # (so an arrow key's escape sequence counts as Esc: it stops the motor).
            name = next((ABORT_KEYS[data[i : i + 1]] for i in range(len(data))
                         if data[i : i + 1] in ABORT_KEYS), None)
            if name is not None:
                self.pressed.append(name)
                with contextlib.suppress(Exception):  # never kill the watcher
                    self.on_abort(name)
                continue
            if self.on_key is not None:
                for ch in data.decode("utf-8", errors="ignore"):
                    with contextlib.suppress(Exception):
                        self.on_key(ch)

    def _restore(self) -> None:
        if self._fd is not None and self._saved is not None:
            import termios

            with contextlib.suppress(OSError, termios.error):
                termios.tcsetattr(self._fd, termios.TCSADRAIN, self._saved)
            self._saved = None

    def stop(self) -> None:
        """Stop watching and restore the terminal."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=1.0)
            self._thread = None
        self._restore()
        with contextlib.suppress(Exception):
            atexit.unregister(self._restore)

    def __enter__(self) -> AbortKeys:
        return self.start()

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.stop()
