"""`autotune compare`, `autotune analyze S S...` and `autotune analyze S --gains FILE` on
recorded sessions (written here from simulated relay runs of the cart-wheel loop and its loaded
variant, invented demo data).

Outside references: python-control (tests/pctruth.py, the sampled loop) for the Ms of the
judged gains on the true plants.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from autotune.cli import main
from autotune.core.lti import DelayedTF
from autotune.core.pid import PidGains
from autotune.gainsfile import GainsRecord, write_gains_file
from autotune.recorder import SessionWriter
from tests.pctruth import sampled_ms
from tests.relaysim import run_relay

TS = 0.01
EMPTY = DelayedTF((0.25,), (0.048, 0.68, 1.0), 0.05)
LOADED = DelayedTF((0.18,), (0.08, 1.08, 1.0), 0.075)


def _session(path: Path, plant: DelayedTF, *, axis: int = 0, tick: float = TS,
             cycles: int = 12) -> Path:
    tu = plant.ultimate_point()[1]
    rec = run_relay(plant.num, plant.den, plant.delay, ts=tick, amplitude=20.0,
                    hysteresis=0.01, n_cycles=cycles, period_guess=1.2 * tu, noise=0.002,
                    seed=3)
    header = {"verb": "tune", "sign": 1, "axis": axis, "device": {"tick": tick},
              "config": {"relay": {"hysteresis": 0.01, "target_amplitude": 0.5},
                         "safety": {"output_limit": 30.0}, "design": {"ms_target": 1.4}}}
    path.parent.mkdir(parents=True, exist_ok=True)
    with SessionWriter(path, header) as w:
        s = rec.settings
        w.event(0.0, "relay_settings", {"centre": s.centre, "bias": s.bias,
                                        "amplitude": s.amplitude, "hysteresis": s.hysteresis})
        for k in range(rec.t.size):
            w.sample(float(rec.t[k]), float(rec.pv[k]), float(rec.out[k]), s.centre,
                     phase="precheck:rest" if k < 20 else "relay")
        w.end("converged")
    return path


@pytest.fixture(scope="module")
def sessions(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("conditions")
    return {"empty": _session(d / "empty" / "session.jsonl", EMPTY),
            "loaded": _session(d / "loaded" / "session.jsonl", LOADED),
            "axis1": _session(d / "axis1" / "session.jsonl", EMPTY, axis=1),
            "tick2": _session(d / "tick2" / "session.jsonl", EMPTY, tick=0.02),
            "short": _session(d / "short" / "session.jsonl", EMPTY, cycles=1)}


def test_compare_prints_the_changes_and_the_sentence(sessions, tmp_path, capsys) -> None:
    out = tmp_path / "cmp.json"
    assert main(["compare", str(sessions["empty"]), str(sessions["loaded"]),
                 "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "empty" in text and "loaded" in text and "(reference)" in text
    # the loaded loop: Ku 92 against 60 (python-control, see the scenario file): loop gain
    # down about a third, ultimate period up
    assert "loaded: the loop's gain fell by" in text and "gains tuned on empty" in text
    doc = json.loads(out.read_text())
    assert doc["reference"] == "empty"
    ku = next(c for c in doc["sessions"][1]["changes"] if c["figure"] == "ku")
    assert ku["relative"] == pytest.approx(91.7 / 60.4 - 1, abs=0.08) and ku["exceeds"]


def test_compare_refuses_unreadable_input_and_other_loops(sessions, tmp_path, capsys) -> None:
    missing = tmp_path / "nowhere" / "session.jsonl"
    assert main(["compare", str(sessions["empty"]), str(missing)]) == 2
    assert str(missing) in capsys.readouterr().err
    assert main(["compare", str(sessions["empty"]), str(sessions["axis1"])]) == 2
    err = capsys.readouterr().err
    assert "axis1 is not the same loop as empty (axis 1 against axis 0)" in err
    assert main(["compare", str(sessions["empty"]), str(sessions["tick2"])]) == 2
    assert "0.02 s tick" in capsys.readouterr().err
    assert main(["compare", str(sessions["empty"])]) == 2
    assert "at least two" in capsys.readouterr().err


def test_joint_design_on_two_sessions(sessions, tmp_path, capsys) -> None:
    out = tmp_path / "joint.json"
    assert main(["analyze", str(sessions["empty"]), str(sessions["loaded"]),
                 str(sessions["short"]), "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "one design for 2 sessions: empty, loaded" in text
    assert "not designed on: short" in text
    doc = json.loads(out.read_text())
    # the single-session fields, with a per-session part
    assert {"ultimate_gain", "ultimate_period", "model", "proposals", "sessions"} <= set(doc)
    assert [s["name"] for s in doc["sessions"]] == ["empty", "loaded", "short"]
    assert [s["designed_on"] for s in doc["sessions"]] == [True, True, False]
    default = [p for p in doc["proposals"] if p["default"]]
    assert len(default) == 1 and default[0]["name"] == doc["default"]
    d = default[0]
    assert [s["session"] for s in d["per_session"]] == ["empty", "loaded"]
    assert all(s["meets_target"] for s in d["per_session"]) and d["runnable"]
    # and on the TRUE plants (python-control sampled loop): within the 1.5
    g = PidGains(d["kp"], d["ki"], d["kd"])
    for plant in (EMPTY, LOADED):
        assert sampled_ms(plant.num, plant.den, plant.delay, g, TS) <= 1.5
    # a proposal that breaks the target somewhere is flagged there
    zn = next(p for p in doc["proposals"] if p["name"] == "zn-pid")
    assert not all(s["meets_target"] for s in zn["per_session"])
    assert "!" in text


def test_given_gains_judged_on_a_session(sessions, tmp_path, capsys) -> None:
    # the robust PID designed on the empty cart's session: it keeps the target there and
    # breaks it on the loaded cart's session
    single = tmp_path / "empty.json"
    assert main(["analyze", str(sessions["empty"]), "--json", str(single)]) == 0
    res = json.loads(single.read_text())
    rp = next(p for p in res["proposals"] if p["name"] == "robust-pid")
    g = PidGains(rp["kp"], rp["ki"], rp["kd"])
    gains, _ = write_gains_file(tmp_path / "gains.toml",
                             GainsRecord(g, TS, output_limit=30.0,
                                         setpoint_weight=rp["setpoint_weight"]))
    capsys.readouterr()
    out = tmp_path / "judged.json"
    assert main(["analyze", str(sessions["empty"]), "--gains", str(gains),
                 "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "PASS: these gains keep Ms within 1.4" in text
    for word in ("Ms", "gain margin", "phase margin", "overshoot", "settling", "load IAE"):
        assert word in text
    doc = json.loads(out.read_text())
    assert doc["verdict"]["passed"] and doc["gains"]["predicted"]["ms"] <= 1.45
    judged = tmp_path / "judged-loaded.json"
    assert main(["analyze", str(sessions["loaded"]), "--gains", str(gains),
                 "--json", str(judged)]) == 1
    assert "FAIL: these gains break the design target" in capsys.readouterr().out
    # the judged Ms is that of the loaded session's model: python-control's sampled loop on
    # the model the analysis fitted (its num, den and dead time from result.json)
    loaded_res = tmp_path / "loaded.json"
    assert main(["analyze", str(sessions["loaded"]), "--json", str(loaded_res)]) == 0
    m = json.loads(loaded_res.read_text())["model"]
    ms = json.loads(judged.read_text())["gains"]["predicted"]["ms"]
    assert ms > 1.45
    assert ms == pytest.approx(sampled_ms(m["num"], m["den"], m["delay"], g, TS), rel=0.02)
    other, _ = write_gains_file(tmp_path / "axis1.toml", GainsRecord(g, TS, axis=1))
    assert main(["analyze", str(sessions["empty"]), "--gains", str(other)]) == 2
    assert "holds gains for axis 1, but empty is axis 0" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("format = 'something else'\n")
    assert main(["analyze", str(sessions["empty"]), "--gains", str(bad)]) == 2
    assert str(bad) in capsys.readouterr().err
