"""Session files: writer, tolerant reader, refused files, result.json and CSV export."""

from __future__ import annotations

import csv
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from autotune.errors import UserError
from autotune.recorder import (
    FLUSH_INTERVAL,
    SessionFileError,
    SessionWriter,
    export_csv,
    read_result,
    read_session,
    write_result,
)


def make_session(path: Path, n: int = 50, end: bool = True) -> None:
    with SessionWriter(path, {"config": {"relay": {"bias": 0.0}}, "device": {"name": "x"}}) as w:
        w.event(0.0, "phase", "rest", phase="precheck:rest")
        for k in range(n):
            w.sample(k * 0.01, math.sin(k / 5), 1.0 if k % 10 < 5 else -1.0, 0.0,
                     phase="relay", state=1 if k % 10 < 5 else -1)
        w.event(n * 0.01, "converged", {"cycles": 3})
        if end:
            w.end("converged", cycles=3)


def test_round_trip(tmp_path: Path) -> None:
    p = tmp_path / "session.jsonl"
    make_session(p)
    s = read_session(p)
    assert s.header["type"] == "header" and s.header["version"] == 1
    assert s.header["device"] == {"name": "x"}
    assert s.t.shape == (50,) and s.t.dtype == float
    np.testing.assert_allclose(s.pv, np.sin(np.arange(50) / 5), rtol=0, atol=1e-15)
    assert set(s.extra) == {"phase", "state"}
    assert s.extra["state"][0] == 1.0 and s.extra["state"][7] == -1.0
    assert s.phase_mask("relay").all()
    assert [e["kind"] for e in s.events] == ["phase", "converged"]
    assert s.reason == "converged" and s.end["cycles"] == 3
    assert s.warnings == []
    sel = s.select(s.t > 0.2)
    assert sel["t"].size == 29 and sel["state"].size == 29


def test_non_finite_written_as_null(tmp_path: Path) -> None:
    p = tmp_path / "s.jsonl"
    with SessionWriter(p, {}) as w:
        w.sample(0.0, float("nan"), float("inf"), 0.0)
        w.end("x", value=np.float32(1.5), arr=np.arange(2))
    lines = p.read_text().splitlines()
    assert json.loads(lines[1])["pv"] is None  # strict JSON, no NaN token
    s = read_session(p)
    assert math.isnan(s.pv[0]) and math.isnan(s.out[0])
    assert s.end == {"type": "end", "reason": "x", "value": 1.5, "arr": [0, 1]}


def test_truncated_last_line_tolerated(tmp_path: Path) -> None:
    p = tmp_path / "s.jsonl"
    make_session(p, end=False)
    raw = p.read_bytes()
    p.write_bytes(raw[:-1] + b'{"type":"sample","t":0.5,"pv"')  # cut mid-record
    s = read_session(p)
    assert s.t.size == 50
    assert s.end is None and s.reason is None
    assert any("cut short" in w for w in s.warnings)
    assert any("no end record" in w for w in s.warnings)


@pytest.mark.parametrize(
    ("content", "words"),
    [
        (b"", "empty file"),
        (b"hello world\n", "not a session file"),
        (b'[1, 2]\n', "not a session file"),
        (b'{"type":"sample","t":0}\n', "first record is not a header"),
        (b'{"type":"header","format":"autotune-session","version":99}\n', "version 99"),
        (b'{"type":"header","format":"something-else","version":1}\n', "not a session file"),
        (b'{"type":"header","format":"autotune-session","version":1}\n{"type":"sample",\n'
         b'{"type":"end","reason":"x"}\n', "line 2 is not valid JSON"),
        (b'{"type":"header","format":"autotune-session","version":1}\n'
         b'{"type":"sample","t":"a","pv":1,"out":0,"sp":0}\n', "non-numeric"),
        (b'{"type":"header","format":"autotune-session","version":1}\n{"type":"blob"}\n',
         "unknown record type"),
        (b"\xff\xfe\x00", "not UTF-8"),
    ],
)
def test_bad_files_refused_clearly(tmp_path: Path, content: bytes, words: str) -> None:
    p = tmp_path / "bad.jsonl"
    p.write_bytes(content)
    with pytest.raises(SessionFileError) as err:
        read_session(p)
    assert isinstance(err.value, UserError)
    assert str(p) in str(err.value) and words in str(err.value)
    assert "\n" not in str(err.value)


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(SessionFileError, match="no such file"):
        read_session(tmp_path / "nothing.jsonl")
    with pytest.raises(SessionFileError, match="directory"):
        read_session(tmp_path)


def test_flushed_while_running(tmp_path: Path) -> None:
    """Samples reach the file within the flush interval even when no more samples come."""
    p = tmp_path / "s.jsonl"
    w = SessionWriter(p, {})
    for k in range(5):
        w.sample(k * 0.01, 0.0, 0.0, 0.0)
    deadline = time.monotonic() + 10 * FLUSH_INTERVAL
    while time.monotonic() < deadline:
        if p.read_text().count("\n") == 6:
            break
        time.sleep(0.02)
    assert p.read_text().count("\n") == 6
    w.event(0.05, "limit", "x")  # events are flushed at once
    assert p.read_text().count("\n") == 7
    w.close()
    assert read_session(p).reason == "unknown"  # close() writes an end record if none


def test_killed_writer_leaves_readable_file(tmp_path: Path) -> None:
    """SIGKILL a process that writes samples; the file parses up to its last flush."""
    p = tmp_path / "s.jsonl"
    code = (
        "import sys, time\n"
        "from autotune.recorder import SessionWriter\n"
        f"w = SessionWriter({str(p)!r}, {{}})\n"
        "k = 0\n"
        "while True:\n"
        "    w.sample(k * 0.01, float(k), 0.0, 0.0); k += 1\n"
        "    if k == 200: print('go', flush=True)\n"
        "    time.sleep(0.0005)\n"
    )
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE)
    assert proc.stdout is not None
    assert proc.stdout.readline().strip() == b"go"
    time.sleep(3 * FLUSH_INTERVAL)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    s = read_session(p)
    assert s.end is None
    assert s.t.size >= 200
    np.testing.assert_array_equal(s.pv, np.arange(s.t.size, dtype=float))


def test_result_and_csv(tmp_path: Path) -> None:
    r = write_result(tmp_path / "out" / "result.json",
                     {"ultimate_gain": np.float64(2.5), "uncertainty": {"ultimate_gain": math.nan},
                      "proposals": [], "end_reason": "converged"})
    back = read_result(r)
    assert back["ultimate_gain"] == 2.5 and back["uncertainty"]["ultimate_gain"] is None
    (tmp_path / "bad.json").write_text("{")
    with pytest.raises(SessionFileError):
        read_result(tmp_path / "bad.json")
    p = tmp_path / "session.jsonl"
    make_session(p, n=20)
    s = read_session(p)
    c = export_csv(s, tmp_path / "session.csv")
    rows = list(csv.reader(c.open()))
    assert rows[0] == ["t", "pv", "out", "sp", "phase", "state"]
    assert len(rows) == 21
    assert float(rows[3][1]) == pytest.approx(math.sin(2 / 5), abs=1e-15)
    assert rows[3][4] == "relay"
