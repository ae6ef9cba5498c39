"""Bad input never moves the motor and never ends in a traceback (issue 8).

Bad configuration (unknown key, wrong type, impossible limits), bad session files given to
`analyze`, serial port errors (busy, permission denied, vanished), no input evaluated as code,
TCP listeners on loopback by default. The CLI is driven in-process through `autotune.cli.main`
(its exit code and stderr are what the console script gives); the simulated board for the
limit checks is the mock device process on a real pty.
"""

from __future__ import annotations

import errno
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import serial

from autotune.cli import main
from autotune.errors import EXIT_LINK, EXIT_USAGE, UserError
from autotune.recorder import read_session
from protocol.link import classify_open_error
from tests.integration.conftest import start_mock_device

REPO = Path(__file__).resolve().parents[1]
SPEED = "20"


def run_cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(err: str) -> str:
    lines = [ln for ln in err.strip().splitlines() if ln.strip()]
    assert lines, "no message on stderr"
    assert "Traceback" not in err
    return lines[-1]


# ------------------------------------------------------------------ configuration
@pytest.mark.parametrize("body, key, problem", [
    ("[safety]\npv_windw = 2.0\n", "safety.pv_windw", "unknown key"),
    ("[saftey]\npv_window = 2.0\n", "saftey", "unknown section"),
    ("[safety]\npv_window = \"wide\"\n", "safety.pv_window", "expected a number"),
    ("[relay]\nmax_cycles = 2.5\n", "relay.max_cycles", "expected an integer"),
    ("[safety]\noutput_limit = -3\n", "safety.output_limit", "must be > 0"),
    ("[safety]\npv_window = 1.0\n[relay]\ntarget_amplitude = 0.8\n", "relay.target_amplitude",
     "half of safety.pv_window"),
    ("[safety\npv_window = 1.0\n", None, "not valid TOML"),    # out of range or binary: refused before connecting as well
    (None, None, "not UTF-8"),  # a binary file
    ("[safety]\npv_window = 1e308\n", "safety.pv_window", "wire format"),
    ("[safety]\noutput_limit = 1e39\n", "safety.output_limit", "wire format"),
    (f"[connection]\nbaudrate = {2**63 - 1}\n", "connection.baudrate", "out of range"),
    ("[connection]\nbaudrate = 50000000\n", "connection.baudrate", "bit/s"),
    ("[relay]\nmax_cycles = 9999999999\n", "relay.max_cycles", "out of range"),
    ("[safety]\npv_window = " + "[" * 5000 + "]" * 5000 + "\n", None, "TOML"),
])
def test_bad_config_names_file_key_problem(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                           body: str | None, key: str | None,
                                           problem: str) -> None:
    cfg = tmp_path / "bad.toml"
    if body is None:
        cfg.write_bytes(bytes(range(256)) * 8)  # a binary file
    else:
        cfg.write_text(body)
    out_dir = tmp_path / "out"
    code, out, err = run_cli(capsys, "tune", "--port", "sim", "--yes", "--config", str(cfg),
                           "--out", str(out_dir))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert str(cfg) in line and problem in line
    if key is not None:
        assert key in line
    assert "connected to" not in out
    assert not out_dir.exists()  # nothing was connected, nothing recorded, nothing moved


