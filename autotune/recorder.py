"""Session files: `session.jsonl` writer and reader, `result.json`, CSV export.

session.jsonl (contract): one JSON object a line, each with a `type`:
  {"type": "header", "format": "autotune-session", "version": 1, "tool": ..., "config": ...,
   "device": ..., "limits": ..., ...}
  {"type": "sample", "t": device time (s), "pv": PV units, "out": applied output (output units),
   "sp": setpoint or relay centre (PV units), ...more keys}
  {"type": "event", "t": device time (s), "kind": str, "detail": ..., ...}
  {"type": "end", "reason": str, ...}
The writer flushes at every event and at least every 0.5 s (a background thread covers a
stalled stream), so a killed process leaves a file readable up to its last flush. Non-finite
floats are written as null.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import json
import math
import os
import stat
import tempfile
import threading
import time
from array import array
from collections.abc import Callable, Collection, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import Any, BinaryIO, TextIO

import numpy as np

from autotune import __version__
from autotune.config import WIRE_FLOAT_MAX
from autotune.errors import EXIT_USAGE, UserError

FORMAT = "autotune-session"
VERSION = 1
FLUSH_INTERVAL = 0.25  # s wall clock; the contract asks for at least every 0.5 s
SAMPLE_KEYS = ("t", "pv", "out", "sp")
MAX_EXTRA_KEYS = 256  # distinct extra sample keys a session may hold (a real one has a few)
_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)


class SessionFileError(UserError):
    """A session file that cannot be read: names the file and the problem."""

    def __init__(self, path: str | Path, problem: str) -> None:
        super().__init__(f"{path}: {problem}", exit_code=EXIT_USAGE)
        self.path = str(path)
        self.problem = problem


def _clean(value: Any) -> Any:
    """Make `value` JSON-safe: numpy scalars/arrays to Python, non-finite floats to None."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (bool, int, str)) or value is None:
        return value
    if isinstance(value, np.generic):
        return _clean(value.item())
    if isinstance(value, np.ndarray):
        return [_clean(v) for v in value.tolist()]
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if hasattr(value, "__dataclass_fields__"):
        return _clean(dataclasses.asdict(value))
    if isinstance(value, complex):
        return {"re": _clean(value.real), "im": _clean(value.imag)}
    return str(value)


_ENCODE = json.JSONEncoder(separators=(",", ":"), allow_nan=False).encode


def dumps(obj: Any) -> str:
    """One JSON line (no newline) for `obj`, non-finite floats as null."""
    try:
        return _ENCODE(obj)  # plain values (the common case, a sample): no copy
    except (ValueError, TypeError):
        return _ENCODE(_clean(obj))


def _io_problem(exc: BaseException) -> str:
    """A short lower-case reason for an I/O failure ("no space left on device")."""
    if isinstance(exc, OSError) and exc.errno is not None:
        return os.strerror(exc.errno).lower()
    return str(exc) or type(exc).__name__


