"""autotune.core.conditions: which sessions are one loop, what changed between them, and the
measured points a session gives the design.

Outside references: python-control (control.evalfr) for the model's response at the points;
the comparison's arithmetic is checked against hand-computed changes (analytic).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import control  # python-control, the outside reference
import numpy as np
import pytest

from autotune.core.conditions import (
    POINT_UNCERTAINTY_FLOOR,
    LoopFigures,
    LoopIdentity,
    compare_figures,
    loop_mismatch,
    measured_points,
    model_fits_points,
)
from autotune.core.lti import sopdt
from autotune.core.robust import MeasuredPoint


def test_loop_mismatch_names_the_difference() -> None:
    a = LoopIdentity(0, "rad/s", "%", 0.01)
    assert loop_mismatch(["a", "b"], [a, LoopIdentity(0, "rad/s", "%", 0.01)]) is None
    # units recorded on one side only are not held against it
    assert loop_mismatch(["a", "b"], [a, LoopIdentity(0, None, None, 0.01)]) is None
    why = loop_mismatch(["a", "b"], [a, LoopIdentity(1, "rad/s", "%", 0.01)])
    assert why is not None and why.startswith("b is not the same loop as a") and "axis 1" in why
    why = loop_mismatch(["a", "b", "c"], [a, a, LoopIdentity(0, "deg", "%", 0.01)])
    assert why is not None and "c is not" in why and "PV in deg" in why
    why = loop_mismatch(["a", "b"], [a, LoopIdentity(0, "rad/s", "V", 0.01)])
    assert why is not None and "output in V" in why
    why = loop_mismatch(["a", "b"], [a, LoopIdentity(0, "rad/s", "%", 0.02)])
    assert why is not None and "0.02 s tick" in why


def test_measured_points_uncertainty_and_model_fit() -> None:
    fourier = [SimpleNamespace(w=10.0, g=0.02 - 0.01j, snr=400.0),
               SimpleNamespace(w=30.0, g=-0.002 + 0.003j, snr=8.0)]
    pts = measured_points(fourier, static_gain=0.25, static_uncertainty=0.04)
    assert [p.w for p in pts] == [10.0, 30.0, 0.0]
    assert pts[0].uncertainty == POINT_UNCERTAINTY_FLOOR  # 2/400 below the floor
    assert pts[1].uncertainty == pytest.approx(2.0 / 8.0)
    assert pts[2].g == 0.25 and pts[2].uncertainty == pytest.approx(0.04)
    # a model fits points within their uncertainty (python-control evaluates the model)
    model = sopdt(0.25, 0.6, 0.08, 0.05)

    def g(w: float) -> complex:
        return complex(control.evalfr(control.tf(model.num, model.den), 1j * w)) * \
            np.exp(-1j * w * model.delay)

    exact = [MeasuredPoint(w, g(w) * (1 + 0.01j), 0.02) for w in (4.0, 12.0, 36.0)]
    assert model_fits_points(model, exact + [MeasuredPoint(0.0, 0.26, 0.05)])
    assert not model_fits_points(model, exact + [MeasuredPoint(0.0, 0.30, 0.05)])
    assert not model_fits_points(model, [MeasuredPoint(12.0, g(12.0) * 1.1, 0.05)])


def _figs(name: str, ku: float, tu: float, dead: float, *, unc: float = 0.01,
          static: float | None = 0.25, model: str = "sopdt", converged: bool = True
          ) -> LoopFigures:
    return LoopFigures(name, converged, "" if converged else "the relay had not converged",
                       ku, tu, static, dead, None, model,
                       {"ku": unc * ku, "tu": unc * tu, "dead_time": 0.005,
                        "static_gain": None, "dead_zone": None})


def test_comparison_sentence_for_a_riskier_loop() -> None:
    # loop gain 1/Ku up 40 %: Ku_ref / Ku = 1.4 (analytic); dead time 0.05 -> 0.075 (+50 %)
    ref = _figs("floor", 60.0, 0.40, 0.05)
    cur = _figs("carpet", 60.0 / 1.4, 0.40, 0.075, model="lag_n")
    cmp = compare_figures([ref, cur])
    assert cmp.reference == 0 and cmp.changes[0] == ()
    by = {c.figure: c for c in cmp.changes[1]}
    assert by["ku"].relative == pytest.approx(1 / 1.4 - 1)
    assert by["ku"].exceeds is True
    assert by["dead_time"].relative == pytest.approx(0.5) and by["dead_time"].exceeds is True
    assert by["tu"].exceeds is False  # no change
    assert by["static_gain"].exceeds is None  # uncertainty unknown: not judged
    assert cmp.model_changed == (False, True)
    assert cmp.sentence == ("carpet: the loop's gain rose by 40 %, dead time rose by 50 %: "
                            "gains tuned on floor may overshoot")


def test_comparison_within_the_uncertainty_and_a_gentler_loop() -> None:
    ref = _figs("a", 60.0, 0.40, 0.05, unc=0.05)
    same = _figs("b", 63.0, 0.41, 0.052, unc=0.05)  # 5 % apart, uncertainty 5 % each
    gentle = _figs("c", 90.0, 0.40, 0.05, unc=0.01)
    cmp = compare_figures([ref, same, gentle])
    assert all(c.exceeds is not True for c in cmp.changes[1])
    assert "b: no change beyond the uncertainty; gains tuned on a should hold" in cmp.sentence
    assert "c: the loop's gain fell by 33 %: gains tuned on a will be slower than designed" \
        in cmp.sentence


def test_comparison_lists_a_session_without_a_converged_relay() -> None:
    bad = LoopFigures("first", False, "no complete steady relay cycle")
    cmp = compare_figures([bad, _figs("b", 60.0, 0.4, 0.05), _figs("c", 60.0, 0.4, 0.05)])
    assert cmp.reference == 1  # the first converged one
    assert cmp.changes[0] == () and "not compared (no converged relay): first" in cmp.sentence
    none = compare_figures([bad])
    assert none.reference is None and "nothing to compare" in none.sentence
    # a missing figure (integrating loop: no static gain) is not judged
    integ = compare_figures([_figs("x", 20.0, 0.8, 0.06, static=None),
                             _figs("y", 20.0, 0.8, 0.06, static=None)])
    by = {c.figure: c for c in integ.changes[1]}
    assert by["static_gain"].relative is None and by["static_gain"].exceeds is None
    assert not math.isnan(by["ku"].relative or 0.0)
