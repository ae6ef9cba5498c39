"""A line chart drawn in braille dots (2 x 4 dots a character cell), as a rich renderable.

Own code, no plotting library: a chart here is a few hundred samples on a few dozen character
cells, which a small rasteriser handles in well under a millisecond, and keeping it ours means no
extra dependency and exact control over widths (the chart always fills exactly the width rich
offers, down to the 80-column terminal).

Each series is drawn as connected line segments; where two series share a cell, the one listed
later wins the colour (list the reference first, the measurement last). NaN breaks a line.
Colour is never the only cue: a series may be dashed or dotted, and carries a letter that is
written on the line at a few places and in the legend (S setpoint, P PV, U output, M model
prediction), so the chart reads the same on a monochrome terminal.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from rich.console import Console, ConsoleOptions, RenderResult
from rich.segment import Segment
from rich.style import Style
from rich.text import Text

from autotune.ui import theme

BRAILLE_BASE = 0x2800
# Bit of the dot at (column 0..1, row 0..3) inside one braille cell (Unicode braille patterns).
_DOT_BITS = ((0x01, 0x02, 0x04, 0x40), (0x08, 0x10, 0x20, 0x80))


LINE_GLYPHS = {"solid": "━━", "dashed": "╍╍", "dotted": "┈┈"}
"""How each line pattern is drawn in a legend."""


@dataclass(frozen=True)
class Series:
    """One trace: `x` and `y` of equal length (x usually time in s), a style and a name.

    pattern: "solid", "dashed" (4 dots on, 4 off along the line) or "dotted" (every third
    dot); letter: one character written on the line at a few places and in the legend ("" for
    none)."""

    x: Sequence[float]
    y: Sequence[float]
    style: str
    name: str
    pattern: str = "solid"
    letter: str = ""


def _keep(pattern: str, n: int) -> bool:
    """Whether the n-th dot along a line of `pattern` is drawn."""
    if pattern == "dashed":
        return (n // 4) % 2 == 0
    if pattern == "dotted":
        return n % 3 == 0
    return True


def nice_range(values: Sequence[float], pad: float = 0.08) -> tuple[float, float]:
    """A y-range holding every finite value with `pad` of the span above and below.

    A flat or empty series gets a range of +/-1 (or +/-10% of its value) around it.
    """
    finite = [v for v in values if math.isfinite(v)]
    if not finite:
        return (-1.0, 1.0)
    lo, hi = min(finite), max(finite)
    span = hi - lo
    if span <= 1e-12 * max(1.0, abs(lo), abs(hi)):
        half = max(abs(lo) * 0.1, 1.0) if lo != 0 else 1.0
        return (lo - half, hi + half)
    return (lo - pad * span, hi + pad * span)


def _runs(x: Sequence[float], y: Sequence[float]) -> list[tuple[np.ndarray, np.ndarray]]:
    """The finite stretches of (x, y) as arrays (NaN or inf in either breaks the line)."""
    n = min(len(x), len(y))
    xa = np.asarray(x[:n], dtype=float)
    ya = np.asarray(y[:n], dtype=float)
    ok = np.isfinite(xa) & np.isfinite(ya)
    out = []
    if not ok.any():
        return out
    edges = np.flatnonzero(np.diff(np.r_[0, ok.astype(np.int8), 0]))
    for a, b in zip(edges[::2], edges[1::2], strict=True):
        out.append((xa[a:b], ya[a:b]))
    return out


def _line(x0: int, y0: int, x1: int, y1: int) -> list[tuple[int, int]]:
    """Pixels of a line from (x0, y0) to (x1, y1), both ends included (Bresenham)."""
    points = []
    dx, dy = abs(x1 - x0), -abs(y1 - y0)
    sx = 1 if x0 < x1 else -1
    sy = 1 if y0 < y1 else -1
    err = dx + dy
    while True:
        points.append((x0, y0))
        if x0 == x1 and y0 == y1:
            return points
        e2 = 2 * err
        if e2 >= dy:
            err += dy
            x0 += sx
        if e2 <= dx:
            err += dx
            y0 += sy


def rasterise(
    series: Sequence[Series],
    width: int,
    height: int,
    x_range: tuple[float, float],
    y_range: tuple[float, float],
) -> list[list[tuple[str, str | None]]]:
    """Draw `series` into `height` rows of `width` braille cells: each cell is (char, style|None).

    Row 0 is the top (largest y). Points outside the ranges are clipped to the border. A
    series with a letter has it written over the line in a few cells (see `_place_letters`).
    """
    cols, rows = 2 * width, 4 * height
    bits = [[0] * width for _ in range(height)]
    owner: list[list[str | None]] = [[None] * width for _ in range(height)]
    mine: list[list[list[int]]] = [[[] for _ in range(width)] for _ in range(height)]
    x0, x1 = x_range
    y0, y1 = y_range
    xs = (cols - 1) / (x1 - x0) if x1 > x0 else 0.0
    ys = (rows - 1) / (y1 - y0) if y1 > y0 else 0.0

    for si, s in enumerate(series):
        count = 0

        def plot(px: int, py: int, s: Series = s, si: int = si) -> None:
            nonlocal count
            keep = _keep(s.pattern, count)
            count += 1
            if not keep:
                return
            cx, cy = px // 2, py // 4
            bits[cy][cx] |= _DOT_BITS[px % 2][py % 4]
            owner[cy][cx] = s.style
            if si not in mine[cy][cx]:
                mine[cy][cx].append(si)

        for run in _runs(s.x, s.y):
            xa = np.clip(np.rint((run[0] - x0) * xs), 0, cols - 1).astype(int)
            ya = np.clip(np.rint((y1 - run[1]) * ys), 0, rows - 1).astype(int)
            # one pixel column at a time: its first, lowest, highest and last dot, so a few
            # thousand samples cost no more than the width of the chart
            starts = np.flatnonzero(np.r_[True, xa[1:] != xa[:-1]])
            ends = np.r_[starts[1:], xa.size]
            lo = np.minimum.reduceat(ya, starts)
            hi = np.maximum.reduceat(ya, starts)
            prev: tuple[int, int] | None = None
            for k, (a, b) in enumerate(zip(starts, ends, strict=True)):
                px = int(xa[a])
                first, last = int(ya[a]), int(ya[b - 1])
                if prev is not None:
                    for qx, qy in _line(prev[0], prev[1], px, first)[1:]:
                        plot(qx, qy)
                for qy in range(int(lo[k]), int(hi[k]) + 1):
                    plot(px, qy)
                prev = (px, last)
    grid = [
        [(chr(BRAILLE_BASE + b) if b else " ", o if b else None) for b, o in zip(br, ow, strict=True)]
        for br, ow in zip(bits, owner, strict=True)
    ]
    _place_letters(grid, mine, series)
    return grid


def _place_letters(grid: list[list[tuple[str, str | None]]], mine: list[list[list[int]]],
                   series: Sequence[Series]) -> None:
    """Write each series' letter over its line: in a cell only that series touches, near a few
    evenly spaced columns (staggered per series so that letters do not pile up)."""
    height = len(grid)
    width = len(grid[0]) if grid else 0
    if width < 8:
        return
    spacing = max(10, width // 3)
    taken: set[tuple[int, int]] = set()
    for si, s in enumerate(series):
        if not s.letter:
            continue
        start = 2 + (si * 5) % spacing
        for target in range(start, width, spacing):
            spot = None
            for off in range(0, spacing // 2):
                for cx in (target + off, target - off):
                    if not 0 <= cx < width:
                        continue
                    for cy in range(height):
                        if mine[cy][cx] == [si] and (cy, cx) not in taken:
                            spot = (cy, cx)
                            break
                    if spot:
                        break
                if spot:
                    break
            if spot is not None:
                cy, cx = spot
                taken.add(spot)
                grid[cy][cx] = (s.letter, f"bold {s.style}")


def format_value(v: float, width: int = 7) -> str:
    """A number in at most `width` characters, four significant digits where they fit."""
    if v == 0 or abs(v) < 1e-12:
        return "0"
    for sig in (4, 3, 2, 1):
        s = f"{v:.{sig}g}"
        if len(s) <= width:
            return s
    return f"{v:.0e}"


def legend_text(series: Sequence[Series], indent: int = 0, note: str = "") -> Text:
    """The key of a chart: each series' letter, its line pattern in its colour and its name;
    `note` (units, time origin) follows in grey."""
    legend = Text(" " * indent, no_wrap=True, overflow="ellipsis")
    for s in series:
        if s.letter:
            legend.append(s.letter, style=f"bold {s.style}")
            legend.append(" ")
        legend.append(LINE_GLYPHS.get(s.pattern, "━━") + " ", style=s.style)
        legend.append(s.name + "  ", style=theme.MUTED)
    if note:
        legend.append(note, style=theme.AXIS)
    return legend


class BrailleChart:
    """A braille line chart that fills the width rich offers.

    `height` is in text rows (4 dots each). The left gutter carries the y-range labels and,
    under the top one, `unit` in brackets (on a two-row chart the unit follows the top label
    where it fits); `x_label` names the time axis below. `legend` adds the key (see
    `legend_text`).
    """

    GUTTER = 8

    def __init__(
        self,
        series: Sequence[Series],
        height: int = 8,
        unit: str = "",
        x_range: tuple[float, float] | None = None,
        y_range: tuple[float, float] | None = None,
        x_label: str = "s",
        show_x_axis: bool = True,
        legend: bool = True,
    ) -> None:
        self.series = list(series)
        self.height = max(2, height)
        self.unit = unit
        self.x_range = x_range
        self.y_range = y_range
        self.x_label = x_label
        self.show_x_axis = show_x_axis
        self.legend = legend

    def ranges(self) -> tuple[tuple[float, float], tuple[float, float]]:
        """The x and y ranges the chart will use."""
        if self.x_range is not None:
            xr = self.x_range
        else:
            xs = [x for s in self.series for x in s.x if math.isfinite(x)]
            xr = (min(xs), max(xs)) if xs else (0.0, 1.0)
            if xr[1] <= xr[0]:
                xr = (xr[0], xr[0] + 1.0)
        yr = self.y_range or nice_range([y for s in self.series for y in s.y])
        return xr, yr

    def labels(self, yr: tuple[float, float]) -> dict[int, str]:
        """Gutter text by row: top, middle and bottom values, and the unit."""
        room = self.GUTTER - 1
        labels = {0: format_value(yr[1]), self.height - 1: format_value(yr[0])}
        if self.height >= 5:
            labels[(self.height - 1) // 2] = format_value((yr[0] + yr[1]) / 2)
        if self.unit:
            if self.height >= 3:  # row 1 never holds a value (the middle one is lower)
                labels[1] = f"[{self.unit}]"
            elif len(labels[0]) + 1 + len(self.unit) <= room:
                labels[0] = f"{labels[0]} {self.unit}"
        return labels

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        width = max(10, options.max_width)
        plot_w = width - self.GUTTER - 1
        xr, yr = self.ranges()
        grid = rasterise(self.series, plot_w, self.height, xr, yr)
        axis = Style.parse(theme.AXIS)
        labels = self.labels(yr)
        for r, row in enumerate(grid):
            label = labels.get(r, "")
            value = bool(label) and not label.startswith("[")
            yield Segment(f"{label:>{self.GUTTER - 1}} ", axis)
            yield Segment("┤" if value else "│", axis)
            run_style: str | None = None
            run = ""
            for ch, st in row:
                if st != run_style and run:
                    yield Segment(run, Style.parse(run_style) if run_style else None)
                    run = ""
                run_style = st
                run += ch
            if run:
                yield Segment(run, Style.parse(run_style) if run_style else None)
            yield Segment.line()
        if self.show_x_axis:
            yield Segment(" " * (self.GUTTER - 1) + " └" + "─" * plot_w, axis)
            yield Segment.line()
            left = format_value(xr[0]).strip()
            right = f"{format_value(xr[1]).strip()} {self.x_label}"
            gap = max(1, plot_w - len(left) - len(right))
            yield Segment(" " * (self.GUTTER + 1) + left + " " * gap + right, axis)
            yield Segment.line()
        if self.legend:
            legend = legend_text(self.series, self.GUTTER + 1)
            legend.truncate(width)
            yield legend