class SessionWriter:
    """Writes one session.jsonl; thread-safe (the key thread may record an event).

    `header` is written at once; then `sample`, `event`, and finally `end` (also written by
    `close` with reason "unknown" if nobody did). Opening refuses a path that is not a regular
    file (UserError, exit 2). After that nothing raises: the first write failure (a full disk,
    a file-size limit) is kept in `error` ("no space left on device"), passed to `on_error`
    (called once, from whichever thread wrote), and every later record is dropped, so a
    recording failure can never keep the caller from stopping the motor.
    """

    def __init__(self, path: str | Path, header: dict[str, Any],
                 on_error: Callable[[str], None] | None = None) -> None:
        self.path = Path(path)
        check_target(self.path)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | _NOFOLLOW, 0o644)
        except OSError as exc:
            raise UserError(f"{self.path}: cannot write the session file: {_io_problem(exc)}",
                            exit_code=EXIT_USAGE) from None
        self._f: TextIO = open(fd, "w", encoding="utf-8")  # noqa: SIM115
        self._lock = threading.Lock()
        self._dirty = False
        self._last_flush = time.monotonic()
        self._ended = False
        self._closed = False
        self.error: str | None = None
        self.on_error = on_error
        self.samples_written = 0
        rec = {"type": "header", "format": FORMAT, "version": VERSION, "tool": f"autotune "
               f"{__version__}", "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        rec.update(header)
        self._write(rec, flush=True)
        if self.error is not None:
            with contextlib.suppress(OSError):
                self._f.close()
            raise UserError(f"{self.path}: cannot write the session file: {self.error}",
                            exit_code=EXIT_USAGE)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._flusher, name="session-flush", daemon=True)
        self._thread.start()

    def _failed(self, exc: BaseException) -> None:
        """Keep the first failure, tell on_error once (called under the lock)."""
        if self.error is not None:
            return
        self.error = _io_problem(exc)
        callback = self.on_error
        if callback is not None:
            with contextlib.suppress(Exception):
                callback(self.error)

    def _write(self, rec: dict[str, Any], flush: bool) -> None:
        line = dumps(rec) + "\n"
        with self._lock:
            if self._closed or self.error is not None:
                return
            try:
                self._f.write(line)
                now = time.monotonic()
                if flush or now - self._last_flush >= FLUSH_INTERVAL:
                    self._f.flush()
                    self._last_flush = now
                    self._dirty = False
                else:
                    self._dirty = True
            except (OSError, ValueError) as exc:
                self._failed(exc)

    def _flusher(self) -> None:
        while not self._stop.wait(FLUSH_INTERVAL / 2):
            self.flush()

    def flush(self) -> None:
        """Push everything written so far to the operating system."""
        with self._lock:
            if self._dirty and not self._closed and self.error is None:
                try:
                    self._f.flush()
                except (OSError, ValueError) as exc:
                    self._failed(exc)
                self._dirty = False
                self._last_flush = time.monotonic()

    def sample(self, t: float, pv: float, out: float, sp: float, **extra: Any) -> None:
        """One sample: device time t (s), pv (PV units), applied out (output units), sp."""
        rec: dict[str, Any] = {"type": "sample", "t": t, "pv": pv, "out": out, "sp": sp}
        rec.update(extra)
        self._write(rec, flush=False)
        self.samples_written += 1

    def event(self, t: float | None, kind: str, detail: Any = None, **extra: Any) -> None:
        """One event at device time t (s) (None when unknown); flushed at once."""
        rec: dict[str, Any] = {"type": "event", "t": t, "kind": kind, "detail": detail}
        rec.update(extra)
        self._write(rec, flush=True)

    def end(self, reason: str, **extra: Any) -> None:
        """The end record (once); flushed at once."""
        if self._ended:
            return
        self._ended = True
        rec: dict[str, Any] = {"type": "end", "reason": reason}
        rec.update(extra)
        self._write(rec, flush=True)

    @property
    def ended(self) -> bool:
        return self._ended

    def close(self) -> None:
        """Write an end record if none was written, flush and close (never raises)."""
        if self._closed:
            return
        if not self._ended:
            self.end("unknown")
        self._stop.set()
        self._thread.join(timeout=1.0)
        with self._lock:
            try:
                if self.error is None:
                    self._f.flush()
                    with contextlib.suppress(OSError):  # pipes, odd filesystems
                        os.fsync(self._f.fileno())
            except (OSError, ValueError) as exc:
                self._failed(exc)
            finally:
                with contextlib.suppress(OSError, ValueError):
                    self._f.close()
                self._closed = True

    def __enter__(self) -> SessionWriter:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()


@dataclass
class Session:
    """A session file read back. Arrays are float64; NaN where a sample had null.

    header: the header record; t (s, device time), pv (PV units), out (output units), sp (PV
    units): one entry per sample; extra: any further sample keys with numeric values (e.g.
    "state"), and "phase" as an object array of strings when present; events: event records in
    order; end: the end record or None when the run was cut off; warnings: what was tolerated.
    """

    path: str
    header: dict[str, Any]
    t: np.ndarray
    pv: np.ndarray
    out: np.ndarray
    sp: np.ndarray
    extra: dict[str, np.ndarray] = field(default_factory=dict)
    events: list[dict[str, Any]] = field(default_factory=list)
    end: dict[str, Any] | None = None
    warnings: list[str] = field(default_factory=list)

    @property
    def reason(self) -> str | None:
        """The end reason, or None when the file has no end record."""
        return None if self.end is None else self.end.get("reason")

    def select(self, mask: np.ndarray) -> dict[str, np.ndarray]:
        """The sample arrays where `mask` holds (e.g. `s.extra["phase"] == "relay"`)."""
        out = {k: getattr(self, k)[mask] for k in SAMPLE_KEYS}
        for k, v in self.extra.items():
            out[k] = v[mask]
        return out

    def phase_mask(self, phase: str) -> np.ndarray:
        """Boolean mask of the samples recorded in `phase` (all False if phases not recorded)."""
        ph = self.extra.get("phase")
        if ph is None:
            return np.zeros(self.t.shape, dtype=bool)
        return ph == phase


