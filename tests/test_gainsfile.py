"""The accepted-gains file parses back to the same gains, in every form; it states the whole
controller; the C header beside it computes what autotune.core.pid.DiscretePid computes."""

from __future__ import annotations

import math
import shutil
import subprocess
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.core.pid import DiscretePid, PidGains, PidSettings, per_tick
from autotune.gainsfile import (
    GainsFileError,
    GainsRecord,
    c_header,
    code_block,
    code_path,
    read_gains_file,
    to_document,
    write_gains_file,
)


def _record(**kw: object) -> GainsRecord:
    base: dict[str, object] = dict(
        gains=PidGains(2.5, 5.0, 0.125), period=0.01, deriv_filter_n=8.0, setpoint_weight=0.6,
        tracking_time=0.2, loop_mode="device", axis=1, output_limit=40.0,
        origin={"session": "/tmp/run/session.jsonl", "proposal": "robust-pid"},
        measured={"overshoot": 4.2, "rise_time": 0.3, "settling_time": None,
                  "load": {"peak_deviation": -0.4, "recovery_time": 0.8}},
        predicted={"overshoot": 5.0}, actuator_limit=100.0,
        actuator_source="board handshake (max_output)",
    )
    base.update(kw)
    return GainsRecord(**base)  # type: ignore[arg-type]


def test_round_trip(tmp_path: Path) -> None:
    rec = _record()
    p, c = write_gains_file(tmp_path / "gains.toml", rec)
    assert c == tmp_path / "gains.h" == code_path(p) and c.exists()
    back = read_gains_file(p)
    assert back.gains == rec.gains
    assert (back.period, back.deriv_filter_n, back.setpoint_weight, back.tracking_time) == (
        0.01, 8.0, 0.6, 0.2)
    assert (back.loop_mode, back.axis, back.output_limit) == ("device", 1, 40.0)
    assert (back.actuator_limit, back.actuator_source) == (100.0, rec.actuator_source)
    assert back.origin == rec.origin
    assert back.measured == {"overshoot": 4.2, "rise_time": 0.3,
                             "load": {"peak_deviation": -0.4, "recovery_time": 0.8}}
    assert back.pid_settings() == PidSettings(rec.gains, 0.01, 8.0, 0.6, 0.2, -40.0, 40.0)


def test_the_file_states_the_whole_controller(tmp_path: Path) -> None:
    rec = _record(tracking_time=None)
    p, _ = write_gains_file(tmp_path / "g.toml", rec)
    text = p.read_text()
    doc = tomllib.loads(text)
    ctl = doc["controller"]
    assert ctl["form"] == "parallel" and ctl["derivative"] == "on measurement"
    assert ctl["setpoint_weight"] == 0.6 and ctl["anti_windup"] == "clamping"
    assert ctl["filter_n"] == 8.0 and ctl["period"] == 0.01
    assert ctl["filter_tf"] == pytest.approx(0.05 / 8.0)
    # the per-tick coefficients are the code's, and nothing unexplained sits beside them
    assert set(doc["per_tick"]) == {"kp", "ki_ts", "ad", "bd", "b", "ts"}
    assert "kd_ts" not in text
    for key in ("ki_ts =", "ad =", "bd ="):
        line = next(ln for ln in text.splitlines() if ln.startswith(key))
        assert "#" in line  # each coefficient says what it is
    # the limits: the actuator's and the tuning run's, apart
    assert doc["limits"] == {"actuator": 100.0, "actuator_source":
                             "board handshake (max_output)", "tuning_run": 40.0}
    # the header names setpoint weight, derivative on measurement, anti-windup, tick
    head = text.split("format =")[0]
    for words in ("setpoint weight 0.6", "derivative   on the measurement", "clamping",
                  "ts = 0.01 s", "+/- 40 output units", "+/- 100", "beside this file"):
        assert words in head, words
    assert "parallel form u = kp e" not in text  # the old, wrong one-line header


