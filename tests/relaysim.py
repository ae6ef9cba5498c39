"""In-process relay experiment on a simulated plant, sampled like the real board (test data).

Device tick k at t_k = k ts: pv_k = sensor(plant output at t_k); the relay decides u_k from
pv_k; u_k is held over [t_k, t_k+1) (mock_device.plant.LtiPlant, exact ZOH with dead time).
A rest segment at the bias output comes first, as after the rest precheck.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from autotune.core.relay import Relay, RelaySettings
from mock_device.plant import LtiPlant, Sensor


@dataclass(frozen=True)
class RelayRecord:
    """A simulated session: t (s), pv (PV units), out (output units), the settings, tick."""

    t: np.ndarray
    pv: np.ndarray
    out: np.ndarray
    settings: RelaySettings
    ts: float
    noise: float
    resolution: float


def run_relay(num, den, delay: float, *, ts: float, amplitude: float = 1.0,
              hysteresis: float = 0.0, bias: float = 0.0, centre: float = 0.0,
              n_cycles: int = 10, period_guess: float | None = None, duration: float | None = None,
              noise: float = 0.0, resolution: float = 0.0, load: float = 0.0,
              rest: int = 20, output_limit: float = 1e9, seed: int = 0) -> RelayRecord:
    """Run a relay experiment: `rest` ticks at the bias, then the relay for `duration` s
    (default n_cycles * period_guess). PV = plant output + noise (std, PV units), quantised to
    `resolution`; `load` is a constant disturbance at the plant input (output units)."""
    if duration is None:
        if period_guess is None:
            raise ValueError("give duration or period_guess")
        duration = n_cycles * period_guess
    settings = RelaySettings(centre=centre, bias=bias, amplitude=amplitude,
                             hysteresis=hysteresis)
    relay = Relay(settings, output_limit)  # autotune.core.relay: hysteresis on e = centre - pv
    plant = LtiPlant(num, den, delay, max_step=ts)
    sensor = Sensor(noise=noise, resolution=resolution, offset=centre,
                    rng=np.random.default_rng(seed))
    n = rest + int(round(duration / ts))
    t = np.arange(n) * ts
    pv = np.empty(n)
    out = np.empty(n)
    # The plant simulates deviations from the operating point (bias output, PV at the centre);
    # the load steps in when the relay starts.
    for k in range(n):
        pv[k] = sensor.read(plant.y)
        uk = bias if k < rest else relay.update(float(t[k]), pv[k])
        out[k] = uk
        plant.advance(uk - bias + (load if k >= rest else 0.0), ts)
    return RelayRecord(t, pv, out, settings, ts, noise, resolution)


# ---------------------------------------------------------------------------- test batch
# The test batch of Åström and Hägglund, "Revisiting the Ziegler-Nichols step response method
# for PID control", J. Process Control 14 (2004): a subset of each family, parameters from
# memory (dead time normalised to 1 s where the family has one).
def _poly(*roots: float) -> list[float]:
    return [float(c) for c in np.real(np.poly(roots))]


def _lags(*tcs: float) -> list[float]:
    den = np.array([1.0])
    for tc in tcs:
        den = np.polymul(den, [tc, 1.0])
    return [float(c) for c in den]


BATCH: dict[str, tuple[list[float], list[float], float]] = {
    # first order plus dead time e^{-s}/(1 + sT)
    "fopdt T=0.1": ([1.0], _lags(0.1), 1.0),
    "fopdt T=0.5": ([1.0], _lags(0.5), 1.0),
    "fopdt T=1": ([1.0], _lags(1.0), 1.0),
    "fopdt T=5": ([1.0], _lags(5.0), 1.0),
    "fopdt T=20": ([1.0], _lags(20.0), 1.0),
    # second order plus dead time e^{-s}/(1 + sT)^2
    "sopdt T=0.1": ([1.0], _lags(0.1, 0.1), 1.0),
    "sopdt T=1": ([1.0], _lags(1.0, 1.0), 1.0),
    "sopdt T=10": ([1.0], _lags(10.0, 10.0), 1.0),
    # 1/(s + 1)^n
    "lag^3": ([1.0], _lags(1, 1, 1), 0.0),
    "lag^4": ([1.0], _lags(1, 1, 1, 1), 0.0),
    "lag^8": ([1.0], _lags(*([1.0] * 8)), 0.0),
    # four-pole lags 1/((s+1)(as+1)(a^2 s+1)(a^3 s+1))
    "4pole a=0.2": ([1.0], _lags(1, 0.2, 0.04, 0.008), 0.0),
    "4pole a=0.5": ([1.0], _lags(1, 0.5, 0.25, 0.125), 0.0),
    # integrator plus lag plus dead time e^{-s}/(s(1 + sT))
    "int T=0.1": ([1.0], _lags(0.1) + [0.0], 1.0),
    "int T=1": ([1.0], _lags(1.0) + [0.0], 1.0),
    "int T=5": ([1.0], _lags(5.0) + [0.0], 1.0),
    # non-minimum phase (1 - a s)/(s + 1)^3
    "nmp a=0.2": ([-0.2, 1.0], _lags(1, 1, 1), 0.0),
    "nmp a=0.5": ([-0.5, 1.0], _lags(1, 1, 1), 0.0),
    "nmp a=1": ([-1.0, 1.0], _lags(1, 1, 1), 0.0),
    "nmp a=2": ([-2.0, 1.0], _lags(1, 1, 1), 0.0),
}


def true_ultimate(num, den, delay: float) -> tuple[float, float]:
    """Ku, Tu of num/den e^{-delay s} from python-control's exact frequency response.

    The rational part is evaluated by python-control (control.tf(...)(jw)); the dead time is
    applied exactly as e^{-j w delay}; the phase is unwrapped on a dense grid and the first
    -180 degree crossing refined by bisection (scipy brentq).
    """
    import control
    from scipy import optimize

    sys_ = control.tf(num, den)

    def g(w: float) -> complex:
        return complex(sys_(1j * w)) * np.exp(-1j * w * delay)

    grid = np.logspace(-3, 3, 20000)
    resp = np.array([g(w) for w in grid])
    ph = np.unwrap(np.angle(resp))
    # principal branch at low frequency: integrators give -90 deg each
    n_int = len(den) - 1 - max(i for i, c in enumerate(den) if c != 0.0)
    ph -= 2 * np.pi * np.round((ph[0] + n_int * np.pi / 2) / (2 * np.pi))
    i = int(np.nonzero(ph < -np.pi)[0][0])

    def f(w: float) -> float:
        return float(ph[i - 1] + np.angle(g(w) / resp[i - 1]) + np.pi)

    w180 = optimize.brentq(f, grid[i - 1], grid[i], xtol=1e-14)
    return 1.0 / abs(g(w180)), 2 * np.pi / w180


def with_mode(num, den, delay: float, factor: float, zeta: float = 0.15
              ) -> tuple[list[float], list[float], float]:
    """The plant num/den with `delay` (s) times a lightly damped mode
    wn^2 / (s^2 + 2 zeta wn s + wn^2) at `factor` times its ultimate frequency (a compliant
    belt, a flexible mast)."""
    _, tu = true_ultimate(num, den, delay)
    wn = factor * 2 * np.pi / tu
    return (list(np.array(num) * wn**2), list(np.polymul(den, [1.0, 2 * zeta * wn, wn**2])),
            delay)


def batch_run(name: str, noise_frac: float, *, cycles: int = 12, seed: int = 1,
              ticks_per_period: int = 100) -> tuple[RelayRecord, float, float]:
    """Relay experiment on a batch plant with d = 1, tick = Tu/ticks_per_period.

    noise_frac: sensor noise std as a fraction of the expected oscillation amplitude
    4 d / (pi Ku); then quantisation of the same size and hysteresis = max(3 noise,
    2 resolution) (the issue's precheck default, common practice, no source). Returns the
    record and the true Ku, Tu.
    """
    num, den, delay = BATCH[name]
    ku, tu = true_ultimate(num, den, delay)
    ts = tu / ticks_per_period
    a = 4.0 / (np.pi * ku)
    noise = noise_frac * a
    resolution = noise
    hyst = max(3 * noise, 2 * resolution)
    rec = run_relay(num, den, delay, ts=ts, amplitude=1.0, hysteresis=hyst, noise=noise,
                    resolution=resolution, n_cycles=cycles, period_guess=1.3 * tu, seed=seed)
    return rec, ku, tu


# ---------------------------------------------------------------------------- whole tune run
@dataclass(frozen=True)
class TuneSim:
    """A simulated tune run through the real relay state machine (test data).

    t, pv, out: every sample (s, PV units, output units); phase: "rest", "direction", "relay"
    per sample; rest, direction: the precheck reports; settings: the relay settings as
    finally used; experiment: the RelayExperiment after the run; t_pulse: start of the
    direction pulse (first motion, s); ts: tick (s).
    """

    t: np.ndarray
    pv: np.ndarray
    out: np.ndarray
    phase: np.ndarray
    rest: object
    direction: object
    settings: RelaySettings
    experiment: object
    t_pulse: float
    ts: float
    hysteresis: float

    def relay(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        sel = self.phase == "relay"
        return self.t[sel], self.pv[sel], self.out[sel]


def simulate_tune(num, den, delay: float, *, ts: float, relay_cfg=None, output_limit: float = 30.0,
                  pv_window: float = 5.0, noise: float = 0.0, resolution: float = 0.0,
                  deadband: float = 0.0, load: float = 0.0, out_delay: int = 0,
                  rest_time: float = 1.0, pulse_timeout: float = 2.0, seed: int = 0,
                  bias: float = 0.0) -> TuneSim:
    """Rest, direction pulse and relay experiment on a simulated loop, decided by the same pure
    functions as the tune runner (autotune.core.prechecks, autotune.config.relay_plan,
    autotune.core.relay.RelayExperiment).

    The plant (num/den with `delay`, s) sits behind an actuator that saturates at
    `output_limit` and has a dead zone of half-width `deadband` (output units), with a constant
    `load` (output units) at its input from the start; the sensor adds noise (std, PV units)
    and quantises to `resolution`. Each tick of `ts` s the PV is sampled, the output decided
    and held `out_delay` ticks later (0: the device relay; 1: a host loop one tick behind).
    relay_cfg: an autotune.config.RelayConfig (default: the config's defaults).
    """
    from autotune.config import RelayConfig, relay_plan
    from autotune.core import prechecks as pre
    from autotune.core.relay import RelayExperiment
    from mock_device.plant import Actuator

    rc = relay_cfg if relay_cfg is not None else RelayConfig()
    plant = LtiPlant(num, den, delay, max_step=ts)
    act = Actuator(limit=max(output_limit, 1e-9) * 10.0, deadband=deadband)
    sensor = Sensor(noise=noise, resolution=resolution, rng=np.random.default_rng(seed))
    # settle the load's effect on a self-regulating plant before the run (as a board at rest)
    if load and plant.den[-1] != 0.0:
        for _ in range(int(20 * max(1.0, sum(abs(c) for c in plant.den[:-1])) / ts) + 1):
            plant.advance(act.apply(bias) + load, ts)
    ts_, pv_, out_, ph_ = [], [], [], []
    queue = [bias] * out_delay
    t = 0.0

    def tick(decide, phase: str) -> float:
        nonlocal t
        y = sensor.read(plant.y)
        u = decide(t, y)
        queue.append(u)
        applied = queue.pop(0)
        ts_.append(t)
        pv_.append(y)
        out_.append(applied)
        ph_.append(phase)
        plant.advance(act.apply(applied) + load, ts)
        t += ts
        return y

    n_rest = max(3, int(round(rest_time / ts)))
    for _ in range(n_rest):
        tick(lambda _t, _y: bias, "rest")
    rest = pre.assess_rest(np.array(ts_), np.array(pv_), np.array(out_), pv_window=pv_window)
    start_amp = rc.start_amplitude if rc.start_amplitude is not None else 0.25 * output_limit
    threshold = pre.direction_threshold(rest.noise_std, rc.target_amplitude)
    drift = rest.significant_drift
    t_mid = float(np.mean(ts_))
    base = rest.mean
    t_pulse = t
    window: list[float] = []
    i0 = len(ts_)
    while t - t_pulse < pulse_timeout:
        y = tick(lambda _t, _y: bias + start_amp, "direction")
        window.append(y - drift * (t - ts - t_mid))
        recent = sorted(window[-3:])
        if abs(recent[len(recent) // 2] - base) > threshold:
            break
    tt, yy = np.array(ts_), np.array(pv_)
    d = pre.assess_direction(tt, yy - drift * (tt - t_mid), t_pulse, +1, rest.noise_std,
                             min_change=threshold)
    from dataclasses import replace as _replace

    d = _replace(d, resolution=pre.smallest_step(yy[i0:]))
    res = pre.pv_resolution(0.0, rest.resolution, d.resolution)
    hyst = rc.hysteresis if rc.hysteresis is not None else pre.relay_hysteresis(rest.noise_std,
                                                                                res)
    settings = RelaySettings(centre=rest.mean, bias=bias, amplitude=start_amp,
                             hysteresis=hyst, asymmetry=rc.asymmetry)
    response = (d.t_response - t_pulse) if d.t_response is not None else pulse_timeout
    plan = relay_plan(rc, start_amplitude=start_amp, pv_window=pv_window, tick=ts,
                      pv_noise=rest.noise_std, pv_resolution=res, response_time=response)
    exp = RelayExperiment(plan, settings, output_limit, pv_start=rest.mean)
    steps = 0
    limit = int(round((rc.max_time + 10.0) / ts))
    while not exp.done and steps < limit:
        tick(lambda tk, yk: exp.update(tk, yk).output, "relay")
        steps += 1
    return TuneSim(np.array(ts_), np.array(pv_), np.array(out_), np.array(ph_, dtype=object),
                   rest, d, exp.settings, exp, t_pulse, ts, hyst)


def sim_record(sim: TuneSim, relay_cfg=None, output_limit: float = 30.0,
               pv_resolution: float = 0.0):
    """The autotune.core.identify.RunRecord of a simulated run (what the tune runner builds)."""
    from dataclasses import asdict

    from autotune.config import RelayConfig
    from autotune.core.identify import RelaySettingsRecord, RunRecord

    rc = relay_cfg if relay_cfg is not None else RelayConfig()
    phase = np.array([{"rest": "precheck:rest", "direction": "precheck:direction"}.get(p, p)
                      for p in sim.phase], dtype=object)
    s = sim.settings
    settings = RelaySettingsRecord(s.centre, s.bias, s.amplitude, s.hysteresis, s.asymmetry)
    return RunRecord(t=sim.t, y=sim.pv, u=sim.out, phase=phase, settings=settings, state=None,
                     tick=sim.ts, output_limit=output_limit, relay=asdict(rc),
                     rest=sim.rest.as_dict(), direction=sim.direction.as_dict(),
                     pv_resolution=pv_resolution, t_first_motion=sim.t_pulse,
                     end_reason=sim.experiment.end_reason)


def make_plan(**kw):
    """A RelayPlan with the config's [relay] defaults (autotune.config.RelayConfig, the one place
    for them) and the given overrides (config keys and the plan's own settings alike)."""
    from autotune.config import RelayConfig, relay_plan

    keys = set(RelayConfig.__dataclass_fields__) - {"start_amplitude"}
    cfg = {k: kw.pop(k) for k in list(kw) if k in keys}
    return relay_plan(RelayConfig(**cfg), **kw)
