"""In-process relay experiment on a simulated plant, sampled like the real board (test data).

Device tick k at t_k = k ts: pv_k = sensor(plant output at t_k); the relay decides u_k from
pv_k; u_k is held over [t_k, t_k+1) (mock_device.plant.LtiPlant, exact ZOH with dead time).
A rest segment at the bias output comes first, as after the rest precheck.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from mock_device.plant import LtiPlant, Sensor

try:  # the project's relay when it exists
    from autotune.relay import Relay as _ProjectRelay
    from autotune.relay import RelaySettings
except ImportError:  # pragma: no cover - until autotune.relay lands
    _ProjectRelay = None

    @dataclass(frozen=True)
    class RelaySettings:  # type: ignore[no-redef]
        """Minimal stand-in with the fields of autotune.relay.RelaySettings."""

        centre: float
        bias: float
        amplitude: float
        hysteresis: float
        asymmetry: float = 0.0


class _MiniRelay:
    """Relay with hysteresis on the error e = centre - pv: high when e > eps, low when e < -eps."""

    def __init__(self, settings: RelaySettings, output_limit: float) -> None:
        self.s = settings
        self.limit = output_limit
        self.state = 1

    def update(self, t: float, pv: float) -> float:
        e = self.s.centre - pv
        if self.state < 0 and e > self.s.hysteresis:
            self.state = 1
        elif self.state > 0 and e < -self.s.hysteresis:
            self.state = -1
        asym = getattr(self.s, "asymmetry", 0.0)
        if self.state > 0:
            out = self.s.bias + self.s.amplitude * (1 + asym)
        else:
            out = self.s.bias - self.s.amplitude * (1 - asym)
        return float(min(self.limit, max(-self.limit, out)))


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
              rest: int = 20, output_limit: float = 1e9, seed: int = 0,
              use_project_relay: bool = True) -> RelayRecord:
    """Run a relay experiment: `rest` ticks at the bias, then the relay for `duration` s
    (default n_cycles * period_guess). PV = plant output + noise (std, PV units), quantised to
    `resolution`; `load` is a constant disturbance at the plant input (output units)."""
    if duration is None:
        if period_guess is None:
            raise ValueError("give duration or period_guess")
        duration = n_cycles * period_guess
    settings = RelaySettings(centre=centre, bias=bias, amplitude=amplitude,
                             hysteresis=hysteresis)
    if use_project_relay and _ProjectRelay is not None:
        relay = _ProjectRelay(settings, output_limit)
    else:
        relay = _MiniRelay(settings, output_limit)
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
