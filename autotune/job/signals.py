"""SIGINT, SIGTERM and SIGHUP at any phase of a verb: the README's exit 3, nothing lost.

While a powered run is in progress a signal is *diverted* to it: it becomes a stop request (the
run's single stop path zeroes the output, records why, and the verb goes on to keep what was
measured). Outside a powered run a signal raises `Interrupted` in the main thread; on its way out
every `keep_on_interrupt` block it passes saves what it holds (result.json, the step's figures)
and says so in `Interrupted.kept`; the command line prints one line and exits 3.

    with routed():                      # the command line, around the whole verb
        with keep_on_interrupt(save):   # a job: save() -> "result.json written to ..." | None
            ...
            with diverted(run_stop):    # a powered run: run_stop(name) -> True when consumed
                ...

Handlers are installed only from the main thread (elsewhere `routed` does nothing) and the
previous ones are restored when the outermost `routed` block ends.
"""

from __future__ import annotations

import contextlib
import signal
import threading
from collections.abc import Callable, Iterator
from types import FrameType
from typing import Any

SIGNALS = tuple(s for s in (getattr(signal, n, None) for n in ("SIGINT", "SIGTERM", "SIGHUP"))
                if s is not None)


class Interrupted(KeyboardInterrupt):
    """A signal ended the verb outside a powered run (exit 3). `name`: "SIGTERM", ...;
    `kept`: one line per thing saved on the way out ("result.json written to ...")."""

    def __init__(self, name: str) -> None:
        super().__init__(f"{name} received")
        self.name = name
        self.kept: list[str] = []


class _Router:
    def __init__(self) -> None:
        self.depth = 0
        self.saved: dict[int, Any] = {}
        self.receivers: list[Callable[[str], bool]] = []
        self.pending: str | None = None  # a signal not consumed while diverted or deferred
        self.deferring = 0

    def handle(self, signum: int, frame: FrameType | None) -> None:
        name = signal.Signals(signum).name
        if self.receivers:
            consumed = False
            with contextlib.suppress(Exception):  # a stop request must never raise here
                consumed = bool(self.receivers[-1](name))
            if not consumed and self.pending is None:
                self.pending = name
            return
        if self.deferring:
            self.pending = self.pending or name
            return
        raise Interrupted(name)


_router = _Router()


@contextlib.contextmanager
def routed() -> Iterator[None]:
    """Install the handlers for the duration of the block (main thread only; nested blocks
    share one installation)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    if _router.depth == 0:
        for sig in SIGNALS:
            with contextlib.suppress(ValueError, OSError):
                _router.saved[sig] = signal.signal(sig, _router.handle)
    _router.depth += 1
    try:
        yield
    finally:
        _router.depth -= 1
        if _router.depth == 0:
            for sig, old in _router.saved.items():
                with contextlib.suppress(ValueError, OSError, TypeError):
                    signal.signal(sig, old)
            _router.saved.clear()
            _router.pending = None


@contextlib.contextmanager
def diverted(receiver: Callable[[str], bool]) -> Iterator[None]:
    """Within the block a signal calls `receiver(name)` (any thread may be running: it must
    only request a stop) instead of raising. A signal the receiver did not consume (the run was
    already stopping for another reason) raises `Interrupted` when the block ends, unless an
    exception is already on its way out."""
    _router.receivers.append(receiver)
    ok = False
    try:
        yield
        ok = True
    finally:
        with contextlib.suppress(ValueError):
            _router.receivers.remove(receiver)
        if ok and not _router.receivers:
            _raise_pending()


@contextlib.contextmanager
def deferred() -> Iterator[None]:
    """Within the block a signal is noted, not raised; it raises `Interrupted` at the end."""
    _router.deferring += 1
    ok = False
    try:
        yield
        ok = True
    finally:
        _router.deferring -= 1
        if ok and not _router.deferring and not _router.receivers:
            _raise_pending()


def _raise_pending() -> None:
    name, _router.pending = _router.pending, None
    if name is not None and _router.depth:
        raise Interrupted(name)


@contextlib.contextmanager
def keep_on_interrupt(save: Callable[[], str | None]) -> Iterator[None]:
    """When `Interrupted` leaves the block, call `save()` first (signals deferred meanwhile)
    and add the line it returns to the exception's `kept`. A failing save is reported there
    too; the exception goes on either way."""
    try:
        yield
    except Interrupted as exc:
        _router.deferring += 1
        try:
            line = save()
        except Exception as err:  # noqa: BLE001 (report it; the interruption goes on)
            line = f"could not save: {err}"
        finally:
            _router.deferring -= 1
            _router.pending = None
        if line:
            exc.kept.append(line)
        raise


def pending() -> str | None:
    """The name of a signal received and not yet acted on (None: none)."""
    return _router.pending