def _lines(f: BinaryIO) -> Iterator[tuple[int, bytes, bool]]:
    """(line number from 1, the line without its end, whether it is the last one) for each
    line of `f`, read one at a time (one line of look-ahead)."""
    prev: bytes | None = None
    n = 0
    for raw in f:
        if prev is not None:
            yield n, prev, False
        n += 1
        prev = raw
    if prev is not None:
        yield n, prev, True


def _value(v: Any, j: int, key: str, p: Path) -> float:
    """A sample's number: null -> NaN; refused: not a number, infinite, beyond float32."""
    if v is None:
        return math.nan
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise SessionFileError(p, f"line {j}: sample with a non-numeric field ({key} = {v!r})")
    x = float(v)
    if not abs(x) <= WIRE_FLOAT_MAX:
        raise SessionFileError(p, f"line {j}: sample {key} = {v!r} is not a value a device "
                               f"reports (beyond +/-{WIRE_FLOAT_MAX:.3g})")
    return x


def read_session(path: str | Path, *, phases: Collection[str] | None = None) -> Session:
    """Read a session.jsonl line by line; raises SessionFileError for files that are not usable.

    phases: keep only the samples recorded in these phases (and those without a phase); the
    memory then grows with the samples kept, not with the file. Tolerated with a warning (in
    `Session.warnings`): a truncated last line (a killed process) and a missing end record.
    Refused: a missing or empty file, a first line that is not a session header, another
    format version, a broken line before the last, a line nested too deeply, sample times
    that are not finite or do not increase, sample values that are not finite numbers within
    the float32 range of the wire (null is read as NaN).
    """
    p = Path(path)
    try:
        f = open(p, "rb")  # noqa: SIM115 (closed below)
    except FileNotFoundError:
        raise SessionFileError(p, "no such file") from None
    except IsADirectoryError:
        raise SessionFileError(p, "is a directory, not a session file") from None
    except OSError as exc:
        raise SessionFileError(p, f"cannot read: {exc.strerror or exc}") from None
    with f:
        try:
            return _read_lines(p, f, None if phases is None else frozenset(phases))
        except IsADirectoryError:
            raise SessionFileError(p, "is a directory, not a session file") from None
        except OSError as exc:
            raise SessionFileError(p, f"cannot read: {exc.strerror or exc}") from None


_SCAN = json.JSONDecoder().scan_once  # the C scanner: one value from a position, no wrappers
_NUMBER = (float, int)


def _parse(raw: bytes) -> Any:
    """One JSON value of a line (bytes, UTF-8); ValueError when it is not exactly one."""
    text = raw.decode("utf-8").strip()
    if not text.startswith("{"):
        return json.loads(text)  # the clear error, or a value that is not an object
    try:
        obj, end = _SCAN(text, 0)
    except StopIteration:
        raise ValueError("not JSON") from None
    if end != len(text):
        raise ValueError("trailing text")
    return obj


