"""The robust design over a set of constraints (several plant models, measured points), the
default rule, the detune sequence and given gains judged on a condition.

Outside references: python-control 0.10 (the sampled loop of tests/pctruth.py: ZOH-sampled
plant, the DiscretePid; control.stability_margins with a Padé approximant for the continuous
loop; control.evalfr), and analytic results named beside each check.
"""

from __future__ import annotations

import math

import control  # python-control, the outside reference
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from autotune.core import design, robust
from autotune.core.lti import DelayedTF, fopdt, sopdt
from autotune.core.pid import PidGains
from autotune.core.robust import MeasuredPoint
from tests.pctruth import sampled_controller, sampled_ms, sampled_plant

TS = 0.01
# the cart-wheel loop and its loaded variant (invented demo data, see mock_device/scenarios)
EMPTY = sopdt(0.25, 0.6, 0.08, 0.05)
LOADED = DelayedTF((0.18,), (0.08, 1.08, 1.0), 0.075)


def _pc_ms(plant: DelayedTF, g: PidGains) -> float:
    return sampled_ms(plant.num, plant.den, plant.delay, g, TS)


def _pc_continuous_ms(plant: DelayedTF, g: PidGains, n: float = 10.0) -> float:
    """1/stability margin of C G with a 12th-order Padé dead time (python-control); C the PID
    with derivative filter Tf = kd/(kp N)."""
    pn, pd = control.pade(plant.delay, 12)
    c = control.tf([g.kp, g.ki], [1.0, 0.0])
    if g.kd:
        c = c + control.tf([g.kd, 0.0], [g.kd / (g.kp * n), 1.0])
    loop = c * control.tf(plant.num, plant.den) * control.tf(pn, pd)
    _, _, sm, *_ = control.stability_margins(loop)
    return 1.0 / sm


# ------------------------------------------------------------------ measured points


def test_point_loop_and_clearance_match_python_control() -> None:
    # L at a point = C(e^{j w ts}) g H(j w), H the zero-order hold (1 - e^{-j w ts})/(j w ts)
    # (analytic); C from python-control's discrete PID (tests/pctruth.py) by control.evalfr.
    g = PidGains(15.0, 60.0, 1.2)
    for w, u in ((5.0, 0.0), (12.0, 0.05), (40.0, 0.2)):
        gp = complex(EMPTY.freq_response(w))
        pt = MeasuredPoint(w, gp, u)
        z = np.exp(1j * w * TS)
        c = complex(control.evalfr(sampled_controller(g, TS), z))
        hold = (1 - np.exp(-1j * w * TS)) / (1j * w * TS)
        ref = c * gp * hold
        assert robust.point_loop(pt, g, 10.0, TS) == pytest.approx(ref, rel=1e-9)
        assert robust.point_clearance(pt, g, 10.0, TS) == pytest.approx(
            abs(1 + ref) - u * abs(ref), rel=1e-9)
    # the static gain: infinite loop gain with integral action, kp K without it (analytic)
    static = MeasuredPoint(0.0, 0.25 + 0j, 0.05)
    assert robust.point_clearance(static, g) == math.inf
    assert robust.point_clearance(static, PidGains(4.0)) == pytest.approx(2.0 - 0.05 * 1.0)
    assert math.isnan(robust.points_sensitivity((), g))


@settings(max_examples=60, deadline=None)
@given(ar=st.floats(-3, 3), ai=st.floats(-3, 3), br=st.floats(-2, 2), bi=st.floats(-2, 2),
       u=st.floats(0.0, 0.45), r=st.floats(0.5, 0.9))
def test_point_exclusions_are_the_violated_set(ar: float, ai: float, br: float, bi: float,
                                               u: float, r: float) -> None:
    # Analytic: ki is excluded exactly where |a + ki b| - u |a - 1 + ki b| < r; checked on a
    # dense grid away from the interval ends.
    a, b = complex(ar, ai), complex(br, bi)
    if abs(b) < 1e-3:
        return
    cuts = robust._point_exclusions(np.array([a]), np.array([b]), np.array([u]), r)
    ks = np.linspace(0.0, 20.0 / abs(b), 4001)
    margin = np.abs(a + ks * b) - u * np.abs(a - 1 + ks * b) - r
    inside = np.zeros(ks.size, dtype=bool)
    for lo, hi in cuts:
        inside |= (ks >= lo) & (ks <= hi)
    clear = np.abs(margin) > 1e-6
    assert np.array_equal(inside[clear], (margin < 0)[clear])


# ------------------------------------------------------------------ robust design over a set


