"""What a job is asked to do: frozen requests, built once from the config and the command line.

Every default lives in the config schema (autotune.config); a request only records which board
to use, where the files go and the operator's choices for this run. The front ends (commands,
UI) build a request and hand it to autotune.job.job; nothing downstream reads argparse values.
Units: PV units, output units, seconds; gains in parallel form (kp output units per PV unit, ki
per second, kd in seconds).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from autotune.config import Config
from autotune.core.pid import PidGains
from autotune.errors import EXIT_USAGE, UserError
from autotune.simdevice import SIM


@dataclass(frozen=True)
class BoardRequest:
    """Which board to drive: a port URL, or "sim" with the simulated board's settings.

    plant: scenario name or plant TOML file (sim only); speed: how many times faster than the
    wall clock the simulated board's time runs (also for a simulated board started elsewhere);
    faults, seed: fault injection and noise seed of the simulated board.
    """

    port: str
    plant: str = "cart-wheel"
    speed: float = 1.0
    faults: str | None = None
    seed: int | None = None

    @property
    def simulated(self) -> bool:
        return self.port == SIM

    @classmethod
    def of(cls, cfg: Config, faults: str | None = None, seed: int | None = None
           ) -> BoardRequest:
        """The board of a config (connection.port, .plant, .speed) plus the sim options."""
        port = cfg.connection.port
        if not port:
            raise UserError("no port given: use --port URL (or --port sim), or set "
                            "connection.port in the config", exit_code=EXIT_USAGE)
        return cls(str(port), cfg.connection.plant, float(cfg.connection.speed), faults, seed)


@dataclass(frozen=True)
class GainsChoice:
    """One set of gains to try in a confirmation step, with what is known about them.

    name: proposal name ("manual" for hand-given gains); predicted: figures on the model
    (overshoot %, settling_time s, ms, ...; empty when unknown); setpoint_weight: b of the
    proportional term (kp (b sp - pv)); deriv_filter_n: N of the derivative filter Tf = Td/N;
    tracking_time: back-calculation time s (None: clamping); runnable: False when the design
    found it unsafe on the model (unstable closed loop), with `why_not`; default: the design's
    default proposal.
    """

    name: str
    gains: PidGains
    predicted: Mapping[str, Any] = field(default_factory=dict)
    setpoint_weight: float = 1.0
    deriv_filter_n: float = 10.0
    tracking_time: float | None = None
    runnable: bool = True
    why_not: str = ""
    default: bool = False
    violations: tuple[str, ...] = ()

    @classmethod
    def of_proposal(cls, prop: Mapping[str, Any], deriv_filter_n: float = 10.0) -> GainsChoice:
        """The choice for one result.json proposal entry (validated: finite gains)."""
        def num(key: str, default: float | None = None) -> float:
            v = prop.get(key, default)
            if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
                raise UserError(f"proposal {prop.get('name', '?')!r}: {key} must be a finite "
                                f"number, got {v!r}", exit_code=EXIT_USAGE)
            return float(v)

        pred = prop.get("predicted") if isinstance(prop.get("predicted"), Mapping) else {}
        b = prop.get("setpoint_weight", 1.0)
        tt = prop.get("tracking_time")
        n = prop.get("deriv_filter_n", deriv_filter_n)
        stable = pred.get("stable", True) if isinstance(pred, Mapping) else True
        runnable = bool(prop.get("runnable", stable is not False))
        why = str(prop.get("not_runnable_reason") or ("closed loop unstable on the model"
                                                      if stable is False else ""))
        return cls(
            name=str(prop.get("name", "proposal")),
            gains=PidGains(num("kp"), num("ki", 0.0), num("kd", 0.0)),
            predicted=dict(pred or {}),
            setpoint_weight=float(b) if isinstance(b, int | float) and 0 <= b <= 1 else 1.0,
            deriv_filter_n=float(n) if isinstance(n, int | float) and n > 0 else deriv_filter_n,
            tracking_time=float(tt) if isinstance(tt, int | float) and tt > 0 else None,
            runnable=runnable,
            why_not=why if not runnable else "",
            default=bool(prop.get("default", False)),
            violations=tuple(str(v) for v in prop.get("violations") or ()),
        )


@dataclass(frozen=True)
class JobRequest:
    """One job: the config, the board, where the files go and what to run.

    verb: "tune", "step" or "demo" (recorded in the session header); yes: no questions (the
    cautions still print; the default proposal runs and a step that meets the spec is
    accepted); force: allow gains the design marks not runnable; relay: run the prechecks and
    the relay experiment (False for `step`, whose gains are given); confirm_step: run the
    confirmation step after the proposals; gains: the gains to try first (`step`);
    proposals/model: the pool and fitted model of a tune result (`step --from-result`), for
    other choices, predictions and detuning; gains_file: where accepted gains go (default
    out_dir/gains.toml); store: on accept, also store the gains on the board; csv: also write
    the samples as CSV beside the session.
    """

    cfg: Config
    board: BoardRequest
    out_dir: Path
    verb: str = "tune"
    yes: bool = False
    force: bool = False
    relay: bool = True
    confirm_step: bool = True
    gains: GainsChoice | None = None
    proposals: tuple[Mapping[str, Any], ...] = ()
    model: Mapping[str, Any] | None = None
    result_source: Path | None = None
    gains_file: Path | None = None
    store: bool = False
    csv: bool = False

    @property
    def gains_path(self) -> Path:
        return self.gains_file if self.gains_file is not None else self.out_dir / "gains.toml"

    def stages(self) -> tuple[tuple[str, float | None], ...]:
        """The phases this job runs, in order (autotune.core.progress.Phase values), each with
        the most device seconds it takes where the config bounds it (None: unknown). A phase
        decided during the run (a breakaway the relay asks for) is not listed."""
        p, r = self.cfg.prechecks, self.cfg.relay
        if not self.relay:
            return (("connect", None), ("step", None))
        out: list[tuple[str, float | None]] = [
            ("connect", None), ("precheck:rest", p.rest_time),
            ("precheck:direction", p.pulse_timeout)]
        if p.breakaway is True:
            out.append(("precheck:breakaway", None))
        out += [("relay", r.max_time), ("analysis", None)]
        if self.confirm_step:
            out += [("proposals", None), ("step", None)]
        return tuple(out)
