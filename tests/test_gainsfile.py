"""The accepted-gains file parses back to the same gains, in every form."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.core.pid import PidGains, PidSettings, per_tick
from autotune.gainsfile import (
    GainsFileError,
    GainsRecord,
    code_block,
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
        predicted={"overshoot": 5.0},
    )
    base.update(kw)
    return GainsRecord(**base)  # type: ignore[arg-type]


def test_round_trip(tmp_path: Path) -> None:
    rec = _record()
    p = write_gains_file(tmp_path / "gains.toml", rec)
    back = read_gains_file(p)
    assert back.gains == rec.gains
    assert (back.period, back.deriv_filter_n, back.setpoint_weight, back.tracking_time) == (
        0.01, 8.0, 0.6, 0.2)
    assert (back.loop_mode, back.axis, back.output_limit) == ("device", 1, 40.0)
    assert back.origin == rec.origin
    assert back.measured == {"overshoot": 4.2, "rise_time": 0.3,
                             "load": {"peak_deviation": -0.4, "recovery_time": 0.8}}
    assert back.pid_settings() == PidSettings(rec.gains, 0.01, 8.0, 0.6, 0.2, -40.0, 40.0)


def test_all_forms_written(tmp_path: Path) -> None:
    rec = _record()
    doc = tomllib.loads(write_gains_file(tmp_path / "g.toml", rec).read_text())
    # Standard form Kc (e + 1/Ti ∫e + Td de/dt): Ti = kp/ki, Td = kd/kp (analytic).
    assert doc["standard"] == pytest.approx({"kc": 2.5, "ti": 0.5, "td": 0.05})
    # Per tick for ts = 0.01 s: ki*ts = 0.05; Tf = Td/N = 0.05/8; bd = kd/(Tf + ts) (analytic).
    tf = 0.05 / 8.0
    assert doc["per_tick"]["ki_ts"] == pytest.approx(0.05)
    assert doc["per_tick"]["bd"] == pytest.approx(0.125 / (tf + 0.01))
    assert doc["per_tick"]["ad"] == pytest.approx(tf / (tf + 0.01))
    assert doc["filter"] == pytest.approx({"n": 8.0, "tf": tf})
    assert doc["anti_windup"] == {"method": "back-calculation", "tracking_time": 0.2}
    assert doc["setpoint"] == {"weight": 0.6}


def test_clamping_and_pi_only(tmp_path: Path) -> None:
    rec = _record(gains=PidGains(1.0, 0.0, 0.0), tracking_time=None, output_limit=None,
                  measured={}, predicted={}, origin={})
    back = read_gains_file(write_gains_file(tmp_path / "g.toml", rec))
    assert back.gains == PidGains(1.0, 0.0, 0.0)
    assert back.tracking_time is None and back.output_limit is None
    doc = to_document(rec)
    assert doc["anti_windup"] == {"method": "clamping"}
    assert math.isinf(doc["standard"]["ti"])  # TOML keeps inf


@settings(max_examples=40, deadline=None)
@given(kp=st.floats(-1e3, 1e3, allow_nan=False).filter(lambda v: abs(v) > 1e-6),
       ki=st.floats(0, 1e3), kd=st.floats(0, 1e2), ts=st.floats(1e-4, 1.0))
def test_round_trip_property(tmp_path_factory: pytest.TempPathFactory, kp: float, ki: float,
                             kd: float, ts: float) -> None:
    path = tmp_path_factory.mktemp("g") / "g.toml"
    rec = _record(gains=PidGains(kp, ki, kd), period=ts)
    back = read_gains_file(write_gains_file(path, rec))
    assert back.gains == rec.gains and back.period == ts


def test_code_block_carries_the_per_tick_values() -> None:
    rec = _record()
    text = code_block(rec)
    c = per_tick(rec.gains, rec.period, rec.deriv_filter_n)
    assert f"KI_TS = {c['ki_ts']:.6g}" in text
    assert f"BD    = {c['bd']:.6g}" in text
    assert "ts = 0.01 s" in text and "U_MAX = 40" in text
    assert len(text.splitlines()) <= 14


@pytest.mark.parametrize(
    ("content", "message"),
    [
        ("format = 'x'\nversion = 1\n", "not an autotune gains file"),
        ("not toml ===", "not valid TOML"),
        ("format = 'autotune-gains'\nversion = 1\n[gains]\nkp = 1.0\nki = 0.0\n", "kd: missing"),
        ("format = 'autotune-gains'\nversion = 1\n[gains]\nkp = 1.0\nki = 0.0\nkd = 'a'\n",
         "kd: expected a number"),
    ],
)
def test_bad_files_name_the_problem(tmp_path: Path, content: str, message: str) -> None:
    p = tmp_path / "bad.toml"
    p.write_text(content)
    with pytest.raises(GainsFileError, match=message):
        read_gains_file(p)
