"""`autotune analyze SESSION`: a recorded session analyses to the same figures as the live run."""

from __future__ import annotations

import json

import pytest

from autotune.cli import main
from autotune.core.prechecks import assess_rest
from autotune.job.tune import analyse_record
from autotune.recorder import SessionWriter, read_session
from tests.relaysim import batch_run


def _write_session(path, rec, *, sign: float = 1.0, with_rest: bool = True) -> None:
    header = {"verb": "tune", "sign": sign, "device": {"tick": rec.ts},
              "config": {"relay": {"hysteresis": rec.settings.hysteresis},
                         "safety": {"output_limit": 100.0}}}
    rest_n = 20  # run_relay's rest segment: output at the bias, plant still
    rest = assess_rest(rec.t[:rest_n], sign * rec.pv[:rest_n], rec.out[:rest_n])
    with SessionWriter(path, header) as w:
        if with_rest:
            w.event(0.0, "precheck", rest.as_dict(), check="rest", ok=True)
        w.event(0.0, "relay_settings", {"centre": rec.settings.centre, "bias": rec.settings.bias,
                                        "amplitude": rec.settings.amplitude,
                                        "hysteresis": rec.settings.hysteresis,
                                        "asymmetry": 0.0})
        for k in range(rec.t.size):
            phase = "precheck:rest" if (k < rest_n and with_rest) else "relay"
            w.sample(float(rec.t[k]), float(sign * rec.pv[k]), float(rec.out[k]),
                     rec.settings.centre, phase=phase)
        w.end("converged")


def test_analyze_session_file_matches_the_record_path(tmp_path, capsys):
    """`analyze` reads the session into the same run record the live run builds and goes the
    same way (autotune.job.tune.analyse_record); the end-to-end comparison with a real tune is
    tests/integration/test_offline_matches_live.py."""
    from autotune.core.session_record import session_record

    rec, ku, tu = batch_run("sopdt T=1", 0.02, cycles=8)
    path = tmp_path / "session.jsonl"
    _write_session(path, rec)
    out = tmp_path / "res.json"
    assert main(["analyze", str(path), "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    record = session_record(read_session(path))
    assert record.rest is not None and record.phase[0] == "precheck:rest"
    fields, _ = analyse_record(record, {}, None)
    for key in ("ultimate_gain", "ultimate_period", "ultimate_gain_df", "static_gain"):
        assert result[key] == pytest.approx(fields[key], rel=1e-12), key
    assert result["model"]["kind"] == fields["model"]["kind"]
    assert result["end_reason"] == "converged"
    assert result["cycles_used"] == fields["cycles_used"]
    assert "proposals" in result
    # and both are right (python-control truth, see tests/relaysim.true_ultimate)
    assert result["ultimate_gain"] == pytest.approx(ku, rel=0.05)
    assert result["ultimate_period"] == pytest.approx(tu, rel=0.03)
    assert result["static_gain"] == pytest.approx(1.0, rel=0.05)  # the plant's: 1/(s+1)^2 e^-s
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
             "detail": {"deadband": 0.2, "spread": 0.0}}
    path.write_text("\n".join([text[0], json.dumps(event), *text[1:]]) + "\n")
    assert main(["analyze", str(path), "--json", str(tmp_path / "a.json")]) == 0
    assert main(["analyze", str(path), "--json", str(tmp_path / "b.json"),
                 "--deadband", "0"]) == 0
    a = json.loads((tmp_path / "a.json").read_text())
    b = json.loads((tmp_path / "b.json").read_text())
    assert a["dead_zone"] == 0.2 and b["dead_zone"] == 0.0
    assert a["identification"]["dead_zone"]["method"] == "given"
    # the same record seen through a dead zone of 0.2 on a relay of 1: the plant saw 0.8,
    # so the analysis on the corrected output reports Ku lower by that factor
    assert a["ultimate_gain"] == pytest.approx(0.8 * b["ultimate_gain"], rel=1e-6)
    assert b["ultimate_gain"] == pytest.approx(ku, rel=0.02)
