"""The snapshot a powered run publishes for the screen (autotune.core.progress.RunSnapshot)."""

from __future__ import annotations

from typing import Any

from autotune.core.progress import LimitGauge, LinkHealth, RunSnapshot


def run_snapshot(run: Any, **overrides: Any) -> RunSnapshot:
    """The current state of `run` (an autotune.job.powered.PoweredRun): phase, the recent
    samples, how close each limit is, the link's health, the alarm; `overrides` last."""
    info = run.info
    gauges: list[LimitGauge] = []
    last = run.last_sample
    if run.pv_start is not None and last is not None:
        s = run.cfg.safety
        gauges.append(LimitGauge("pv_window", last.pv - run.pv_start, s.pv_window))
        gauges.append(LimitGauge("output", last.output, s.output_limit))
        if run.t_start is not None:
            gauges.append(LimitGauge("duration", last.t - run.t_start, s.max_duration, "s"))
    health = LinkHealth()
    if run.link is not None:
        st = run.link.stats()
        health = LinkHealth(st.rtt_median, st.rtt_p99, st.frames_good, st.seq_gaps,
                            st.crc_errors)
    fields_: dict[str, Any] = dict(
        phase=run.phase,
        message=run.message,
        device=f"{info.device_name} {info.firmware}" if info is not None else "",
        axis=run.axis,
        loop_mode=run.loop_mode,
        t=tuple(run.recent.t),
        pv=tuple(run.recent.pv),
        sp=tuple(run.recent.sp),
        out=tuple(run.recent.out),
        limits=tuple(gauges),
        link=health,
        alarm=run.alarm,
    )
    fields_.update(run.snapshot_extra)
    fields_.update(overrides)
    return RunSnapshot(**fields_)