class _Column:
    """One extra sample key: its numbers (NaN where a sample had none) in a float64 array, 8
    bytes a sample, until the first value that is not a number; from then on Python objects
    (strings shared, one object per distinct value)."""

    __slots__ = ("nums", "objs", "strings")

    def __init__(self, missing: int, strings: dict[str, str]) -> None:
        self.nums: array[float] | None = array("d", [math.nan]) * missing
        self.objs: list[Any] | None = None
        self.strings = strings

    def __len__(self) -> int:
        return len(self.nums) if self.nums is not None else len(self.objs or ())

    def append(self, v: Any) -> None:
        nums = self.nums
        if nums is not None:
            if v is None:
                nums.append(math.nan)
                return
            if type(v) in _NUMBER:
                try:
                    nums.append(v)
                    return
                except OverflowError:  # an integer beyond float64: keep it as it is
                    pass
            self.objs = [None if math.isnan(x) else x for x in nums]
            self.nums = None
        if type(v) is str:
            v = self.strings.setdefault(v, v)
        assert self.objs is not None
        self.objs.append(v)

    def values(self) -> np.ndarray:
        if self.nums is not None:
            return np.frombuffer(self.nums, dtype=float)
        return np.array(self.objs, dtype=object)


def _read_lines(p: Path, f: BinaryIO, phases: frozenset[str] | None) -> Session:
    warnings: list[str] = []
    header: dict[str, Any] | None = None
    t_col, pv_col, out_col, sp_col = (array("d") for _ in SAMPLE_KEYS)
    extra_cols: dict[str, _Column] = {}
    strings: dict[str, str] = {}  # one object per distinct string value (phase names)
    events: list[dict[str, Any]] = []
    end: dict[str, Any] | None = None
    ns = 0
    t_prev = -math.inf
    hi = WIRE_FLOAT_MAX
    lo = -hi
    last_keys: tuple[str, ...] = ()
    last_extra: list[tuple[str, _Column]] = []
    for j, raw, last in _lines(f):
        complete = raw.endswith(b"\n")
        try:
            rec = _parse(raw)
            if not isinstance(rec, dict):
                raise ValueError("not an object")
        except RecursionError:
            raise SessionFileError(p, f"line {j} is nested too deeply") from None
        except UnicodeDecodeError:
            if j == 1:
                raise SessionFileError(p, "not a session file (not UTF-8 text)") from None
            if last and not complete:
                warnings.append(f"line {j} is cut short (the run was interrupted); ignored it")
                break
            raise SessionFileError(p, f"line {j} is not UTF-8 text") from None
        except ValueError:
            if j == 1:
                if not raw.strip():
                    raise SessionFileError(p, "empty file, not a session file") from None
                raise SessionFileError(p, "not a session file (line 1 is not a JSON object)")\
                    from None
            if last:
                warnings.append(f"line {j} is cut short (the run was interrupted); "
                                "ignored it")
                break
            raise SessionFileError(p, f"line {j} is not valid JSON") from None
        if last and not complete:
            warnings.append(f"line {j} has no line end (the run was interrupted)")
        if header is None:
            header = rec
            _check_header(p, header)
            continue
        kind = rec.get("type")
        if kind == "sample":
            t, pv, out, sp = rec.get("t"), rec.get("pv"), rec.get("out"), rec.get("sp")
            if (type(t) in _NUMBER and type(pv) in _NUMBER and type(out) in _NUMBER
                    and type(sp) in _NUMBER and lo <= t <= hi and lo <= pv <= hi
                    and lo <= out <= hi and lo <= sp <= hi):
                pass  # the common case, checked in one go
            else:
                t, pv, out, sp = (_value(v, j, k, p) for k, v in
                                  zip(SAMPLE_KEYS, (t, pv, out, sp), strict=True))
            if not t > t_prev:
                problem = "is not a number" if math.isnan(t) else (
                    f"= {t:g} s does not increase (the sample before it is at {t_prev:g} s)")
                raise SessionFileError(p, f"line {j}: sample time {problem}")
            t_prev = t
            phase = rec.get("phase")
            if phases is not None and isinstance(phase, str) and phase not in phases:
                continue
            t_col.append(t)
            pv_col.append(pv)
            out_col.append(out)
            sp_col.append(sp)
            keys = tuple(rec)
            if keys != last_keys:  # the keys changed: find (or open) their columns
                last_keys = keys
                last_extra = []
                for k in keys:
                    if k in SAMPLE_KEYS or k == "type":
                        continue
                    col = extra_cols.get(k)
                    if col is None:
                        if len(extra_cols) >= MAX_EXTRA_KEYS:
                            raise SessionFileError(p, f"line {j}: more than {MAX_EXTRA_KEYS}"
                                                   " different sample keys")
                        col = extra_cols[k] = _Column(ns, strings)
                    last_extra.append((k, col))
            for k, col in last_extra:
                col.append(rec[k])
            ns += 1
            if len(last_extra) != len(extra_cols):
                for col in extra_cols.values():
                    if len(col) < ns:
                        col.append(None)
        elif kind == "event":
            events.append(rec)
        elif kind == "end":
            end = rec
        elif kind == "header":
            raise SessionFileError(p, f"line {j}: a second header")
        else:
            raise SessionFileError(p, f"line {j}: unknown record type {kind!r}")
    if header is None:
        raise SessionFileError(p, "empty file, not a session file")
    if end is None:
        warnings.append("no end record: the run was cut off; the data end at the last flush")
    extra = {k: col.values() for k, col in extra_cols.items()}
    return Session(
        path=str(p),
        header=header,
        t=np.frombuffer(t_col, dtype=float),
        pv=np.frombuffer(pv_col, dtype=float),
        out=np.frombuffer(out_col, dtype=float),
        sp=np.frombuffer(sp_col, dtype=float),
        extra=extra,
        events=events,
        end=end,
        warnings=warnings,
    )


