"""Loops for the confirmation-step tests and the step bench, well beyond the two scenarios.

Each `Loop` is a plant file for the mock device (run as its own process on a pty), the plant as
the loop sees it (for the design: `autotune.core.design.propose` with the analytic Ku/Tu of
`autotune.core.lti`), and how the step is run. `run_loop` powers one step through
`autotune.job.powered.PoweredRun` and `autotune.job.step.run_step`, as a job would after the
relay: a short hold at the bias (the relay's balanced bias: the output that holds the load),
a rest measurement (`autotune.core.prechecks.assess_rest`), then the step planned from the
prediction (`autotune.core.steptest.settings_from_config`).

Reference: python-control's sampled closed loop for the same gains and hold
(`reference_figures`: control.sample_system with a zero-order hold, the dead time as whole
ticks, the project's discrete PID as discrete transfer functions, control.feedback,
control.step_response, control.step_info on the same band).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import control
import numpy as np

from autotune.config import Config, load_config, with_overrides
from autotune.core import design
from autotune.core.lti import DelayedTF
from autotune.core.pid import PidGains
from autotune.core.prechecks import assess_rest
from autotune.core.steptest import StepCandidate, StepOutcome, settings_from_config
from autotune.job.powered import PoweredRun, RunOptions
from autotune.job.step import StepEnded, run_step
from tests.test_steptest_unit import pid_transfer_functions

OUTPUT_LIMIT = 60.0
RELAY_AMPLITUDE = 10.0  # output units: the relay amplitude the load is a fraction of
PASS_OVERSHOOT = 20.0  # %: gains predicted to overshoot less pass the default spec (25 % cap)


@dataclass(frozen=True)
class Loop:
    """One loop: plant num/den (s, highest power first), delay (s), device period (s), where the
    PID runs, load at the plant input (output units), sensor noise std and resolution (PV
    units), step size (PV units), the mock device's speed, and `gains`: None for the design's
    choice (`pick`), or explicit gains (too aggressive on purpose)."""

    name: str
    num: tuple[float, ...]
    den: tuple[float, ...]
    delay: float
    period: float = 0.01
    loop: str = "device"
    load: float = 0.0
    noise: float = 0.0
    resolution: float = 0.0
    size: float = 1.0
    speed: float = 25.0
    gains: PidGains | None = None
    setpoint_weight: float = 1.0
    note: str = ""
    extra: dict[str, Any] = field(default_factory=dict)

    def plant_toml(self) -> str:
        return (f"[plant]\nnum = {list(self.num)}\nden = {list(self.den)}\n"
                f"delay = {self.delay!r}\nload = {self.load!r}\n"
                f"[actuator]\nlimit = 100.0\n"
                f"[sensor]\nnoise = {self.noise!r}\nresolution = {self.resolution!r}\n"
                f"[device]\nperiod = {self.period!r}\nseed = 7\n")

    @property
    def extra_ticks(self) -> int:
        """Ticks of loop latency beyond the device PID's: one in a host loop."""
        return 1 if self.loop == "host" else 0

    def model(self) -> DelayedTF:
        """The plant as the device sees it."""
        return DelayedTF(self.num, self.den, self.delay)

    def seen(self) -> DelayedTF:
        """The plant as the loop sees it (host loop: one tick later)."""
        return DelayedTF(self.num, self.den, self.delay + self.extra_ticks * self.period)


def _resonant(k: float, t: float, delay: float, ratio: float, zeta: float) -> Loop:
    base = DelayedTF((k,), (t, 1.0), delay)
    ku_tu = base.ultimate_point()
    assert ku_tu is not None
    wr = ratio * 2.0 * math.pi / ku_tu[1]
    den = tuple(float(c) for c in np.polymul([t, 1.0], [1.0, 2.0 * zeta * wr, wr * wr]))
    return Loop("resonance", (k * wr * wr,), den, delay,
                note=f"mode at {ratio:g} x the ultimate frequency, damping {zeta:g}")


def _aggressive() -> Loop:
    """PI with kp 0.7 Ku and Ti = Tu/1.5 on the Tu 2.2 s loop: stable, decay ratio about 0.6
    (autotune.core.closedloop on the true plant), about 90 % overshoot."""
    ku_tu = DelayedTF((1.5,), (2.0, 1.0), 0.6).ultimate_point()
    assert ku_tu is not None
    kp = 0.7 * ku_tu[0]
    return Loop("too-aggressive", (1.5,), (2.0, 1.0), 0.6, gains=PidGains(kp, kp * 1.5 / ku_tu[1]),
                note="PI kp 0.7 Ku, Ti Tu/1.5")


