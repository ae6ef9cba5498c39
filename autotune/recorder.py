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
import json
import math
import os
import threading
import time
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import Any, TextIO

import numpy as np

from autotune import __version__
from autotune.errors import EXIT_USAGE, UserError

FORMAT = "autotune-session"
VERSION = 1
FLUSH_INTERVAL = 0.25  # s wall clock; the contract asks for at least every 0.5 s
SAMPLE_KEYS = ("t", "pv", "out", "sp")


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
        import dataclasses

        return _clean(dataclasses.asdict(value))
    if isinstance(value, complex):
        return {"re": _clean(value.real), "im": _clean(value.imag)}
    return str(value)


def dumps(obj: Any) -> str:
    """One JSON line (no newline) for `obj`, non-finite floats as null."""
    return json.dumps(_clean(obj), separators=(",", ":"), allow_nan=False)


class SessionWriter:
    """Writes one session.jsonl; thread-safe (the key thread may record an event).

    `header` is written at once; then `sample`, `event`, and finally `end` (also written by
    `close` with reason "unknown" if nobody did).
    """

    def __init__(self, path: str | Path, header: dict[str, Any]) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._f: TextIO = open(self.path, "w", encoding="utf-8")  # noqa: SIM115
        self._lock = threading.Lock()
        self._dirty = False
        self._last_flush = time.monotonic()
        self._ended = False
        self._closed = False
        self.samples_written = 0
        rec = {"type": "header", "format": FORMAT, "version": VERSION, "tool": f"autotune "
               f"{__version__}", "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        rec.update(header)
        self._write(rec, flush=True)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._flusher, name="session-flush", daemon=True)
        self._thread.start()

    def _write(self, rec: dict[str, Any], flush: bool) -> None:
        line = dumps(rec) + "\n"
        with self._lock:
            if self._closed:
                return
            self._f.write(line)
            now = time.monotonic()
            if flush or now - self._last_flush >= FLUSH_INTERVAL:
                self._f.flush()
                self._last_flush = now
                self._dirty = False
            else:
                self._dirty = True

    def _flusher(self) -> None:
        while not self._stop.wait(FLUSH_INTERVAL / 2):
            self.flush()

    def flush(self) -> None:
        """Push everything written so far to the operating system."""
        with self._lock:
            if self._dirty and not self._closed:
                self._f.flush()
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
        """Write an end record if none was written, flush and close."""
        if self._closed:
            return
        if not self._ended:
            self.end("unknown")
        self._stop.set()
        self._thread.join(timeout=1.0)
        with self._lock:
            self._f.flush()
            with contextlib.suppress(OSError):  # pipes, odd filesystems
                os.fsync(self._f.fileno())
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


def _num(v: Any) -> float:
    if v is None:
        return math.nan
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise TypeError
    return float(v)


def read_session(path: str | Path) -> Session:
    """Read a session.jsonl; raises SessionFileError for files that are not usable.

    Tolerated with a warning (in `Session.warnings`): a truncated last line (a killed process)
    and a missing end record. Refused: a missing or empty file, a first line that is not a
    session header, another format version, a broken line before the last.
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise SessionFileError(p, "no such file") from None
    except IsADirectoryError:
        raise SessionFileError(p, "is a directory, not a session file") from None
    except OSError as exc:
        raise SessionFileError(p, f"cannot read: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise SessionFileError(p, "not a session file (not UTF-8 text)") from None
    lines = text.split("\n")
    complete_last = text.endswith("\n")
    if complete_last:
        lines = lines[:-1]
    if not lines or not lines[0].strip():
        raise SessionFileError(p, "empty file, not a session file")
    warnings: list[str] = []
    records: list[dict[str, Any]] = []
    n = len(lines)
    for i, line in enumerate(lines):
        last = i == n - 1
        try:
            rec = json.loads(line)
            if not isinstance(rec, dict):
                raise ValueError("not an object")
        except ValueError:
            if i == 0:
                raise SessionFileError(p, "not a session file (line 1 is not a JSON object)")\
                    from None
            if last:
                warnings.append(f"line {i + 1} is cut short (the run was interrupted); "
                                "ignored it")
                break
            raise SessionFileError(p, f"line {i + 1} is not valid JSON") from None
        if last and not complete_last:
            warnings.append(f"line {i + 1} has no line end (the run was interrupted)")
        records.append(rec)
    header = records[0]
    if header.get("type") != "header":
        raise SessionFileError(p, "not a session file (the first record is not a header)")
    if header.get("format", FORMAT) != FORMAT:
        raise SessionFileError(p, f"not a session file (format {header.get('format')!r})")
    version = header.get("version")
    if version != VERSION:
        raise SessionFileError(p, f"session format version {version!r} is not supported "
                               f"(this tool reads version {VERSION})")
    cols: dict[str, list[float]] = {k: [] for k in SAMPLE_KEYS}
    extra_cols: dict[str, list[Any]] = {}
    events: list[dict[str, Any]] = []
    end: dict[str, Any] | None = None
    ns = 0
    for j, rec in enumerate(records[1:], start=2):
        kind = rec.get("type")
        if kind == "sample":
            try:
                for k in SAMPLE_KEYS:
                    cols[k].append(_num(rec.get(k)))
            except TypeError:
                raise SessionFileError(p, f"line {j}: sample with a non-numeric field")\
                    from None
            for k, v in rec.items():
                if k in SAMPLE_KEYS or k == "type":
                    continue
                col = extra_cols.setdefault(k, [None] * ns)
                col.append(v)
            ns += 1
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
    if end is None:
        warnings.append("no end record: the run was cut off; the data end at the last flush")
    extra: dict[str, np.ndarray] = {}
    for k, col in extra_cols.items():
        if all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool))
               for v in col):
            extra[k] = np.array([math.nan if v is None else float(v) for v in col])
        else:
            extra[k] = np.array(col, dtype=object)
    return Session(
        path=str(p),
        header=header,
        t=np.array(cols["t"], dtype=float),
        pv=np.array(cols["pv"], dtype=float),
        out=np.array(cols["out"], dtype=float),
        sp=np.array(cols["sp"], dtype=float),
        extra=extra,
        events=events,
        end=end,
        warnings=warnings,
    )


def write_result(path: str | Path, result: dict[str, Any]) -> Path:
    """Write result.json (indented, non-finite floats as null) atomically; returns the path."""
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(json.dumps(_clean(result), indent=2, allow_nan=False) + "\n",
                   encoding="utf-8")
    os.replace(tmp, p)
    return p


def read_result(path: str | Path) -> dict[str, Any]:
    """Read a result.json back; raises SessionFileError for a missing or broken file."""
    p = Path(path)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SessionFileError(p, "no such file") from None
    except (ValueError, UnicodeDecodeError):
        raise SessionFileError(p, "not valid JSON") from None
    if not isinstance(data, dict):
        raise SessionFileError(p, "not a result file (not a JSON object)")
    return data


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
