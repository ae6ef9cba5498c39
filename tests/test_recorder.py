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


def test_extra_keys_that_come_and_go_stay_aligned(tmp_path: Path) -> None:
    """A key that first appears late, one that stops, one on every other sample: each column
    is as long as the samples, None/NaN where a sample had no value (read in one pass)."""
    p = tmp_path / "s.jsonl"
    with SessionWriter(p, {}) as w:
        for k in range(30):
            extra = {"phase": "rest" if k < 10 else "relay"}
            if k >= 20:
                extra["state"] = 1
            if k < 5:
                extra["early"] = k
            if k % 2:
                extra["odd"] = "x"
            w.sample(0.01 * k, float(k), 0.0, 0.0, **extra)
        w.end("x")
    s = read_session(p)
    assert {k: v.size for k, v in s.extra.items()} == dict.fromkeys(
        ("phase", "early", "odd", "state"), 30)
    assert np.isnan(s.extra["state"][:20]).all() and (s.extra["state"][20:] == 1).all()
    assert list(s.extra["early"][:5]) == [0, 1, 2, 3, 4] and np.isnan(s.extra["early"][5:]).all()
    assert list(s.extra["odd"][:4]) == [None, "x", None, "x"]
    relay = read_session(p, phases={"relay"})  # only the samples kept are held
    assert relay.t.size == 20 and set(relay.extra["phase"]) == {"relay"}
    np.testing.assert_array_equal(relay.pv, np.arange(10, 30, dtype=float))
    assert "early" not in relay.extra  # only on samples that were not kept


def test_refused_sample_contents(tmp_path: Path) -> None:
    head = b'{"type":"header","format":"autotune-session","version":1}\n'
    cases = [
        (b'{"type":"sample","t":0.1,"pv":0,"out":0,"sp":0}\n'
         b'{"type":"sample","t":0.1,"pv":0,"out":0,"sp":0}\n', "line 3: sample time = 0.1 s"),
        (b'{"type":"sample","t":1e999,"pv":0,"out":0,"sp":0}\n', "not a value a device"),
        (b'{"type":"sample","t":0,"pv":0,"out":1e300,"sp":0}\n', r"out = 1e\+300"),
        (b'{"type":"sample","t":0,"pv":0,"out":0,"sp":0,"x":' + b"[" * 50000 + b"]" * 50000
         + b"}\n", "nested too deeply"),
        (b"".join(b'{"type":"sample","t":%d,"pv":0,"out":0,"sp":0,"k%d":1}\n' % (k, k)
                  for k in range(300)), "more than 256 different sample keys"),
    ]
    for body, words in cases:
        p = tmp_path / "bad.jsonl"
        p.write_bytes(head + body)
        with pytest.raises(SessionFileError, match=words):
            read_session(p)


def test_writer_keeps_its_first_failure_and_never_raises(tmp_path: Path) -> None:
    """A write that fails (here: the file closed under it, as a full disk fails a flush)
    leaves `error` set, calls on_error once, and drops everything after it."""
    p = tmp_path / "s.jsonl"
    seen: list[str] = []
    w = SessionWriter(p, {}, on_error=seen.append)
    w.sample(0.0, 0.0, 0.0, 0.0)
    w._f.close()  # every later write fails
    w.event(0.1, "x")
    w.sample(0.2, 0.0, 0.0, 0.0)
    w.close()
    assert w.error is not None and len(seen) == 1
    assert read_session(p).t.size == 1  # what was written before the failure is there


def test_writer_refuses_to_write_through_a_link(tmp_path: Path) -> None:
    target = tmp_path / "target"
    target.write_text("keep")
    (tmp_path / "session.jsonl").symlink_to(target)
    with pytest.raises(UserError, match="symbolic link"):
        SessionWriter(tmp_path / "session.jsonl", {})
    assert target.read_text() == "keep"