def test_all_forms_written(tmp_path: Path) -> None:
    rec = _record()
    p, _ = write_gains_file(tmp_path / "g.toml", rec)
    doc = tomllib.loads(p.read_text())
    # Standard form Kc (e + 1/Ti ∫e + Td de/dt): Ti = kp/ki, Td = kd/kp (analytic).
    assert doc["standard"] == pytest.approx({"kc": 2.5, "ti": 0.5, "td": 0.05})
    # Per tick for ts = 0.01 s: ki*ts = 0.05; Tf = Td/N = 0.05/8; bd = kd/(Tf + ts) (analytic).
    tf = 0.05 / 8.0
    assert doc["per_tick"]["ki_ts"] == pytest.approx(0.05)
    assert doc["per_tick"]["bd"] == pytest.approx(0.125 / (tf + 0.01))
    assert doc["per_tick"]["ad"] == pytest.approx(tf / (tf + 0.01))
    assert doc["controller"]["anti_windup"] == "back-calculation"
    assert doc["controller"]["tracking_time"] == 0.2


def test_clamping_and_pi_only(tmp_path: Path) -> None:
    rec = _record(gains=PidGains(1.0, 0.0, 0.0), tracking_time=None, output_limit=None,
                  actuator_limit=None, actuator_source="", measured={}, predicted={},
                  origin={})
    p, _ = write_gains_file(tmp_path / "g.toml", rec)
    back = read_gains_file(p)
    assert back.gains == PidGains(1.0, 0.0, 0.0)
    assert back.tracking_time is None and back.output_limit is None
    doc = to_document(rec)
    assert doc["controller"]["anti_windup"] == "clamping" and "limits" not in doc
    assert math.isinf(doc["standard"]["ti"])  # TOML keeps inf


def test_version_1_files_are_still_read(tmp_path: Path) -> None:
    p = tmp_path / "old.toml"
    p.write_text("format = 'autotune-gains'\nversion = 1\n[gains]\nkp = 2.0\nki = 1.0\n"
                 "kd = 0.1\n[loop]\nperiod = 0.01\nmode = 'host'\naxis = 2\n"
                 "output_limit = 30.0\n[filter]\nn = 10.0\n[anti_windup]\nmethod = "
                 "'clamping'\n[setpoint]\nweight = 0.5\n")
    rec = read_gains_file(p)
    assert rec.gains == PidGains(2.0, 1.0, 0.1) and rec.loop_mode == "host"
    assert (rec.axis, rec.output_limit, rec.setpoint_weight) == (2, 30.0, 0.5)


@settings(max_examples=40, deadline=None)
@given(kp=st.floats(-1e3, 1e3, allow_nan=False).filter(lambda v: abs(v) > 1e-6),
       ki=st.floats(0, 1e3), kd=st.floats(0, 1e2), ts=st.floats(1e-4, 1.0))
def test_round_trip_property(tmp_path_factory: pytest.TempPathFactory, kp: float, ki: float,
                             kd: float, ts: float) -> None:
    path = tmp_path_factory.mktemp("g") / "g.toml"
    rec = _record(gains=PidGains(kp, ki, kd), period=ts)
    back = read_gains_file(write_gains_file(path, rec)[0])
    assert back.gains == rec.gains and back.period == ts


def test_code_block_carries_the_per_tick_values() -> None:
    rec = _record()
    text = code_block(rec)
    c = per_tick(rec.gains, rec.period, rec.deriv_filter_n)
    assert f"KI_TS = {c['ki_ts']:.6g}" in text
    assert f"BD    = {c['bd']:.6g}" in text
    assert "ts = 0.01 s" in text and "U_MAX = 40" in text
    assert len(text.splitlines()) <= 14


# ---------------------------------------------------------------------------- the C header

HARNESS = r"""
#include <stdio.h>
#include "gains.h"
int main(void) {
    double sp, pv;
    at_pid_state s;
    at_pid_reset(&s, INTEGRAL);
    while (scanf("%lf %lf", &sp, &pv) == 2) {
        printf("%.17g\n", (double)at_pid_tick(&s, sp, pv));
    }
    return 0;
}
"""


def _compiler() -> str:
    cc = shutil.which("cc") or shutil.which("gcc") or shutil.which("clang")
    if cc is None:
        pytest.skip("no C compiler on this machine")
    return cc


def _run_c(tmp_path: Path, rec: GainsRecord, inputs: list[tuple[float, float]],
           real: str, integral: float) -> list[float]:
    (tmp_path / "gains.h").write_text(c_header(rec))
    (tmp_path / "main.c").write_text(HARNESS)
    exe = tmp_path / "pid"
    subprocess.run([_compiler(), "-std=c99", "-Wall", "-Wextra", "-Werror", "-O1",
                    f"-DAT_PID_REAL={real}", f"-DINTEGRAL={integral!r}", "-o", str(exe),
                    str(tmp_path / "main.c"), "-lm"], check=True, capture_output=True,
                   text=True, timeout=120)
    out = subprocess.run([str(exe)], input="".join(f"{a!r} {b!r}\n" for a, b in inputs),
                         capture_output=True, text=True, check=True, timeout=30)
    return [float(x) for x in out.stdout.split()]