def _check_header(p: Path, header: dict[str, Any]) -> None:
    if header.get("type") != "header":
        raise SessionFileError(p, "not a session file (the first record is not a header)")
    if header.get("format", FORMAT) != FORMAT:
        raise SessionFileError(p, f"not a session file (format {header.get('format')!r})")
    version = header.get("version")
    if version != VERSION:
        raise SessionFileError(p, f"session format version {version!r} is not supported "
                               f"(this tool reads version {VERSION})")


# ---------------------------------------------------------------------- safe writes
def check_target(path: str | Path) -> Path:
    """Refuse (UserError, exit 2) to write over anything but a regular file: a symlink, a
    device node, a directory, a pipe. A path that does not exist yet is fine."""
    p = Path(path)
    try:
        st = os.lstat(p)
    except FileNotFoundError:
        return p
    except OSError as exc:
        raise UserError(f"{p}: cannot check it before writing: {_io_problem(exc)}",
                        exit_code=EXIT_USAGE) from None
    if not stat.S_ISREG(st.st_mode):
        kind = ("a symbolic link" if stat.S_ISLNK(st.st_mode) else
                "a directory" if stat.S_ISDIR(st.st_mode) else
                "a device" if stat.S_ISCHR(st.st_mode) or stat.S_ISBLK(st.st_mode) else
                "a pipe or socket")
        raise UserError(f"{p}: refusing to write over it: it is {kind}, not a regular file; "
                        "give a new path or a regular file", exit_code=EXIT_USAGE)
    return p


