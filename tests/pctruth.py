"""Truth for the design checks, computed with python-control only (test and bench helper).

The loop as it runs on a board: the continuous plant num/den with dead time, driven through a
zero-order hold every ts seconds, and the project's DiscretePid (derivative on the measurement,
filter Tf = kd/(kp N)). The plant is sampled exactly by `control.sample_system(..., "zoh")`;
the whole ticks of dead time are z^-m, the fraction of a tick left over is a 6th-order Padé
approximant (`control.pade`) in the continuous plant before sampling. Ms = max |1/(1 + L)| of the
sampled loop L(e^{j w ts}) from `control.frequency_response` on a dense grid up to the Nyquist
frequency; stability from the closed-loop poles of the sampled loop (`control.feedback`).
"""

from __future__ import annotations

import math

import control  # python-control: the outside reference
import numpy as np

from autotune.core.pid import PidGains, per_tick


def sampled_plant(num, den, delay: float, ts: float) -> control.TransferFunction:
    """The ZOH-sampled plant with its dead time (see the module docstring)."""
    m = int(math.floor(delay / ts + 1e-9))
    frac = delay - m * ts
    g = control.tf(list(num), list(den))
    if frac > 1e-12:
        pn, pd = control.pade(frac, 6)
        g = g * control.tf(pn, pd)
    gd = control.sample_system(g, ts, method="zoh")
    return gd * control.tf([1], [1] + [0] * m, ts)


def sampled_controller(g: PidGains, ts: float, n: float = 10.0) -> control.TransferFunction:
    """The DiscretePid's feedback path C(z) = kp + ki ts/(z - 1) + bd (z - 1)/(z - ad)."""
    c = per_tick(g, ts, n)
    z = control.tf([1, 0], [1], ts)
    out = g.kp + c["ki_ts"] / (z - 1)
    if g.kd != 0.0:
        out = out + c["bd"] * (z - 1) / (z - c["ad"])
    return out


def sampled_ms(num, den, delay: float, g: PidGains, ts: float, n: float = 10.0) -> float:
    """Ms of the sampled loop, inf when the closed loop is unstable (python-control)."""
    loop = sampled_controller(g, ts, n) * sampled_plant(num, den, delay, ts)
    poles = control.feedback(loop, 1).poles()
    if np.max(np.abs(poles)) >= 1.0:
        return math.inf
    w = np.concatenate([np.logspace(-3, 0, 300), np.linspace(1.0, 0.999 * math.pi / ts, 20000)])
    resp = control.frequency_response(loop, w)
    lj = np.asarray(resp.magnitude).ravel() * np.exp(1j * np.asarray(resp.phase).ravel())
    return float(1.0 / np.min(np.abs(1.0 + lj)))
