"""`autotune analyze SESSION`: a recorded session analyses to the same figures as the live run."""

from __future__ import annotations

import json

import numpy as np
import pytest

from autotune.cli import main
from autotune.core.analysis import analyse_relay
from autotune.recorder import SessionWriter
from tests.relaysim import batch_run


def _write_session(path, rec, *, sign: float = 1.0, with_rest: bool = True) -> None:
    header = {"verb": "tune", "sign": sign, "device": {"tick": rec.ts},
              "config": {"relay": {"hysteresis": rec.settings.hysteresis},
                         "safety": {"output_limit": 100.0}}}
    rest_n = 20  # run_relay's rest segment: output at the bias, plant still
    with SessionWriter(path, header) as w:
        w.event(0.0, "relay_settings", {"centre": rec.settings.centre, "bias": rec.settings.bias,
                                        "amplitude": rec.settings.amplitude,
                                        "hysteresis": rec.settings.hysteresis,
                                        "asymmetry": 0.0})
        for k in range(rec.t.size):
            phase = "precheck:rest" if (k < rest_n and with_rest) else "relay"
            w.sample(float(rec.t[k]), float(sign * rec.pv[k]), float(rec.out[k]),
                     rec.settings.centre, phase=phase)
        w.end("converged")


def test_analyze_session_file_matches_live_analysis(tmp_path, capsys):
    rec, ku, tu = batch_run("sopdt T=1", 0.02, cycles=8)
    path = tmp_path / "session.jsonl"
    _write_session(path, rec)
    out = tmp_path / "res.json"
    assert main(["analyze", str(path), "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    # live run: the runner hands the relay-phase samples, tick and rest noise to the analysis
    relay = slice(20, None)
    noise = float(np.std(rec.pv[:20] - np.polyval(np.polyfit(np.arange(20), rec.pv[:20], 1),
                                                  np.arange(20))))
    live = analyse_relay(rec.t[relay], rec.pv[relay], rec.out[relay], rec.settings,
                         noise_std=noise, ts=rec.ts, output_limit=100.0)
    assert result["ultimate_gain"] == pytest.approx(live.ku, rel=1e-9)
    assert result["ultimate_period"] == pytest.approx(live.tu, rel=1e-9)
    assert result["ultimate_gain_classic"] == pytest.approx(live.ku_classic, rel=1e-9)
    assert result["model"]["kind"] == live.model.kind
    assert result["end_reason"] == "converged"
    assert result["cycles_used"] == live.cycles_used
    assert "proposals" in result
    # and both are right (python-control truth, see tests/relaysim.true_ultimate)
    assert result["ultimate_gain"] == pytest.approx(ku, rel=0.05)
    assert result["ultimate_period"] == pytest.approx(tu, rel=0.03)
    printed = capsys.readouterr().out
    assert "ultimate gain" in printed and str(out) in printed


def test_analyze_reversed_sign_session(tmp_path):
    rec, ku, tu = batch_run("fopdt T=1", 0.0, cycles=8)
    path = tmp_path / "session.jsonl"
    _write_session(path, rec, sign=-1.0)
    assert main(["analyze", str(path)]) == 0
    result = json.loads((tmp_path / "result.json").read_text())
    assert result["ultimate_gain"] == pytest.approx(ku, rel=0.02)


def test_analyze_reports_a_session_without_cycles(tmp_path, capsys):
    path = tmp_path / "session.jsonl"
    with SessionWriter(path, {"device": {"tick": 0.01}}) as w:
        for k in range(50):
            w.sample(k * 0.01, 0.0, 1.0, 0.0, phase="relay")
        w.end("aborted")
    assert main(["analyze", str(path)]) != 0
    err = capsys.readouterr().err
    assert "analyze" in err and "relay" in err


def test_analyze_missing_file(tmp_path, capsys):
    assert main(["analyze", str(tmp_path / "none.jsonl")]) != 0
    assert "no such file" in capsys.readouterr().err


def test_analyze_takes_the_breakaway_dead_zone_out_as_the_live_run(tmp_path):
    rec, ku, tu = batch_run("fopdt T=1", 0.0, cycles=8)
    path = tmp_path / "session.jsonl"
    _write_session(path, rec)
    text = path.read_text().splitlines()
    event = {"type": "event", "t": 0.0, "kind": "precheck", "check": "breakaway",
             "detail": {"deadband": 0.2}}
    path.write_text("\n".join([text[0], json.dumps(event), *text[1:]]) + "\n")
    assert main(["analyze", str(path), "--json", str(tmp_path / "a.json")]) == 0
    assert main(["analyze", str(path), "--json", str(tmp_path / "b.json"),
                 "--deadband", "0"]) == 0
    a = json.loads((tmp_path / "a.json").read_text())
    b = json.loads((tmp_path / "b.json").read_text())
    assert a["deadband"]["deadband"] == 0.2 and "deadband" not in b
    # the same record seen through a dead zone of 0.2 on a relay of 1: the plant saw 0.8,
    # so the analysis on the corrected output reports Ku lower by that factor
    assert a["ultimate_gain"] == pytest.approx(0.8 * b["ultimate_gain"], rel=1e-6)
    assert b["ultimate_gain"] == pytest.approx(ku, rel=0.02)