AGGRESSIVE = _aggressive()

LOOPS: tuple[Loop, ...] = (
    Loop("fopdt-tu2", (1.5,), (2.0, 1.0), 0.6, note="Tu 2.2 s"),
    Loop("sopdt-tu4", (2.0,), (3.0, 4.0, 1.0), 0.5, note="Tu 4.0 s"),
    Loop("nmp-tu7", (-1.0, 1.0), (6.0, 5.0, 1.0), 0.3, speed=30.0,
         note="zero at +1/s, Tu 7.7 s"),
    Loop("integrating-load", (0.5,), (0.3, 1.0, 0.0), 0.2,
         load=-0.15 * RELAY_AMPLITUDE, note="load 15 % of the relay amplitude"),
    Loop("host-10hz", (1.0,), (1.5, 1.0), 0.2, period=0.1, loop="host", speed=6.0,
         note="10 Hz tick, host loop: one tick of transport delay"),
    Loop("coarse-encoder", (2.0,), (1.0, 1.0), 0.1, resolution=0.03,
         note="resolution 3 % of the step"),
    Loop("noisy-sensor", (1.5,), (2.0, 1.0), 0.6, noise=0.008,
         note="noise std 0.8 % of the step, Tu 2.2 s"),
    _resonant(1.5, 2.0, 0.6, 3.0, 0.05),
)


def ultimate(loop: Loop) -> tuple[float, float]:
    """Analytic Ku (output units per PV unit) and Tu (s) of the plant the loop sees."""
    ku_tu = loop.seen().ultimate_point()
    assert ku_tu is not None
    return ku_tu


def design_spec(loop: Loop) -> design.DesignSpec:
    return design.DesignSpec(ts=loop.period, step_size=loop.size, output_limit=OUTPUT_LIMIT,
                             pv_noise=loop.noise)


def pick(loop: Loop) -> tuple[str, PidGains, float, dict[str, Any]]:
    """(name, gains, setpoint weight b, predicted figures) for the step.

    The design's default proposal when it is predicted to overshoot less than PASS_OVERSHOOT,
    else the most robust stable proposal (lowest Ms) that is; explicit gains (AGGRESSIVE) get
    their prediction from autotune.core.design.predict on the same plant.
    """
    ku, tu = ultimate(loop)
    spec = design_spec(loop)
    plant = loop.seen()
    if loop.gains is not None:
        pred = design.predict(plant, loop.gains, spec, loop.setpoint_weight)
        return "manual", loop.gains, loop.setpoint_weight, dict(pred)
    props = design.propose(ku, tu, plant, spec)

    def fits(p: design.Proposal) -> bool:
        os_ = p.predicted.get("overshoot")
        st = p.predicted.get("settling_time")
        return bool(p.predicted.get("stable")) and isinstance(os_, float) and \
            math.isfinite(os_) and os_ < PASS_OVERSHOOT and isinstance(st, float) and \
            math.isfinite(st)

    chosen = next((p for p in props if p.default and fits(p)), None)
    if chosen is None:
        chosen = min((p for p in props if fits(p)), key=lambda p: float(p.predicted["ms"]))
    return chosen.name, chosen.gains, chosen.setpoint_weight, dict(chosen.predicted)


def config(window: float = 5.0) -> Config:
    # Device watchdog 30 s of device time: at --speed 30 that is 1 s of wall clock, and a
    # sample gap of 15 s (the host waits 4 gaps, 2 s of wall clock, for a sample), so a busy
    # test machine trips neither (the watchdog and the gap have their own tests).
    return with_overrides(load_config(None), {"safety.output_limit": OUTPUT_LIMIT,
                                              "safety.pv_window": window,
                                              "safety.watchdog": 30.0,
                                              "safety.max_sample_gap": 15.0,
                                              "safety.max_duration": 600.0})


@dataclass
class LoopRun:
    """What `run_loop` produced: the outcome (None: stopped before the step), the run, the
    proposal name, b, the predicted figures, Tu, the session directory, the wall seconds."""

    outcome: StepOutcome | None
    run: PoweredRun
    name: str
    gains: PidGains
    setpoint_weight: float
    predicted: dict[str, Any]
    tu: float
    out_dir: Path


