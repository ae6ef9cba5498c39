"""Plain lines for when stdout is not a terminal: no escape codes, the same information.

Each function is pure: a snapshot or view in, lines of text out. `PlainReporter` prints the lines
that changed since the last snapshot (phase, cycle, alarm, stop) rather than every sample, so a log
file stays readable.
"""

from __future__ import annotations

from collections.abc import Callable

from autotune.core.progress import Phase, RunSnapshot
from autotune.ui.views import FinishView, ProposalsView, StartView, StepView
from autotune.ui.widgets import LIMIT_LABELS, estimate_changes, fmt, phase_label

ABORT_HINT = "stop keys: Space, Esc, q, Ctrl-C (the physical cut-off is the real stop)"


def start_lines(view: StartView) -> list[str]:
    """The start screen as lines."""
    lines = [
        f"device {view.device} on {view.port}" + (" (simulated board)" if view.simulated else ""),
        f"axis {view.axis}, loop {view.loop_mode}",
    ]
    if view.out_dir:
        lines.append(f"files to {view.out_dir}")
    lines.append("limits in force: " + "; ".join(f"{k} {v}" for k, v in view.limits))
    if view.plan:
        lines.append("relay plan: " + "; ".join(f"{k} {v}" for k, v in view.plan))
    lines.append("before the motor moves:")
    lines += [f"  - {c}" for c in view.cautions]
    lines.append(ABORT_HINT)
    return lines


def limits_text(snap: RunSnapshot) -> str:
    """Every limit as 'name value/limit (percent)'."""
    parts = []
    for g in snap.limits:
        label = LIMIT_LABELS.get(g.name, g.name)
        if not g.limit or g.limit == float("inf"):
            parts.append(f"{label} off")
        else:
            parts.append(f"{label} {fmt(abs(g.value), 3)}/{fmt(g.limit, 3)} "
                         f"({g.fraction * 100:.0f}%)")
    return ", ".join(parts)


def link_text(snap: RunSnapshot) -> str:
    """Link health in one phrase."""
    ln = snap.link
    rtt = "—" if ln.rtt_median is None else f"{ln.rtt_median * 1e3:.1f} ms"
    return f"rtt {rtt}, {ln.frames_good} ok, {ln.frames_lost} lost, {ln.crc_errors} crc"


def estimate_line(snap: RunSnapshot) -> str | None:
    """The newest cycle estimate with its change from the cycle before."""
    if not snap.estimates:
        return None
    e = snap.estimates[-1]
    ch = estimate_changes(snap.estimates)[-1]
    delta = "" if ch is None else f", change {ch * 100:.1f}%"
    conv = ", converged" if snap.converged else ""
    plain = f" (plain {fmt(e.ku_df)})" if e.ku_df is not None else ""
    return (f"cycle {e.index}: period {fmt(e.period)} s, p-p {fmt(e.amplitude)}, "
            f"Ku {fmt(e.ku)}{plain}, Tu {fmt(e.tu)} s{delta}{conv}")


def snapshot_lines(snap: RunSnapshot) -> list[str]:
    """The live screen as lines: phase, progress, latest values, estimate, limits, link, alarm."""
    lines = []
    if snap.alarm:
        lines.append(f"ALARM: {snap.alarm}")
    lines.append(f"[{phase_label(snap)}] {snap.progress * 100:.0f}% {snap.message}".rstrip())
    if snap.pv:
        lines.append(f"  pv {fmt(snap.pv[-1])}, out {fmt(snap.out[-1] if snap.out else None)}, "
                     f"t {fmt(snap.t[-1] if snap.t else None)} s")
    est = estimate_line(snap)
    if est:
        lines.append("  " + est)
    if snap.limits:
        lines.append("  limits: " + limits_text(snap))
    lines.append("  link: " + link_text(snap))
    if snap.stopped:
        lines.append("  motor stopped: the device confirmed zero output")
    return lines


def snapshot_changes(prev: RunSnapshot | None, snap: RunSnapshot) -> list[str]:
    """Lines worth printing when `snap` follows `prev`: a new phase or message, a finished relay
    cycle, an alarm, the stop confirmation. Nothing for a snapshot that only adds samples."""
    if prev is None or prev.phase != snap.phase:
        return snapshot_lines(snap)
    lines: list[str] = []
    if snap.alarm and snap.alarm != prev.alarm:
        lines.append(f"ALARM: {snap.alarm}")
    if snap.message != prev.message and snap.message:
        lines.append(f"[{phase_label(snap)}] {snap.message}")
    if len(snap.estimates) != len(prev.estimates) or snap.converged != prev.converged:
        est = estimate_line(snap)
        if est:
            lines.append("  " + est)
            if snap.limits:
                lines.append("  limits: " + limits_text(snap))
    if snap.link.frames_lost > prev.link.frames_lost or snap.link.crc_errors > prev.link.crc_errors:
        lines.append("  link: " + link_text(snap))
    if snap.stopped and not prev.stopped:
        lines.append("  motor stopped: the device confirmed zero output")
    return lines