def test_joint_pi_is_the_maximum_by_brute_force_and_meets_the_bound() -> None:
    # Independent search: for each kp on a grid, bisection on ki with the largest Ms over both
    # plants from loop_margins (no closed-form bound); the optimiser is within 0.5 % of it.
    # Its Ms on each plant: python-control's stability margin of the continuous loop.
    plants = (fopdt(1.0, 1.0, 0.3), fopdt(1.8, 1.3, 0.45))
    res = robust.robust_pi_set(plants)
    assert res.stable and len(res.ms_each) == 2
    best = 0.0
    for kp in np.linspace(0.2, 1.6, 15) * res.gains.kp:
        def worst(ki: float, kp: float = kp) -> float:
            return max(robust.loop_margins(p, PidGains(kp, ki)).ms for p in plants)
        if worst(1e-9) > 1.4:
            continue
        lo, hi = 0.0, 5.0 * res.gains.ki
        for _ in range(22):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if worst(mid) <= 1.4 else (lo, mid)
        best = max(best, lo)
    assert res.gains.ki >= best * 0.995
    assert res.gains.ki <= best * 1.02
    ms = [_pc_continuous_ms(p, res.gains) for p in plants]
    assert max(ms) == pytest.approx(1.4, abs=0.02)
    # the joint design never gets more ki than the harder plant alone
    alone = [robust.robust_pi(p).gains.ki for p in plants]
    assert res.gains.ki <= min(alone) * (1 + 1e-6)


def test_joint_pid_on_the_cart_loops_keeps_the_bound_on_both_python_control() -> None:
    # Reference: Ms of the sampled loop (python-control, tests/pctruth.py). Each plant's own
    # robust PID breaks the bound on the other; the joint one keeps it on both.
    joint = robust.robust_pid_set((EMPTY, LOADED), (), 1.4, 10.0, TS)
    assert joint.stable
    for p in (EMPTY, LOADED):
        assert _pc_ms(p, joint.gains) <= 1.42
    alone_empty = robust.robust_pid(EMPTY, 1.4, 10.0, TS)
    alone_loaded = robust.robust_pid(LOADED, 1.4, 10.0, TS)
    assert _pc_ms(LOADED, alone_empty.gains) > 1.8
    assert _pc_ms(EMPTY, alone_loaded.gains) > 1.8
    assert joint.gains.ki < min(alone_empty.gains.ki, alone_loaded.gains.ki)


def test_design_held_to_measured_points_keeps_ms_there_on_the_true_plant() -> None:
    # The model is the empty cart; the "measurements" are the loaded cart's exact response
    # (python-control's frequency response of LOADED with its dead time, control.evalfr) at
    # frequencies around its sensitivity peak. Held to them (5 % uncertainty), the design keeps
    # |1 + L| >= 1/1.4 at every point of the TRUE loop (python-control sampled loop), where
    # the design on the model alone does not.
    ws = np.array([3.0, 4.5, 6.0, 8.0, 11.0])
    g_true = [complex(control.evalfr(control.tf(LOADED.num, LOADED.den), 1j * w))
              * np.exp(-1j * w * LOADED.delay) for w in ws]
    pts = tuple(MeasuredPoint(float(w), g, 0.05) for w, g in zip(ws, g_true, strict=True))
    free = robust.robust_pid(EMPTY, 1.4, 10.0, TS)
    held = robust.robust_pid(EMPTY, 1.4, 10.0, TS, points=pts)
    assert held.ms_points <= 1.4 + 0.003 and held.ms <= 1.4 + 0.003

    def one_plus_l(g: PidGains) -> np.ndarray:
        loop = sampled_controller(g, TS) * sampled_plant(LOADED.num, LOADED.den, LOADED.delay,
                                                         TS)
        resp = control.frequency_response(loop, ws)
        lj = np.asarray(resp.magnitude).ravel() * np.exp(1j * np.asarray(resp.phase).ravel())
        return np.abs(1.0 + lj)

    assert np.min(one_plus_l(held.gains)) >= (1 / 1.4) * 0.995
    assert np.min(one_plus_l(free.gains)) < 1 / 1.4
    assert held.gains.ki < free.gains.ki


# ------------------------------------------------------------------ proposals over conditions