def run_loop(loop: Loop, tmp: Path, *, bias: float | None = None, speed: float | None = None,
             window: float = 5.0, hold_bias: float = 3.0, back: bool = True) -> LoopRun:
    """One confirmation step of `loop` on the mock device process.

    bias: the output the step starts from (None: the output that balances the load, as the
    relay's balanced bias); the output is held there for `hold_bias` s of device time and the
    last second is the rest check (noise, resolution, drift). back: return to the start value
    after the step (False: the loop holds the stepped setpoint; shorter runs for the tests).
    """
    name, gains, b, predicted = pick(loop)
    _, tu = ultimate(loop)
    tmp.mkdir(parents=True, exist_ok=True)
    plant = tmp / f"{loop.name}.toml"
    plant.write_text(loop.plant_toml())
    balanced = -loop.load
    bias = balanced if bias is None else bias
    cfg = config(window)
    out = tmp / loop.name
    opts = RunOptions(port="sim", yes=True, out_dir=out, plant=str(plant),
                      speed=loop.speed if speed is None else speed, keys=False, verb="step",
                      stdout=open("/dev/null", "w"))  # noqa: SIM115
    run = PoweredRun(cfg, opts)
    outcome = None
    with run:
        run.arm()
        t0 = None
        rest: list[Any] = []
        run.set_output(balanced)
        while True:
            rec = run.next_sample()
            run.set_output(balanced)
            t0 = rec.t if t0 is None else t0
            if rec.t - t0 >= hold_bias - 1.0:
                rest.append(rec)
            if rec.t - t0 >= hold_bias:
                break
        report = assess_rest([r.t for r in rest], [r.pv for r in rest],
                             [r.output for r in rest])
        cand = StepCandidate(name, gains, predicted)
        settings, _ = settings_from_config(
            cfg, loop.loop, size=loop.size, candidate=cand, ts=loop.period, tu=tu,
            rest=report, bias=bias, model=loop.model(), setpoint_weight=b,
            elapsed=rec.t - (run.t_start or rec.t))
        if not back:
            settings = dataclasses.replace(settings, plan=dataclasses.replace(
                settings.plan, return_to_start=False))
        try:
            outcome = run_step(run, cand, settings)
        except StepEnded as ended:
            outcome = ended.outcome
            raise ended.ended from None
    run.end_session()
    return LoopRun(outcome, run, name, gains, b, predicted, tu, out)


def reference_figures(loop: Loop, outcome: StepOutcome, t_end: float,
                      band: float | None = None) -> dict[str, float]:
    """python-control's figures of the same sampled loop (gains, b, derivative filter, hold):
    the plant sampled with a zero-order hold (control.sample_system), dead time as whole
    ticks, the discrete PID as discrete transfer functions, closed with control.feedback;
    control.step_response over `t_end` s and control.step_info on the outcome's band (or
    `band`, a fraction of the step). The loop is built in state space (control.ss)."""
    cr, cy = pid_transfer_functions(outcome.pid)
    ts = loop.period
    m = round(loop.delay / ts) + loop.extra_ticks
    assert abs((m - loop.extra_ticks) * ts - loop.delay) < 1e-9, "dead time must be whole ticks"
    # state space: the closed loop's transfer-function polynomials (order ~ the dead time in
    # ticks) lose digits; the same loop in state space does not
    g0 = control.ss(control.sample_system(control.tf(list(loop.num), list(loop.den)), ts,
                                          method="zoh"))
    gd = g0 * control.ss(control.tf([1.0], [1.0] + [0.0] * m, ts))
    t_ry = control.feedback(gd, control.ss(cy)) * control.ss(cr)
    t = np.arange(int(round(t_end / loop.period)) + 1) * loop.period
    resp = control.step_response(t_ry, t)
    y = np.asarray(resp.outputs).ravel()
    if band is None:
        band = outcome.band_choice.fraction if outcome.band_choice is not None else 0.02
    info = control.step_info(y, t, yfinal=1.0, SettlingTimeThreshold=band)
    return {"overshoot": float(info["Overshoot"]), "settling_time": float(info["SettlingTime"]),
            "rise_time": float(info["RiseTime"])}


def device_times(session_t: np.ndarray) -> float:
    """Device seconds a session spans."""
    return float(session_t[-1] - session_t[0]) if session_t.size else 0.0