def test_output_limit_above_device_maximum(tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    cfg = tmp_path / "limits.toml"
    cfg.write_text("[safety]\noutput_limit = 150.0\nwatchdog = 2.0\n")
    out_dir = tmp_path / "out"
    code, _, err = run_cli(capsys, "tune", "--port", "sim", "--speed", SPEED, "--yes",
                           "--config", str(cfg), "--out", str(out_dir))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert str(cfg) in line and "safety.output_limit" in line
    assert "above the device's maximum output 100" in line
    # refused after the handshake, before the limits were loaded: no session, no motion
    assert not (out_dir / "session.jsonl").exists()


def test_window_narrower_than_noise_moves_nothing(tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    # the cart-wheel scenario's sensor: noise 0.025, resolution 0.05 (its TOML file)
    cfg = tmp_path / "narrow.toml"
    cfg.write_text("[safety]\npv_window = 0.2\nwatchdog = 2.0\n[relay]\ntarget_amplitude = 0.1\n")
    out_dir = tmp_path / "out"
    code, _, err = run_cli(capsys, "tune", "--port", "sim", "--speed", SPEED, "--yes",
                           "--config", str(cfg), "--out", str(out_dir))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert str(cfg) in line and "safety.pv_window" in line and "noise" in line
    s = read_session(out_dir / "session.jsonl")
    assert s.t.size > 0 and (s.out == 0.0).all()  # only the rest check ran, at zero output
    assert s.end is not None and s.end["stop_confirmed"] is True


# ------------------------------------------------------------------ session files
def good_session_lines() -> list[str]:
    header = {"type": "header", "format": "autotune-session", "version": 1, "config": {}}
    lines = [json.dumps(header)]
    for k in range(50):
        lines.append(json.dumps({"type": "sample", "t": 0.01 * k, "pv": 0.0, "out": 1.0,
                                 "sp": 0.0, "phase": "relay"}))
    lines.append(json.dumps({"type": "end", "reason": "converged"}))
    return lines


@pytest.mark.parametrize("name, content, problem", [
    ("garbage.jsonl", "this is not json\n", "not a session file"),
    ("binary.jsonl", None, "not a session file"),
    ("empty.jsonl", "", "empty file"),
    ("version.jsonl", json.dumps({"type": "header", "format": "autotune-session",
                                  "version": 99}) + "\n", "version 99 is not supported"),
    ("noheader.jsonl", json.dumps({"type": "sample", "t": 0}) + "\n", "not a header"),
    ("truncated.jsonl", "\n".join(good_session_lines())[:40], "not a session file"),
    ("broken_middle.jsonl", "\n".join(good_session_lines()[:10] + ['{"type": "sam'] +
                                      good_session_lines()[10:]) + "\n", "not valid JSON"),
    ("missing.jsonl", "MISSING", "no such file"),
])
def test_analyze_bad_session_files(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                   name: str, content: str | None, problem: str) -> None:
    p = tmp_path / name
    if content is None:
        p.write_bytes(bytes(range(256)) * 4)
    elif content != "MISSING":
        p.write_text(content)
    code, _, err = run_cli(capsys, "analyze", str(p))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert str(p) in line and problem in line


def test_analyze_session_cut_off_mid_line_is_read_with_a_warning(tmp_path: Path) -> None:
    text = "\n".join(good_session_lines()[:-1])  # no end record, last line cut short
    p = tmp_path / "cut.jsonl"
    p.write_text(text[:-7])
    s = read_session(p)
    assert s.end is None and s.warnings
    assert s.t.size == 49  # every complete sample line is kept (50 written, last cut)


# ------------------------------------------------------------------ serial ports
def test_port_vanished_or_missing(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    code, _, err = run_cli(capsys, "tune", "--port", "/dev/ttyNOPE-autotune", "--yes",
                           "--out", str(tmp_path / "o"))
    assert code == EXIT_LINK
    line = one_line_error(err)
    assert "/dev/ttyNOPE-autotune" in line and "autotune ports" in line


def test_port_busy(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    dev = start_mock_device("cart-wheel", speed=10.0)
    try:
        holder = serial.Serial(dev.port, exclusive=True)  # another program has the port
        try:
            code, _, err = run_cli(capsys, "tune", "--port", dev.port, "--yes",
                                   "--out", str(tmp_path / "o"))
        finally:
            holder.close()
    finally:
        dev.terminate()
    assert code == EXIT_LINK
    line = one_line_error(err)
    assert dev.port in line and "in use by another program" in line and "close it" in line


def test_port_permission_denied(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    # The message and the fix (the dialout group); the real open is tried where the test does
    # not run as root (root opens anything).
    exc = classify_open_error("/dev/ttyUSB0", OSError(errno.EACCES, "Permission denied"))
    assert "/dev/ttyUSB0" in str(exc) and "dialout" in str(exc)
    if os.geteuid() == 0:
        return
    p = tmp_path / "ttyLOCKED"
    p.write_text("")
    p.chmod(0)
    code, _, err = run_cli(capsys, "tune", "--port", str(p), "--yes", "--out",
                           str(tmp_path / "o"))
    assert code == EXIT_LINK
    line = one_line_error(err)
    assert str(p) in line and "dialout" in line


# ------------------------------------------------------------------ no code from input
def test_no_input_is_evaluated_as_code(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    marker = tmp_path / "pwned"
    payload = f"__import__('os').system('touch {marker}')"
    cfg = tmp_path / "evil.toml"
    cfg.write_text(f'[connection]\nport = "{payload}"\nplant = "{payload}"\n')
    code, _, err = run_cli(capsys, "tune", "--yes", "--config", str(cfg),
                           "--out", str(tmp_path / "o"))
    assert code != 0 and "Traceback" not in err
    code, _, err = run_cli(capsys, "tune", "--port", "sim", "--yes", "--faults", payload,
                           "--out", str(tmp_path / "o2"))
    assert code != 0 and "Traceback" not in err
    sess = tmp_path / "evil.jsonl"
    lines = good_session_lines()
    lines[0] = json.dumps({"type": "header", "format": "autotune-session", "version": 1,
                           "config": {"relay": {"hysteresis": payload}}, "sign": payload})
    sess.write_text("\n".join(lines) + "\n")
    code, _, err = run_cli(capsys, "analyze", str(sess))
    assert "Traceback" not in err
    assert not marker.exists()


def test_sources_have_no_code_evaluation() -> None:
    pattern = re.compile(r"\b(eval|exec)\(|pickle|marshal\.loads|yaml\.load\(|shell=True|"
                         r"os\.system\(|__import__\(")
    hits = []
    for pkg in ("autotune", "protocol", "mock_device"):
        for path in (REPO / pkg).rglob("*.py"):
            for n, line in enumerate(path.read_text().splitlines(), 1):
                if pattern.search(line):
                    hits.append(f"{path.relative_to(REPO)}:{n}: {line.strip()}")
    assert hits == []


# ------------------------------------------------------------------ loopback by default
@pytest.mark.parametrize("where", ["0", ":0"])
def test_tcp_listener_binds_loopback_by_default(where: str) -> None:
    proc = subprocess.Popen([sys.executable, "-m", "mock_device", "--plant", "cart-wheel",
                             "--tcp", where], cwd=REPO, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None
        url = proc.stdout.readline().strip()
        m = re.fullmatch(r"socket://127\.0\.0\.1:(\d+)", url)
        assert m, url
        port = int(m.group(1))
        # the kernel's table of listening sockets: local address 127.0.0.1 (0100007F)
        listening = []
        for line in Path("/proc/net/tcp").read_text().splitlines()[1:]:
            local, state = line.split()[1], line.split()[3]
            addr, p = local.split(":")
            if int(p, 16) == port and state == "0A":
                listening.append(addr)
        assert listening == ["0100007F"]
    finally:
        proc.terminate()
        proc.wait(5)
        for s in (proc.stdout, proc.stderr):
            if s is not None:
                s.close()


# ------------------------------------------------------------------ issue 18: found before motion
def assert_nothing_connected(out: str, out_dir: Path) -> None:
    assert "connected to" not in out
    assert not (out_dir / "session.jsonl").exists()


def test_out_not_a_directory_or_not_writable_exit_2_before_connecting(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    afile = tmp_path / "afile"
    afile.write_text("x")
    for out_dir, problem in ((afile, "not a directory"), (afile / "sub", "not writable")):
        code, out, err = run_cli(capsys, "tune", "--port", "sim", "--yes", "--out",
                                 str(out_dir))
        assert code == EXIT_USAGE
        line = one_line_error(err)
        assert str(out_dir) in line and problem in line
        assert "connected to" not in out
    # a session file that is a symbolic link is not written through
    target = tmp_path / "elsewhere.txt"
    target.write_text("keep me")
    d = tmp_path / "linked"
    d.mkdir()
    (d / "session.jsonl").symlink_to(target)
    code, out, err = run_cli(capsys, "tune", "--port", "sim", "--yes", "--out", str(d))
    assert code == EXIT_USAGE
    assert "symbolic link" in one_line_error(err) and "connected to" not in out
    assert target.read_text() == "keep me" and (d / "session.jsonl").is_symlink()


def test_out_on_a_read_only_filesystem_exit_2(tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    """A read-only mount (a small tmpfs; root may write anywhere else)."""
    mnt = tmp_path / "ro"
    mnt.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=64k", "tmpfs", str(mnt)],
                      capture_output=True).returncode != 0:
        pytest.skip("cannot mount a tmpfs here")
    try:
        code, out, err = run_cli(capsys, "tune", "--port", "sim", "--yes", "--out",
                                 str(mnt / "run"))
    finally:
        subprocess.run(["umount", str(mnt)], capture_output=True)
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert "not writable" in line and "read-only" in line
    assert "connected to" not in out


def session_with(tmp_path: Path, name: str, samples: list[str]) -> Path:
    header = json.dumps({"type": "header", "format": "autotune-session", "version": 1,
                         "config": {}})
    p = tmp_path / name
    p.write_text("\n".join([header, *samples, json.dumps({"type": "end", "reason": "x"})])
                 + "\n")
    return p


def sample_line(t: object, pv: object = 0.0, out: float = 1.0) -> str:
    return f'{{"type":"sample","t":{t},"pv":{pv},"out":{out},"sp":0.0,"phase":"relay"}}'


@pytest.mark.parametrize("name, lines, problem", [
    ("nested.jsonl", [sample_line(0.0), "[" * 100000 + "]" * 100000], "nested too deeply"),
    ("equal.jsonl", [sample_line(0.5) for _ in range(20)], "does not increase"),
    ("reversed.jsonl", [sample_line(round(1.0 - 0.01 * k, 2)) for k in range(50)],
     "does not increase"),
    ("huge.jsonl", [sample_line(0.01 * k, 1e308) for k in range(20)], "not a value"),
    ("inf.jsonl", [sample_line(0.01 * k, "1e999") for k in range(20)], "not a value"),
    ("nan_t.jsonl", [sample_line("null")], "not a number"),
])
def test_analyze_refuses_unusable_sessions(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                           name: str, lines: list[str], problem: str) -> None:
    p = session_with(tmp_path, name, lines)
    code, _, err = run_cli(capsys, "analyze", str(p))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert str(p) in line and problem in line
    assert not (tmp_path / "result.json").exists()


def test_analyze_refuses_to_write_over_a_device_or_a_link(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """result.json goes only over a regular file or a new path: /dev/null and a symbolic link
    are left as they are."""
    from autotune.recorder import write_result

    with pytest.raises(UserError, match="a device, not a regular file"):
        write_result("/dev/null", {"x": 1})
    assert Path("/dev/null").is_char_device()
    target = tmp_path / "target.json"
    target.write_text("{}")
    link = tmp_path / "result.json"
    link.symlink_to(target)
    with pytest.raises(UserError, match="symbolic link"):
        write_result(link, {"x": 1})
    assert link.is_symlink() and target.read_text() == "{}"
    fifo = tmp_path / "fifo"
    os.mkfifo(fifo)
    with pytest.raises(UserError, match="pipe"):
        write_result(fifo, {"x": 1})
    plain = tmp_path / "plain.json"
    plain.write_text("old")
    write_result(plain, {"x": 1})
    assert json.loads(plain.read_text()) == {"x": 1}
    assert sorted(q.name for q in tmp_path.iterdir()) == ["fifo", "plain.json", "result.json",
                                                           "target.json"]  # no temp left


def result_file(tmp_path: Path, proposals: object, **extra: object) -> Path:
    p = tmp_path / "result.json"
    p.write_text(json.dumps({"proposals": proposals, "ultimate_gain": 50.0,
                             "ultimate_period": 0.4, **extra}))
    return p


@pytest.mark.parametrize("proposals, problem", [
    ([1, 2], "proposal 1 is not an object"),
    ([{"kp": 1.0}], "no usable name"),
    ([{"name": "a", "kp": "big"}], "kp must be a finite number"),
    ([{"name": "a", "kp": 1.0, "ki": None}], "ki must be a finite number"),
    ([{"name": "a", "kp": 1e308}], "too large for the wire format"),
    ([{"name": "a", "kp": -3.0}], "negative"),
    ([{"name": "a", "kp": 10.0, "ki": -1.0}], "negative"),
    ([{"name": "a", "kp": 400.0}], "beyond any published tuning rule"),
    ([{"name": "a", "kp": 10.0, "kd": 100.0}], "beyond any published tuning rule"),
    ([{"name": "a", "kp": 10.0, "setpoint_weight": 3.0}], "setpoint_weight"),
    ([{"name": "a", "kp": 10.0, "predicted": [1]}], "predicted is not an object"),
    ([], "has no proposals"),
    ({"a": 1}, "has no proposals"),
])
def test_step_refuses_bad_proposals_before_connecting(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], proposals: object,
        problem: str) -> None:
    res = result_file(tmp_path, proposals)
    out_dir = tmp_path / "out"
    code, out, err = run_cli(capsys, "step", "--port", "sim", "--yes", "--from-result",
                             str(res), "--out", str(out_dir))
    assert code == EXIT_USAGE, err
    line = one_line_error(err)
    assert str(res) in line and problem in line
    assert_nothing_connected(out, out_dir)


def test_step_refuses_negative_manual_gains_unless_forced(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from autotune.recorder import check_gains, read_proposals

    code, out, err = run_cli(capsys, "step", "--port", "sim", "--yes", "--kp", "-2",
                             "--out", str(tmp_path / "o"))
    assert code == EXIT_USAGE and "negative" in one_line_error(err)
    assert "--force" in one_line_error(err)
    assert_nothing_connected(out, tmp_path / "o")
    # --force lets a negative or oversized gain through the one validating reader
    assert check_gains(-2.0, 0.0, 0.0, where="x", force=True) == (-2.0, 0.0, 0.0)
    res = result_file(tmp_path, [{"name": "wild", "kp": 400.0}])
    assert read_proposals(res, force=True).pick(None)["kp"] == 400.0
    with pytest.raises(UserError, match="too large"):
        check_gains(1e39, 0.0, 0.0, where="x", force=True)  # never: the wire cannot carry it


def test_bad_plant_file_is_exit_2_not_a_link_error(tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    plant = tmp_path / "huge.toml"
    plant.write_text("[plant]\nnum = [1e308]\nden = [1.0, 1.0]\n")
    code, out, err = run_cli(capsys, "tune", "--port", "sim", "--plant", str(plant), "--yes",
                             "--out", str(tmp_path / "o"))
    assert code == EXIT_USAGE
    line = one_line_error(err)
    assert "simulated board did not start" in line and "[plant] num" in line
    assert "out of range" in line