def write_atomic(path: str | Path, text: str) -> Path:
    """Write `text` to `path` through a new temporary file in the same directory and an atomic
    rename, only over a regular file or a new path (see check_target); returns the path."""
    p = check_target(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=p.parent, prefix=f".{p.name}.", suffix=".tmp")
    try:
        with open(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            with contextlib.suppress(OSError):
                os.fsync(f.fileno())
        check_target(p)  # nothing else appeared there meanwhile
        os.replace(tmp, p)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    return p


def check_out_dir(path: str | Path, files: Iterable[str] = ("session.jsonl", "result.json")
                  ) -> Path:
    """Make sure `path` is (or can be made) a writable directory and that none of `files` in
    it is something other than a regular file; creates it. UserError (exit 2) naming the
    problem otherwise. Call before connecting."""
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise UserError(f"--out {p}: not a directory", exit_code=EXIT_USAGE)
    try:
        p.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(dir=p, prefix=".autotune-probe-")
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise UserError(f"--out {p}: not writable: {_io_problem(exc)}",
                        exit_code=EXIT_USAGE) from None
    for name in files:
        check_target(p / name)
    return p


def write_result(path: str | Path, result: dict[str, Any]) -> Path:
    """Write result.json (indented, non-finite floats as null) atomically; returns the path.
    Only over a regular file or a new path (UserError, exit 2, otherwise)."""
    return write_atomic(path, json.dumps(_clean(result), indent=2, allow_nan=False) + "\n")


def read_result(path: str | Path) -> dict[str, Any]:
    """Read a result.json back; raises SessionFileError for a missing or broken file."""
    p = Path(path)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SessionFileError(p, "no such file") from None
    except IsADirectoryError:
        raise SessionFileError(p, "is a directory, not a result file") from None
    except RecursionError:
        raise SessionFileError(p, "nested too deeply") from None
    except (ValueError, UnicodeDecodeError):
        raise SessionFileError(p, "not valid JSON") from None
    except OSError as exc:
        raise SessionFileError(p, f"cannot read: {exc.strerror or exc}") from None
    if not isinstance(data, dict):
        raise SessionFileError(p, "not a result file (not a JSON object)")
    return data


# ---------------------------------------------------------------------- proposals
GAIN_KP_MAX_KU = 2.0  # kp above twice Ku: no published rule comes near (the Ziegler-Nichols
#                      PID has 0.6 Ku); common practice, no source
GAIN_KI_MAX = 12.0  # ki above 12 Ku/Tu (ten times Ziegler-Nichols' 1.2 Ku/Tu)
GAIN_KD_MAX = 0.75  # kd above 0.75 Ku Tu (ten times Ziegler-Nichols' 0.075 Ku Tu)


def check_gains(kp: Any, ki: Any, kd: Any, *, where: str, ultimate_gain: float | None = None,
                ultimate_period: float | None = None, force: bool = False
                ) -> tuple[float, float, float]:
    """Parallel-form gains (kp output units per PV unit, ki per s, kd in s) checked before any
    motion; returns them as floats. Always refused: not a number, not finite, beyond the
    wire's float32 range. Refused unless `force`: a negative gain (the gains are for the
    sign-normalised loop), and, where the ultimate gain Ku and period Tu (s) are known, a gain
    far beyond every published rule (kp > 2 Ku, ki > 12 Ku/Tu, kd > 0.75 Ku Tu). UserError
    (exit 2) naming `where` and the gain."""
    out = []
    for name, v in (("kp", kp), ("ki", ki), ("kd", kd)):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise UserError(f"{where}: {name} must be a finite number, got {v!r}",
                            exit_code=EXIT_USAGE)
        if abs(v) > WIRE_FLOAT_MAX:
            raise UserError(f"{where}: {name} = {v:g} is too large for the wire format "
                            f"(float32, at most {WIRE_FLOAT_MAX:.3g})", exit_code=EXIT_USAGE)
        out.append(float(v))
    g_kp, g_ki, g_kd = out
    if force:
        return g_kp, g_ki, g_kd
    for name, v in zip(("kp", "ki", "kd"), out, strict=True):
        if v < 0:
            raise UserError(f"{where}: {name} = {v:g} is negative (the gains are for the "
                            "sign-normalised loop: set connection.sign = -1 for a loop whose PV "
                            "falls as the output rises); --force runs it anyway",
                            exit_code=EXIT_USAGE)
    ku, tu = ultimate_gain, ultimate_period
    if ku is not None and math.isfinite(ku) and ku > 0:
        bounds = [("kp", g_kp, GAIN_KP_MAX_KU * ku, f"{GAIN_KP_MAX_KU:g} x Ku")]
        if tu is not None and math.isfinite(tu) and tu > 0:
            bounds += [("ki", g_ki, GAIN_KI_MAX * ku / tu, f"{GAIN_KI_MAX:g} Ku/Tu"),
                       ("kd", g_kd, GAIN_KD_MAX * ku * tu, f"{GAIN_KD_MAX:g} Ku Tu")]
        for name, v, bound, text in bounds:
            if v > bound:
                raise UserError(f"{where}: {name} = {v:g} is beyond any published tuning rule "
                                f"for this loop (more than {text} = {bound:.4g}); --force runs "
                                "it anyway", exit_code=EXIT_USAGE)
    return g_kp, g_ki, g_kd


@dataclass(frozen=True)
class Proposals:
    """The proposals of a result.json, validated (see read_proposals).

    proposals: dicts with `name` (str), `kp`, `ki`, `kd` (floats), `predicted` (dict) and,
    where given, `deriv_filter_n` (> 0), `setpoint_weight` (0..1), `tracking_time` (>= 0 s),
    `default`; ultimate_gain (output units per PV unit) and ultimate_period (s) of the result,
    None when missing; model: the result's `model` dict or None.
    """

    path: str
    proposals: list[dict[str, Any]]
    ultimate_gain: float | None = None
    ultimate_period: float | None = None
    model: dict[str, Any] | None = None

    def pick(self, name: str | None) -> dict[str, Any]:
        """The proposal `name`, or with None the default one (else the first)."""
        if name is None:
            return next((q for q in self.proposals if q.get("default")), self.proposals[0])
        for q in self.proposals:
            if q["name"] == name:
                return q
        names = ", ".join(q["name"] for q in self.proposals)
        raise UserError(f"{self.path}: no proposal named {name!r} (there are: {names})",
                        exit_code=EXIT_USAGE)


def _positive_or_none(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(v) and v > 0 else None


def read_proposals(path: str | Path, *, force: bool = False) -> Proposals:
    """The one validating reader of a result.json's proposals (for `autotune step
    --from-result`); every problem is a UserError (exit 2) naming the file and the proposal,
    found before anything is connected. Each proposal's gains go through check_gains with the
    result's Ku and Tu (`force` lets negative or oversized gains through)."""
    res = read_result(path)
    where = str(path)
    props = res.get("proposals")
    if not isinstance(props, list) or not props:
        raise UserError(f"{where}: has no proposals", exit_code=EXIT_USAGE)
    ku = _positive_or_none(res.get("ultimate_gain"))
    tu = _positive_or_none(res.get("ultimate_period"))
    out: list[dict[str, Any]] = []
    for k, q in enumerate(props, 1):
        if not isinstance(q, dict):
            raise UserError(f"{where}: proposal {k} is not an object", exit_code=EXIT_USAGE)
        name = q.get("name")
        if not isinstance(name, str) or not name.strip() or len(name) > 200:
            raise UserError(f"{where}: proposal {k} has no usable name", exit_code=EXIT_USAGE)
        at = f"{where}: proposal {name}"
        kp, ki, kd = check_gains(q.get("kp"), q.get("ki", 0.0), q.get("kd", 0.0), where=at,
                                 ultimate_gain=ku, ultimate_period=tu, force=force)
        predicted = q.get("predicted") or {}
        if not isinstance(predicted, dict):
            raise UserError(f"{at}: predicted is not an object", exit_code=EXIT_USAGE)
        clean: dict[str, Any] = {**q, "name": name, "kp": kp, "ki": ki, "kd": kd,
                                 "predicted": predicted}
        for key, lo, hi in (("deriv_filter_n", 0.0, 1e6), ("setpoint_weight", 0.0, 1.0),
                            ("tracking_time", 0.0, 1e6)):
            if key not in q or q[key] is None:
                clean.pop(key, None)
                continue
            v = q[key]
            ok = (not isinstance(v, bool) and isinstance(v, (int, float))
                  and math.isfinite(v) and lo <= v <= hi
                  and (v > 0 or key != "deriv_filter_n"))
            if not ok:
                raise UserError(f"{at}: {key} = {v!r} is out of range ({lo:g}..{hi:g})",
                                exit_code=EXIT_USAGE)
            clean[key] = float(v)
        out.append(clean)
    model = res.get("model") if isinstance(res.get("model"), dict) else None
    return Proposals(where, out, ku, tu, model)


def export_csv(session: Session, path: str | Path, columns: Iterable[str] | None = None) -> Path:
    """Write the samples as CSV (header row t,pv,out,sp then the extra columns)."""
    p = Path(path)
    cols = list(columns) if columns is not None else list(SAMPLE_KEYS) + sorted(session.extra)
    data = []
    for c in cols:
        if c in SAMPLE_KEYS:
            data.append(getattr(session, c))
        elif c in session.extra:
            data.append(session.extra[c])
        else:
            raise KeyError(c)
    with open(p, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(cols)
        for row in zip(*data, strict=True):
            w.writerow(["" if (isinstance(v, float) and math.isnan(v)) or v is None
                        else (repr(float(v)) if isinstance(v, (float, np.floating)) else v)
                        for v in row])
    return p