def test_joint_proposals_default_meets_the_target_on_every_condition() -> None:
    spec = design.DesignSpec(ts=TS, output_limit=30.0, step_size=0.5)
    conds = [design.Condition("empty", EMPTY, *EMPTY.ultimate_point()),
             design.Condition("loaded", LOADED, *LOADED.ultimate_point())]
    res = design.design_proposals(conds, spec)
    p = res.get(res.default or "")
    assert p is not None and p.default and p.meets_target
    for c in conds:  # python-control sampled loop
        assert _pc_ms(c.model, p.gains) <= 1.4 + MS_SLACK
    d = p.as_dict()
    assert [s["session"] for s in d["per_session"]] == ["empty", "loaded"]
    assert d["predicted"]["ms"] == max(s["predicted"]["ms"] for s in d["per_session"])
    assert d["runnable"] and d["meets_target"]
    # the rules come from the lowest Ku (the empty cart) and are flagged where they break
    zn = res.get("zn-pid")
    assert zn is not None and "empty (lowest Ku)" in zn.source
    assert not zn.meets_target and any(not f.meets_target for f in zn.per_condition)
    assert "every session" in res.note


MS_SLACK = 0.02  # the design's hold model against the exact sampled loop


def test_a_point_known_to_no_better_than_its_own_size_blocks_nothing() -> None:
    """A fifth harmonic buried in a coarse encoder's steps (measured to +/-600 %, as on a
    camera mast with a 10 % encoder) holds -1 inside its uncertainty for any gains: it must
    neither make the proposals unrunnable nor their Ms at the points infinite. The points that
    say anything still bind: the true fifth-harmonic response (python-control's frequency
    response, control.evalfr) at +/-20 % is held to Ms 1.4 by the design."""
    plant = sopdt(0.25, 0.6, 0.08, 0.05)
    ku, tu = plant.ultimate_point()
    w1 = 2 * math.pi / tu
    pc = control.tf(plant.num, plant.den)
    true5 = complex(control.evalfr(pc, 5j * w1)) * complex(np.exp(-5j * w1 * plant.delay))
    good = MeasuredPoint(w1, complex(plant.freq_response(w1)), 0.02, 1)
    junk = MeasuredPoint(5 * w1, 30.0 * true5, 6.0, 5)  # wildly off, and says so
    spec = design.DesignSpec()
    res = design.design_proposals([design.Condition("m", plant, ku, tu, (good, junk))], spec)
    chosen = res.get(res.default) if res.default else None
    assert chosen is not None and chosen.runnable, res.note
    assert math.isfinite(float(chosen.predicted["ms_points"]))
    honest = MeasuredPoint(5 * w1, true5, 0.2, 5)
    res2 = design.design_proposals([design.Condition("m", plant, ku, tu, (good, honest))], spec)
    kept = res2.get(res2.default) if res2.default else None
    assert kept is not None and float(kept.predicted["ms_points"]) <= 1.4 + design.MS_TOLERANCE
    # a point beyond the bound alone: nothing to judge at the points
    assert math.isnan(robust.points_sensitivity((junk,), chosen.gains, spec.n, TS))


def test_default_without_a_qualified_proposal_is_the_most_robust_and_says_so() -> None:
    plant = sopdt(1.0, 1.0, 0.5, 0.5)
    spec = design.DesignSpec(max_settling_time=0.01)  # no loop settles in 10 ms
    res = design.design_proposals([design.Condition("m", plant, *plant.ultimate_point())], spec)
    assert res.default is not None and "no proposal meets the spec" in res.note
    safe = [p for p in res.proposals if p.meets_target]
    chosen = res.get(res.default)
    assert chosen is not None
    assert float(chosen.predicted["ms"]) == min(float(p.predicted["ms"]) for p in safe)


def test_a_model_that_fails_validation_prefers_pi_and_is_marked_unreliable() -> None:
    lag = sopdt(1.0, 5.0, 1.0, 0.1)  # robust-pid is the default on a valid model
    valid = design.design_proposals([design.Condition("m", lag)])
    assert valid.default == "robust-pid" and not valid.warnings
    bad = design.design_proposals([design.Condition("m", lag, model_valid=False)])
    assert bad.default == "robust-pi"
    assert bad.warnings and "unreliable" in bad.warnings[0]
    assert all(p.as_dict()["reliable"] is False for p in bad.proposals)


def test_spec_from_config() -> None:
    spec = design.spec_from_config({"ms_target": 1.3, "max_overshoot": 5.0, "step_size": None},
                                   30.0, 0.5, 0.01, n=8.0)
    assert (spec.ms_target, spec.max_overshoot, spec.step_size, spec.output_limit, spec.ts,
            spec.n) == (1.3, 5.0, 0.5, 30.0, 0.01, 8.0)
    assert design.spec_from_config({}, None, None, None) == design.DesignSpec()