def proposals_lines(view: ProposalsView) -> list[str]:
    """The proposals table as lines; the default marked with '*', violations after '!'."""
    lines = [f"identified Ku {fmt(view.ku)}, Tu {fmt(view.tu)} s"
             + (f", model {view.model}" if view.model else ""),
             f"Ms target {view.ms_target:.2f}, detune x{view.detune:.2f}"
             + (f", spec {view.spec}" if view.spec else ""),
             f"{'#':>2}  {'design':<12}{'kp':>10}{'ki /s':>10}{'kd s':>10}{'b':>6}{'Ms':>7}"
             f"{'GM':>7}{'PM deg':>8}{'OS %':>7}{'tr s':>8}{'ts s':>8}{'u peak':>8}  flags"]
    for i, r in enumerate(view.rows):
        p = r.predicted
        mark = "*" if r.default else " "
        flags = ("default " if r.default else "") + (
            "! " + "; ".join(r.violations) if r.violations else "")
        lines.append(
            f"{i + 1:>2}{mark} {r.name:<12}{fmt(r.kp):>10}{fmt(r.ki):>10}{fmt(r.kd):>10}"
            f"{r.setpoint_weight:>6.2f}"
            f"{fmt(p.get('ms'), 3):>7}{fmt(p.get('gain_margin'), 3):>7}"
            f"{fmt(p.get('phase_margin_deg'), 3):>8}{fmt(p.get('overshoot'), 3):>7}"
            f"{fmt(p.get('rise_time'), 3):>8}{fmt(p.get('settling_time'), 3):>8}"
            f"{fmt(p.get('peak_output'), 3):>8}  {flags}".rstrip())
    if view.rows:
        sel = view.rows[min(max(view.selected, 0), len(view.rows) - 1)]
        lines.append(f"chosen: {sel.name} (setpoint weight b {sel.setpoint_weight:.2f})")
    if view.message:
        lines.append(view.message)
    return lines


def step_lines(view: StepView) -> list[str]:
    """The step result as lines: gains, verdict, measured vs predicted."""
    lines = [f"step with {view.name}: kp {fmt(view.kp)}, ki {fmt(view.ki)} /s, kd {fmt(view.kd)} s"]
    v = view.verdict
    if v is None:
        lines.append(f"no verdict: {view.message or 'the step was stopped'}")
    else:
        action = getattr(v.action, "value", str(v.action))
        lines.append(("PASS: " if v.passed else "NOT MET: ") + v.reason
                     + ("" if v.passed else f" (suggested: {action})"))
        for c in v.checks:
            lines.append(f"  {'ok' if c.passed else 'FAIL'} {c.message}")
    lines.append(f"  {'figure':<20}{'measured':>11}{'predicted':>11}{'difference':>12}")
    for r in view.rows:
        label = f"{r.name} ({r.unit})"
        diff = "—" if r.difference is None else f"{r.difference:+.3g}"
        lines.append(f"  {label:<20}{fmt(r.measured, 3):>11}{fmt(r.predicted, 3):>11}{diff:>12}")
    if view.message and v is not None:
        lines.append(view.message)
    return lines


def finish_lines(view: FinishView) -> list[str]:
    """The finish screen as lines."""
    lines = [("done: " if view.ok else "ended: ") + view.message]
    lines += [f"  {what}: {path}" for what, path in view.files]
    if view.gains:
        lines.append("accepted gains: " + ", ".join(f"{k} {v}" for k, v in view.gains))
    if view.code:
        lines.append("per-tick values for your loop code:")
        lines += ["  " + ln for ln in view.code.splitlines()]
    return lines


class PlainReporter:
    """Prints the lines that changed between snapshots through `write` (one line a call)."""

    def __init__(self, write: Callable[[str], None]) -> None:
        self.write = write
        self.prev: RunSnapshot | None = None

    def update(self, snap: RunSnapshot) -> None:
        """Print what `snap` adds to the previous snapshot."""
        for line in snapshot_changes(self.prev, snap):
            self.write(line)
        self.prev = snap

    @property
    def phase(self) -> Phase | None:
        return None if self.prev is None else self.prev.phase