@pytest.mark.parametrize("tracking", [None, 0.05])
def test_c_header_ticks_exactly_like_the_discrete_pid(tmp_path: Path, tracking) -> None:
    """Reference: autotune.core.pid.DiscretePid, the project's one PID algorithm (its
    difference equations are in its docstring). The header compiled in double precision must
    give the same output every tick, through a setpoint step, saturation (both anti-windup
    methods) and a PV that moves."""
    rec = _record(gains=PidGains(3.0, 40.0, 0.06), period=0.01, deriv_filter_n=10.0,
                  setpoint_weight=0.4, tracking_time=tracking, output_limit=5.0)
    pid = DiscretePid(rec.pid_settings())
    pid.reset(integral=0.7)
    inputs = [(0.0 if k < 5 else 2.0, 0.3 * math.sin(0.2 * k) + 0.01 * k) for k in range(200)]
    want = [pid.update(sp, pv) for sp, pv in inputs]
    assert max(abs(w) for w in want) == 5.0  # the run reaches the clamp
    got = _run_c(tmp_path, rec, inputs, "double", 0.7)
    assert len(got) == len(want)
    for k, (g, w) in enumerate(zip(got, want, strict=True)):
        assert g == pytest.approx(w, rel=1e-12, abs=1e-12), (k, g, w)
    # in float, as a board would build it: the same to single precision
    got32 = _run_c(tmp_path, rec, inputs[:1], "float", 0.7)
    assert got32[0] == pytest.approx(want[0], rel=1e-5)


def test_c_header_holds_the_same_coefficients_as_the_toml(tmp_path: Path) -> None:
    rec = _record()
    p, c = write_gains_file(tmp_path / "gains.toml", rec)
    doc = tomllib.loads(p.read_text())
    text = c.read_text()
    for key, macro in (("kp", "AT_PID_KP"), ("ki_ts", "AT_PID_KI_TS"), ("ad", "AT_PID_AD"),
                       ("bd", "AT_PID_BD"), ("b", "AT_PID_B"), ("ts", "AT_PID_TS")):
        line = next(ln for ln in text.splitlines() if ln.startswith(f"#define {macro} "))
        assert float(line.split()[2]) == doc["per_tick"][key], key
    assert "AT_PID_U_MAX 40.0" in text and "actuator takes up to 100" in text
    assert "gains.toml" in text


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("format = 'x'\nversion = 1\n", "not an autotune gains file"),
        ("not toml ===", "not valid TOML"),
        ("format = 'autotune-gains'\nversion = 1\n[gains]\nkp = 1.0\nki = 0.0\n", "kd: missing"),
        ("format = 'autotune-gains'\nversion = 1\n[gains]\nkp = 1.0\nki = 0.0\nkd = 'a'\n",
         "kd: expected a number"),
        ("format = 'autotune-gains'\nversion = 9\n", "unsupported version 9"),
        ("format = 'autotune-gains'\nversion = 2\n[gains]\nkp = 1.0\nki = 0.0\nkd = 0.0\n"
         "[controller]\nperiod = 0.01\nfilter_n = 10.0\nsetpoint_weight = 1.0\n"
         "anti_windup = 'magic'\n", "anti_windup: expected"),
    ],
)
def test_bad_files_name_the_problem(tmp_path: Path, content: str, message: str) -> None:
    p = tmp_path / "bad.toml"
    p.write_text(content)
    with pytest.raises(GainsFileError, match=message):
        read_gains_file(p)


def test_c_header_without_a_known_limit_compiles_and_never_clamps(tmp_path: Path) -> None:
    """Reference: autotune.core.pid.DiscretePid with no output limits."""
    rec = _record(gains=PidGains(3.0, 40.0, 0.06), tracking_time=None, output_limit=None,
                  actuator_limit=None)
    pid = DiscretePid(rec.pid_settings())
    inputs = [(1000.0, 0.0)] * 5
    want = [pid.update(sp, pv) for sp, pv in inputs]
    got = _run_c(tmp_path, rec, inputs, "double", 0.0)
    assert got == pytest.approx(want, rel=1e-12) and max(got) > 1000.0