# ------------------------------------------------------------------ detune


def test_detune_sequence_is_a_new_design_at_each_lower_ms_python_control() -> None:
    # Each step: the robust optimum at the next Ms target (its Ms on the sampled loop by
    # python-control), then the derivative removed, then nothing gentler.
    spec = design.DesignSpec(ts=TS, step_size=0.5)
    cond = design.Condition("empty", EMPTY, *EMPTY.ultimate_point())
    res = design.design_proposals([cond], spec)
    cur = res.get(res.default or "")
    assert cur is not None and cur.name == "robust-pid"
    seen = []
    while cur is not None:
        seen.append(cur)
        cur = design.detune_design([cond], cur, spec)
    assert [p.name for p in seen] == ["robust-pid", "robust-pid-ms1.25", "robust-pid-ms1.15",
                                      "robust-pi-ms1.15"]
    for p, target in zip(seen, (1.4, 1.25, 1.15, 1.15), strict=True):
        assert _pc_ms(EMPTY, p.gains) == pytest.approx(target, abs=MS_SLACK)
        assert {"overshoot", "settling_time", "iae_load", "ms"} <= set(p.predicted)
    kis = [p.gains.ki for p in seen]
    assert kis == sorted(kis, reverse=True)
    assert seen[-1].gains.kd == 0.0
    # a detune is not the old factor: the gains' ratios change
    assert seen[1].gains.kp / seen[1].gains.ki != pytest.approx(seen[0].gains.kp /
                                                                 seen[0].gains.ki, rel=0.02)
    # the derivative removed at the same robustness
    no_d = design.detune_design([cond], seen[0], spec, remove_derivative=True)
    assert no_d is not None and no_d.name == "robust-pi-ms1.4" and no_d.gains.kd == 0.0
    # an aggressive rule detunes to the robust design at the first target below its Ms
    zn = res.get("zn-pid")
    assert zn is not None and float(zn.predicted["ms"]) > 1.5
    assert design.detune_design([cond], zn, spec).name == "robust-pid-ms1.4"


# ------------------------------------------------------------------ given gains


def test_given_gains_verdict() -> None:
    spec = design.DesignSpec(ts=TS, step_size=0.5)
    empty = design.Condition("empty", EMPTY, *EMPTY.ultimate_point())
    loaded = design.Condition("loaded", LOADED, *LOADED.ultimate_point())
    g = robust.robust_pid(EMPTY, 1.4, 10.0, TS).gains
    ok, sentence = design.gains_verdict(design.evaluate([empty], "given", g, spec), spec)
    assert ok and "keep Ms within 1.4" in sentence
    p = design.evaluate([loaded], "given", g, spec)
    ok, sentence = design.gains_verdict(p, spec)
    assert not ok and "break the design target" in sentence and "Ms" in sentence
    # python-control agrees that the loaded loop breaks it
    assert _pc_ms(LOADED, g) > 1.45
    wild = design.evaluate([empty], "given", PidGains(200.0, 500.0, 0.0), spec)
    ok, sentence = design.gains_verdict(wild, spec)
    assert not ok and not wild.runnable and sentence.startswith("do not run")


def test_detune_from_a_result_file_entry(tmp_path) -> None:
    # The front ends hold result.json, not objects: the condition and the proposal are read
    # back from it (JSON round trip, nan written as null) and detune the same way.
    from autotune.core.conditions import condition_of_result
    from autotune.recorder import read_result, write_result

    spec = design.DesignSpec(ts=TS, step_size=0.5)
    cond = design.Condition("empty", EMPTY, *EMPTY.ultimate_point())
    res = design.design_proposals([cond], spec)
    path = write_result(tmp_path / "result.json", {
        "ultimate_gain": cond.ku, "ultimate_period": cond.tu,
        "model": {"kind": "sopdt", "num": list(EMPTY.num), "den": list(EMPTY.den),
                  "delay": EMPTY.delay},
        "fourier": [], "proposals": [p.as_dict() for p in res.proposals]})
    back = read_result(path)
    again = condition_of_result("empty", back)
    assert again.model == EMPTY and again.ku == cond.ku
    entry = next(p for p in back["proposals"] if p["default"])
    current = design.Proposal.from_dict(entry)
    direct = design.detune_design([cond], res.get(res.default or ""), spec)
    via_file = design.detune_design([again], current, spec)
    assert direct is not None and via_file is not None
    assert via_file.name == direct.name == "robust-pid-ms1.25"
    assert via_file.gains.ki == pytest.approx(direct.gains.ki, rel=1e-9)
